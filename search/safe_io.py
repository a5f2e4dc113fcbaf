"""Writing files so a reader never sees half of one, and numbers JSON can hold.

``atomic_write`` is the one way burstlens writes a result file outside the job store (the store
keeps its own ``write_blob``, which also syncs the folder): a temp file in the target's folder,
flushed and fsynced, then ``os.replace``d over the target, so the old content stays until the new
one is whole. ``finite_or_none`` maps NaN, ±inf and non-numbers to None, as strict JSON
(``allow_nan=False``) needs.
"""

from __future__ import annotations

import math
import os
import tempfile
from collections.abc import Callable
from typing import IO, Any


def atomic_write(path: str | os.PathLike, write: Callable[[IO[bytes]], Any]) -> None:
    """Call ``write(fh)`` on a binary temp file beside ``path``, then rename it to ``path``.

    On any error the temp file is removed, ``path`` keeps its old content (or stays absent) and
    the error propagates.
    """
    path = os.fspath(path)
    folder = os.path.dirname(os.path.abspath(path))
    fd, tmp = tempfile.mkstemp(dir=folder, prefix=".tmp-", suffix=os.path.basename(path))
    try:
        with os.fdopen(fd, "wb") as fh:
            write(fh)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def finite_or_none(value: Any) -> float | None:
    """``float(value)`` when it is a finite number, else None (NaN, ±inf, None, non-numbers)."""
    try:
        value = float(value)
    except (TypeError, ValueError):
        return None
    return value if math.isfinite(value) else None
