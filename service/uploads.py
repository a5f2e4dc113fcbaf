"""Streaming multipart/form-data reader: file parts go straight to disk, never whole into memory.

The client's file names are kept for display only; on disk a part is ``NNNN.ext`` inside a
folder the server chose, where ``ext`` is the client's extension only if it is short and
alphanumeric (the corpus readers recognise the format from the content, not the name).
"""
from __future__ import annotations

import errno
import hashlib
import re
from contextlib import ExitStack
from dataclasses import dataclass, field
from pathlib import Path

from fastapi import HTTPException, Request
from python_multipart.multipart import MultipartParser, parse_options_header
from starlette.requests import ClientDisconnect

_SAFE_SUFFIX = re.compile(r"\.[A-Za-z0-9]{1,10}$")
MAX_FIELD_BYTES = 1024 * 1024


@dataclass
class Upload:
    """What a multipart request carried: files on disk (in order) and small text fields."""

    files: dict[str, list[dict]] = field(default_factory=dict)  # field name -> [{name, stored, ...}]
    fields: dict[str, str] = field(default_factory=dict)

    def paths(self, folder: Path, name: str) -> list[Path]:
        return [folder / f["stored"] for f in self.files.get(name, [])]


def safe_suffix(filename: str) -> str:
    match = _SAFE_SUFFIX.search(filename or "")
    return match.group(0).lower() if match else ""


def display_name(filename: str) -> str:
    """A client's file name reduced to its last component, printable, at most 200 characters."""
    name = (filename or "").replace("\\", "/").rsplit("/", 1)[-1]
    name = "".join(ch if ch.isprintable() else "?" for ch in name)
    return name[:200] or "unnamed"


def _insufficient_storage() -> HTTPException:
    return HTTPException(status_code=507, detail="the server's disk is full; the upload was not "
                                                 "stored, try again later or ask the operator")


async def receive_multipart(request: Request, folder: Path, *, file_fields: set[str],
                            text_fields: set[str], max_files: int) -> Upload:
    """Stream a multipart body into ``folder``. Errors are HTTPExceptions with a clear message.

    The caller owns ``folder`` and removes it when anything fails.
    """
    content_type, params = parse_options_header(request.headers.get("content-type", ""))
    if content_type != b"multipart/form-data" or b"boundary" not in params:
        raise HTTPException(status_code=415, detail="expected a multipart/form-data body "
                                                    "(files as the 'files' field)")
    upload = Upload()
    events: list[tuple[str, bytes]] = []

    def callback(kind):
        def on(data=b"", start=0, end=0):
            events.append((kind, bytes(data[start:end]) if data else b""))
        return on

    parser = MultipartParser(params[b"boundary"], {
        "on_part_begin": callback("part_begin"), "on_header_field": callback("header_field"),
        "on_header_value": callback("header_value"), "on_header_end": callback("header_end"),
        "on_headers_finished": callback("headers_finished"), "on_part_data": callback("data"),
        "on_part_end": callback("part_end")})

    header_field = header_value = b""
    headers: dict[bytes, bytes] = {}
    part = None  # current part: dict with kind, fh / buffer
    count = 0
    # the stack closes the file being written if the body fails midway (a part that ended
    # closed its own file already)
    with ExitStack() as files:
        try:
            async for chunk in request.stream():
                try:
                    parser.write(chunk)
                except Exception as exc:  # python-multipart raises its own parse errors
                    raise HTTPException(status_code=400,
                                        detail=f"malformed multipart body: {exc}") from None
                for kind, data in events:
                    if kind == "part_begin":
                        headers, header_field, header_value = {}, b"", b""
                    elif kind == "header_field":
                        header_field += data
                    elif kind == "header_value":
                        header_value += data
                    elif kind == "header_end":
                        headers[header_field.lower()] = header_value
                        header_field, header_value = b"", b""
                    elif kind == "headers_finished":
                        _, disp = parse_options_header(headers.get(b"content-disposition", b""))
                        name = disp.get(b"name", b"").decode("utf-8", "replace")
                        filename = disp.get(b"filename")
                        if filename is not None:
                            if name not in file_fields:
                                raise HTTPException(status_code=422, detail=f"unexpected file field "
                                                    f"{name!r}; expected {sorted(file_fields)}")
                            count += 1
                            if count > max_files:
                                raise HTTPException(status_code=413, detail=f"more than {max_files} "
                                                    "files in one request (the server's limit)")
                            original = display_name(filename.decode("utf-8", "replace"))
                            stored = f"{count - 1:04d}{safe_suffix(original)}"
                            part = {"file": True, "field": name, "name": original, "stored": stored,
                                    "fh": files.enter_context(open(folder / stored, "wb")),
                                    "bytes": 0, "sha": hashlib.sha256()}
                        else:
                            if name not in text_fields:
                                raise HTTPException(status_code=422, detail=f"unexpected form field "
                                                    f"{name!r}; expected {sorted(text_fields | file_fields)}")
                            part = {"file": False, "field": name, "buf": bytearray()}
                    elif kind == "data" and part is not None:
                        if part["file"]:
                            part["fh"].write(data)
                            part["bytes"] += len(data)
                            part["sha"].update(data)
                        else:
                            part["buf"] += data
                            if len(part["buf"]) > MAX_FIELD_BYTES:
                                raise HTTPException(status_code=413, detail=f"form field "
                                                    f"{part['field']!r} larger than {MAX_FIELD_BYTES} bytes")
                    elif kind == "part_end" and part is not None:
                        if part["file"]:
                            part["fh"].close()
                            upload.files.setdefault(part["field"], []).append(
                                {"name": part["name"], "stored": part["stored"],
                                 "bytes": part["bytes"], "sha256": part["sha"].hexdigest()})
                        else:
                            upload.fields[part["field"]] = part["buf"].decode("utf-8", "replace")
                        part = None
                events.clear()
            parser.finalize()
            if part is not None:
                raise HTTPException(status_code=400, detail="truncated multipart body (a part never ended)")
        except ClientDisconnect:
            raise HTTPException(status_code=400,
                                detail="the client went away during the upload") from None
        except OSError as exc:
            if exc.errno in (errno.ENOSPC, errno.EDQUOT):
                raise _insufficient_storage() from None
            raise
    return upload
