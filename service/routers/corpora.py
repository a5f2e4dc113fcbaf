"""POST/GET/DELETE /v1/corpora: upload waveform files, checked by the corpus reader before the ack."""
from __future__ import annotations

import shutil

from fastapi import APIRouter, HTTPException, Request, Response
from starlette.concurrency import run_in_threadpool

from burstlens.search.settings import CORPUS_OPTIONS
from burstlens.service.auth import TenantDep
from burstlens.service.corpus_check import check_corpus, parse_read_options
from burstlens.service.dependencies import SettingsDep, StoreDep
from burstlens.service.models import CorpusView
from burstlens.service.routers import COMMON, errors
from burstlens.service.uploads import receive_multipart

router = APIRouter(prefix="/v1/corpora", tags=["corpora"])

_SCHEMA_BOUNDS = {"gt": "exclusiveMinimum", "ge": "minimum", "lt": "exclusiveMaximum",
                  "le": "maximum"}


def _form_field(option) -> dict:
    """OpenAPI schema of a corpus option sent as a form field (text), from its one definition."""
    if option.kind == "choice":
        schema = {"type": "string", "enum": list(option.choices)}
    elif option.kind == "band":
        schema = {"type": "string", "description": "LO,HI in Hz. ", "examples": ["20,1500"]}
    elif option.kind == "codes":
        schema = {"type": "string", "pattern": "^[A-Za-z0-9]+$", "examples": ["ZNE"]}
    else:
        schema = {"type": "integer" if option.kind == "integer" else "number",
                  **{_SCHEMA_BOUNDS[k]: v for k, v in option.bounds().items()}}
    schema["description"] = schema.get("description", "") + option.sentence()
    return schema


_UPLOAD_BODY = {"requestBody": {"required": True, "content": {"multipart/form-data": {"schema": {
    "type": "object", "required": ["files"],
    "properties": {
        "files": {"type": "array", "items": {"type": "string", "format": "binary"},
                  "minItems": 1,
                  "description": "Waveform files: miniSEED, SAC, WAV, .npy/.npz, CSV."},
        **{name: _form_field(option) for name, option in CORPUS_OPTIONS.items()}}}}}}}


@router.post("", status_code=201, response_model=CorpusView, openapi_extra=_UPLOAD_BODY,
             operation_id="uploadCorpus", summary="Upload a corpus of waveform files",
             responses=errors(*COMMON, 400, 415))
async def create_corpus(request: Request, store: StoreDep, settings: SettingsDep,
                        tenant: TenantDep) -> CorpusView:
    """Upload a corpus (multipart field `files`, one part per file).

    Corpus options (the job settings `sta_s`, `trigger_on`, `bandpass_hz`, ...) may come as form
    fields, values as text (`bandpass_hz` as `LO,HI`). The files stream to disk, the corpus reader
    checks them with those options, and only then is the corpus recorded (with the options as
    `summary.read_options`: jobs on it read it so unless their settings override one) and its
    `id` returned. A rejected upload leaves nothing behind.
    """
    folder = await run_in_threadpool(store.new_upload_dir)
    try:
        upload = await receive_multipart(request, folder, file_fields={"files"},
                                         text_fields=set(CORPUS_OPTIONS), max_files=settings.max_files)
        files = upload.files.get("files", [])
        if not files:
            raise HTTPException(status_code=422, detail="no files: send the waveforms as the "
                                                        "multipart field 'files'")
        options = parse_read_options(upload.fields)
        summary, source_hash = await run_in_threadpool(
            check_corpus, upload.paths(folder, "files"), files, options, settings)
        summary["read_options"] = options
        corpus = await run_in_threadpool(store.add_corpus, tenant, folder, files, summary,
                                         source_hash)
    except BaseException:
        await run_in_threadpool(shutil.rmtree, folder, True)
        raise
    return CorpusView.from_corpus(corpus)


@router.get("/{corpus_id}", response_model=CorpusView, operation_id="readCorpus",
            summary="Read what a corpus holds", responses=errors(*COMMON, 404))
def get_corpus(corpus_id: str, store: StoreDep, tenant: TenantDep) -> CorpusView:
    """What the corpus holds: files, traces, windows found, rejections with reasons."""
    return CorpusView.from_corpus(store.get_corpus(corpus_id, tenant))


@router.delete("/{corpus_id}", status_code=204, response_class=Response,
               operation_id="deleteCorpus", summary="Delete a corpus and its files",
               responses=errors(*COMMON, 404, 409))
def delete_corpus(corpus_id: str, store: StoreDep, tenant: TenantDep) -> Response:
    """Delete a corpus and its files (refused while a waiting or working job uses it)."""
    store.delete_corpus(corpus_id, tenant)
    return Response(status_code=204)
