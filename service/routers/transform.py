"""POST /v1/transform: a filterbank (JSON part or a job id) applied to uploaded waveforms → NPZ."""
from __future__ import annotations

import io
import json
import shutil
from pathlib import Path

import numpy as np
from fastapi import APIRouter, Depends, HTTPException, Request, Response
from starlette.concurrency import run_in_threadpool

from service.auth import require_tenant
from service.corpus_check import parse_read_options, read_for_client
from service.routers import COMMON, errors
from service.routers.jobs import RESULT_FILES
from service.uploads import receive_multipart

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
        "job_id": {"type": "string", "description": "Or: a succeeded job whose filterbank to use."},
        "windowing": {"type": "string", "enum": ["bursts", "whole", "sliding"]},
        "csv_sampling_rate_hz": {"type": "number", "exclusiveMinimum": 0}}}}}}}


def transform_npz(filterbank_json: dict, paths, names, options: dict, settings) -> bytes:
    """Read the files at the filterbank's rate and window length, transform, pack as NPZ.

    NPZ arrays (no object arrays): ``representation`` (M, C, N) float32; ``times_s`` (N,) s from
    the window start; ``center_hz``, ``time_spread_s``, ``freq_spread_hz``, ``cell_area``,
    ``chirp_hz_per_s``, ``correlation`` (C,) — the channel table; ``sampling_rate_hz`` (); and per
    window ``window_file``, ``window_trace_id`` (unicode) and ``window_offset_s`` (M,).
    """
    from search.filterbank import Filterbank
    from search.transform import transform

    try:
        filterbank = Filterbank.from_json(filterbank_json)
    except (ValueError, KeyError, TypeError) as exc:
        raise HTTPException(status_code=422, detail=f"filterbank: {exc}") from None
    fs = float(filterbank.sampling_rate_hz)
    read = {"sampling_rate_hz": fs}
    window_samples = filterbank_json.get("window_samples")
    if isinstance(window_samples, (int, float)) and window_samples > 0:
        read["window_s"] = float(window_samples) / fs
    provenance = filterbank_json.get("provenance") or {}
    saved = provenance.get("settings") if isinstance(provenance, dict) else None
    if isinstance(saved, dict) and saved.get("windowing") in ("bursts", "whole", "sliding"):
        read["windowing"] = saved["windowing"]
    read.update(options)
    corpus = read_for_client(paths, names, read, settings)
    m, n = corpus.windows.shape
    c = len(filterbank.center_hz)
    if m * c * n > settings.max_transform_values:
        limit = settings.max_transform_values
        raise HTTPException(status_code=413, detail=f"the output would hold {m}×{c}×{n} values, "
                                                    f"more than the limit of {limit}")
    representation = np.asarray(transform(corpus.windows, filterbank), dtype=np.float32)
    by_stored = {str(p): name for p, name in zip(paths, names)}
    meta = corpus.window_meta
    buffer = io.BytesIO()
    np.savez(buffer, representation=representation,
             times_s=np.arange(n, dtype=np.float64) / fs,
             center_hz=np.asarray(filterbank.center_hz, dtype=np.float64),
             time_spread_s=np.asarray(filterbank.time_spread_s, dtype=np.float64),
             freq_spread_hz=np.asarray(filterbank.freq_spread_hz, dtype=np.float64),
             cell_area=np.asarray(filterbank.cell_area, dtype=np.float64),
             chirp_hz_per_s=np.asarray(filterbank.chirp_hz_per_s, dtype=np.float64),
             correlation=np.asarray(filterbank.correlation, dtype=np.float64),
             sampling_rate_hz=np.float64(fs),
             window_file=np.array([by_stored.get(str(w.get("file")), "") for w in meta], dtype=str),
             window_trace_id=np.array([str(w.get("trace_id", "")) for w in meta], dtype=str),
             window_offset_s=np.array([float(w.get("offset_s", 0.0)) for w in meta], dtype=np.float64))
    return buffer.getvalue()


@router.post("/transform", response_class=Response, openapi_extra=_BODY, responses={
    200: {"content": {NPZ_MEDIA_TYPE: {"schema": {"type": "string", "format": "binary"}}},
          "description": "NumPy .npz archive"},
    **errors(*COMMON, 400, 404, 409, 415, explicit=True)})
async def transform_files(request: Request, tenant: str = Depends(require_tenant)) -> Response:
    """Apply a filterbank to waveform files: give `filterbank` (JSON) or `job_id`, plus `files`."""
    store, settings = request.app.state.store, request.app.state.settings
    folder = await run_in_threadpool(store.new_upload_dir)
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
            if job["state"] != "succeeded":
                raise HTTPException(status_code=409, detail=f"job {job_id!r} is {job['state']}; "
                                                            "its filterbank exists once it succeeded")
            text = (Path(job["result_dir"]) / RESULT_FILES["filterbank"]).read_text(encoding="utf-8")
        try:
            filterbank_json = json.loads(text)
        except ValueError as exc:
            raise HTTPException(status_code=422, detail=f"filterbank: not JSON ({exc})") from None
        if not isinstance(filterbank_json, dict):
            raise HTTPException(status_code=422, detail="filterbank: expected a JSON object")
        options = parse_read_options({k: v for k, v in upload.fields.items()
                                      if k in ("windowing", "csv_sampling_rate_hz")})
        data = await run_in_threadpool(transform_npz, filterbank_json,
                                       upload.paths(folder, "files"), [f["name"] for f in files],
                                       options, settings)
    finally:
        await run_in_threadpool(shutil.rmtree, folder, True)
    return Response(data, media_type=NPZ_MEDIA_TYPE,
                    headers={"Content-Disposition": 'attachment; filename="transform.npz"'})
