"""POST /v1/transform: a filterbank (JSON part or a job id) applied to uploaded waveforms → NPZ."""
from __future__ import annotations

import errno

import json
import shutil
import uuid
from pathlib import Path

from fastapi import APIRouter, HTTPException, Request, Response
from starlette.background import BackgroundTask
from starlette.concurrency import run_in_threadpool
from starlette.responses import FileResponse

from burstlens.search.documents import FilterbankDocument
from burstlens.service.auth import TenantDep
from burstlens.service.corpus_check import parse_read_options, read_for_client
from burstlens.service.dependencies import SettingsDep, StoreDep
from burstlens.service.routers import COMMON, errors
from burstlens.service.routers.jobs import RESULT_FILES
from burstlens.service.store import NotFound, Store
from burstlens.service.uploads import receive_multipart

router = APIRouter(prefix="/v1", tags=["transform"])

MAX_FILTERBANK_BYTES = 8 * 1024**2
NPZ_MEDIA_TYPE = "application/x-npz"

_BODY = {"requestBody": {"required": True, "content": {"multipart/form-data": {"schema": {
    "type": "object", "required": ["files"],
    "properties": {
        "files": {"type": "array", "items": {"type": "string", "format": "binary"},
                  "minItems": 1,
                  "description": "Waveform files to transform."},
        "filterbank": {"type": "string", "description": "Filterbank JSON (text or file part)."},
        "job_id": {"type": "string", "description": "Or: a search that is done, whose filterbank to use."},
        "windowing": {"type": "string", "enum": ["bursts", "whole", "sliding"]},
        "csv_sampling_rate_hz": {"type": "number", "exclusiveMinimum": 0}}}}}}}


def transform_npz(document: FilterbankDocument, paths, names, options: dict, settings, out: Path,
                  upload_options: dict | None = None) -> None:
    """Read the files as the filterbank's tuning read its corpus, transform, write the NPZ ``out``.

    The corpus reader gets the filterbank's rate and window length and the corpus options its
    tuning set (``FilterbankDocument.reading_options``: ``upload_options``, the job corpus's own
    reading options, under the job's settings), then ``options`` from the request on top. The
    NPZ members are ``search.documents.npz_members``, with the client's file names, written a
    chunk of windows at a time (``search.npz_stream``); on an error ``out`` is not created.
    """
    from burstlens.search.npz_stream import write_transform_npz

    try:
        filterbank = document.filterbank
        read = {**document.reading_options(upload_options), **options}
    except (ValueError, KeyError, TypeError) as exc:
        raise HTTPException(status_code=422, detail=f"filterbank: {exc}") from None
    corpus = read_for_client(paths, names, read, settings)
    m, n = corpus.windows.shape
    c = len(filterbank)
    if m * c * n > settings.max_transform_values:
        limit = settings.max_transform_values
        raise HTTPException(status_code=413, detail=f"the output would hold {m}×{c}×{n} values, "
                                                    f"more than the limit of {limit}")
    by_stored = {str(p): name for p, name in zip(paths, names, strict=True)}
    write_transform_npz(out, corpus.windows, filterbank, corpus.window_meta,
                        lambda stored: by_stored.get(stored, ""))


class _TempFileResponse(FileResponse):
    """A FileResponse whose file exists for this response only: its background task deletes it
    after a full send, and a send that fails (the client went away, an error) deletes it too."""

    async def __call__(self, scope, receive, send) -> None:
        try:
            await super().__call__(scope, receive, send)
        except BaseException:
            Path(self.path).unlink(missing_ok=True)
            raise


def _upload_options(store: Store, tenant: str, job_id) -> dict:
    """The reading options recorded with the corpus of this tenant's job ``job_id``, or {} (no
    such job or corpus here: the filterbank then carries only its job's own settings)."""
    if not isinstance(job_id, str):
        return {}
    try:
        job = store.get_job(job_id, tenant)
        corpus = store.get_corpus(job["corpus_id"], tenant)
    except NotFound:
        return {}
    return dict(corpus["summary"].get("read_options") or {})


