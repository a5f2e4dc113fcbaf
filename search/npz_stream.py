"""The transform NPZ written window chunk by window chunk: the (M, C, N) image is never whole in
memory.

The file is the one ``numpy.savez(fh, **npz_members(...))`` writes (NumPy documentation,
numpy.lib.format): a ZIP archive whose members are stored uncompressed with ZIP64 headers, one
``<name>.npy`` per array of :func:`search.documents.npz_members`, in its order. That function
stays the one definition of the layout; here its ``representation`` is a zero-stride stand-in
that gives the .npy header (dtype, C order, the whole (M, C, N) shape), and the data follow as
the images of a chunk of windows at a time, each transformed, written and dropped. The other
members are small and written whole by ``numpy.lib.format.write_array``, as savez does. Peak
memory: the windows (M, N) float64, one chunk of images and the transform's working set.
"""
from __future__ import annotations

import os
import zipfile
from collections.abc import Callable, Iterable, Mapping

import numpy as np
from numpy.lib import format as npy_format

from burstlens.search.documents import npz_members
from burstlens.search.filterbank import Filterbank
from burstlens.search.safe_io import atomic_write
from burstlens.search.tfd import transform

__all__ = ["CHUNK_BYTES", "chunk_windows_for", "write_npz", "write_transform_npz"]

CHUNK_BYTES = 64 << 20  # target size of one chunk of float32 images, bytes


def chunk_windows_for(n_channels: int, n_samples: int, chunk_bytes: int | None = None) -> int:
    """Windows per chunk: as many (C, N) float32 images as fit in ``chunk_bytes`` (default
    ``CHUNK_BYTES``), at least one."""
    chunk_bytes = CHUNK_BYTES if chunk_bytes is None else int(chunk_bytes)
    return max(1, chunk_bytes // (4 * max(1, int(n_channels) * int(n_samples))))


def write_npz(fh, members: Mapping[str, np.ndarray],
              streamed: Mapping[str, Iterable[np.ndarray]] | None = None) -> None:
    """Write ``members`` to the binary, seekable file ``fh`` as ``numpy.savez(fh, **members)``
    does: same member names (``<name>.npy``), order, headers and bytes.

    For a name in ``streamed``, ``members[name]`` gives only the dtype and shape (a zero-stride
    ``np.broadcast_to`` stand-in costs no memory) and the data come from ``streamed[name]``:
    blocks along the first axis, in order, with the member's trailing shape, whose lengths add up
    to its first dimension (``ValueError`` otherwise). Blocks are cast to the member's dtype.
    """
    streamed = dict(streamed or {})
    unknown = sorted(set(streamed) - set(members))
    if unknown:
        raise ValueError(f"streamed members {unknown} are not among the members")
    with zipfile.ZipFile(fh, mode="w", compression=zipfile.ZIP_STORED, allowZip64=True) as archive:
        for name, value in members.items():
            value = np.asanyarray(value)
            # ZIP64 always, as numpy.savez does: a member's size is not known when it starts
            with archive.open(name + ".npy", mode="w", force_zip64=True) as member:
                if name in streamed:
                    _write_blocks(member, name, value, streamed[name])
                else:
                    npy_format.write_array(member, value, allow_pickle=False)


def _write_blocks(member, name: str, like: np.ndarray, blocks: Iterable[np.ndarray]) -> None:
    """The .npy header of an array shaped and typed as ``like``, then ``blocks`` in C order."""
    # the header write_array gives a C-ordered array of this dtype and shape (version 1.0: the
    # dict of a few-dimensional shape is far below its 65535-byte limit)
    npy_format.write_array_header_1_0(member, {
        "descr": npy_format.dtype_to_descr(like.dtype), "fortran_order": False,
        "shape": like.shape})
    rows = 0
    for block in blocks:
        block = np.ascontiguousarray(block, dtype=like.dtype)
        if block.shape[1:] != like.shape[1:]:
            raise ValueError(f"{name}: a block of shape {block.shape} in an array of shape "
                             f"{like.shape}")
        rows += block.shape[0]
        if rows > like.shape[0]:
            raise ValueError(f"{name}: the blocks hold more than {like.shape[0]} rows")
        member.write(memoryview(block).cast("B"))
    if rows != like.shape[0]:
        raise ValueError(f"{name}: the blocks hold {rows} rows, the array {like.shape[0]}")


def write_transform_npz(path: str | os.PathLike, windows, filterbank: Filterbank, window_meta,
                        file_name: Callable[[str], str] = str, *, chunk_windows: int | None = None,
                        progress: Callable[[int], object] | None = None) -> tuple[int, int, int]:
    """Transform ``windows`` (M, N) with ``filterbank`` and write the transform NPZ to ``path``.

    The file holds ``npz_members(transform(windows, filterbank), filterbank, window_meta,
    file_name)``, array for array and byte for byte, but the images are made and written
    ``chunk_windows`` windows at a time (default :func:`chunk_windows_for`: about
    ``CHUNK_BYTES`` of images). Written through a temp file beside ``path`` renamed over it
    (``search.safe_io.atomic_write``): on any error no file, whole or partial, is left.
    ``progress(k)`` is called after each chunk with the number of windows it wrote. Returns the
    image shape (M, C, N).
    """
    windows = np.asarray(windows)
    if windows.ndim != 2:
        raise ValueError(f"windows: expected (M, N), got shape {windows.shape}")
    m, n = windows.shape
    c = len(filterbank)
    step = chunk_windows_for(c, n) if chunk_windows is None else int(chunk_windows)
    if step < 1:
        raise ValueError(f"chunk_windows={chunk_windows!r} must be at least 1")
    stand_in = np.broadcast_to(np.float32(0.0), (m, c, n))
    members = npz_members(stand_in, filterbank, window_meta, file_name)

    def images():
        for w0 in range(0, m, step):
            image = transform(windows[w0:w0 + step], filterbank)
            yield image
            if progress is not None:
                progress(image.shape[0])

    atomic_write(path, lambda fh: write_npz(fh, members, {"representation": images()}))
    return m, c, n