@router.post("/transform", response_class=Response, openapi_extra=_BODY,
             operation_id="transformFiles", summary="Transform waveform files with a filterbank",
             responses={
    200: {"content": {NPZ_MEDIA_TYPE: {"schema": {"type": "string", "format": "binary"}}},
          "description": "NumPy .npz archive"},
    **errors(*COMMON, 400, 404, 409, 415)})
async def transform_files(request: Request, store: StoreDep, settings: SettingsDep,
                          tenant: TenantDep) -> Response:
    """Apply a filterbank to waveform files: give `filterbank` (JSON) or `job_id`, plus `files`.

    The files are cut into windows as the filterbank's tuning cut its corpus (its windowing,
    band-pass, trigger and the other corpus options its job and that job's corpus set); the
    fields `windowing` and `csv_sampling_rate_hz` override those for these files.
    """
    folder = await run_in_threadpool(store.new_upload_dir)
    # the NPZ is written to disk, not memory, in the store's tmp/ (swept at start after a crash)
    out = store.tmp_dir / f"transform-{uuid.uuid4().hex}.npz"
    try:
        upload = await receive_multipart(
            request, folder, file_fields={"files", "filterbank"},
            text_fields={"filterbank", "job_id", "windowing", "csv_sampling_rate_hz"},
            max_files=settings.max_files + 1)
        files = upload.files.get("files", [])
        if not files:
            raise HTTPException(status_code=422, detail="no files: send the waveforms as the "
                                                        "multipart field 'files'")
        if len(files) > settings.max_files:
            raise HTTPException(status_code=413, detail=f"more than {settings.max_files} files")
        text = upload.fields.get("filterbank")
        if "filterbank" in upload.files:
            stored = upload.files["filterbank"][0]
            if stored["bytes"] > MAX_FILTERBANK_BYTES:
                raise HTTPException(status_code=413, detail="filterbank file too large")
            text = (folder / stored["stored"]).read_text(encoding="utf-8", errors="replace")
        job_id = upload.fields.get("job_id")
        if (text is None) == (job_id is None):
            raise HTTPException(status_code=422, detail="give exactly one of 'filterbank' "
                                                        "(filterbank JSON) or 'job_id'")
        if job_id is not None:
            job = await run_in_threadpool(store.get_job, job_id, tenant)
            if job["kind"] != "search" or job["state"] != "done":
                raise HTTPException(status_code=409, detail=f"job {job_id!r} is a {job['kind']} "
                                    f"that is {job['state']}; a filterbank exists once a search "
                                    "is done")
            text = (store.path(job["result_dir"]) / RESULT_FILES["filterbank"]).read_text(
                encoding="utf-8")
        try:
            filterbank_json = json.loads(text)
        except ValueError as exc:
            raise HTTPException(status_code=422, detail=f"filterbank: not JSON ({exc})") from None
        if not isinstance(filterbank_json, dict):
            raise HTTPException(status_code=422, detail="filterbank: expected a JSON object")
        document = FilterbankDocument(filterbank_json)
        options = parse_read_options({k: v for k, v in upload.fields.items()
                                      if k in ("windowing", "csv_sampling_rate_hz")})
        made_by = job_id if job_id is not None else (document.job.id if document.job else None)
        upload_options = await run_in_threadpool(_upload_options, store, tenant, made_by)
        await run_in_threadpool(transform_npz, document, upload.paths(folder, "files"),
                                [f["name"] for f in files], options, settings, out,
                                upload_options)
    except OSError as exc:
        out.unlink(missing_ok=True)
        if exc.errno in (errno.ENOSPC, errno.EDQUOT):
            raise HTTPException(status_code=507, detail="the server's disk is full; the transform "
                                "was not written, try again later or ask the operator") from None
        raise
    except BaseException:
        # the writer leaves no file on its own errors; this covers a cancel after it finished
        out.unlink(missing_ok=True)
        raise
    finally:
        await run_in_threadpool(shutil.rmtree, folder, True)
    return _TempFileResponse(out, media_type=NPZ_MEDIA_TYPE,
                             background=BackgroundTask(out.unlink, missing_ok=True),
                             headers={"Content-Disposition": 'attachment; filename="transform.npz"'})
