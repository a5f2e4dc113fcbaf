"""Tests of search.npz_stream: the transform NPZ written a chunk of windows at a time is the file
numpy.savez writes for search.documents.npz_members, and a failed write leaves nothing."""
from __future__ import annotations

import io
import os
import zipfile

import numpy as np
import pytest

from burstlens.search import Filterbank, npz_stream, transform
from burstlens.search.documents import npz_members
from burstlens.search.npz_stream import chunk_windows_for, write_npz, write_transform_npz

FS, N = 1000.0, 64


def _filterbank() -> Filterbank:
    """Two plain channels and a chirped one: both ways of the transform run in every chunk."""
    return Filterbank.constant_area([80.0, 150.0, 300.0], 0.01, 0.8, FS,
                                    chirp_hz_per_s=[0.0, 0.0, 400.0])


def _inputs(m: int):
    windows = np.random.default_rng(m).standard_normal((m, N))
    meta = [{"file": "/srv/0000.npz", "trace_id": "XX.A.00.HHZ", "offset_s": 0.032 * i}
            for i in range(m)]
    return windows, meta


def _savez_bytes(windows, fb, meta, file_name) -> bytes:
    buffer = io.BytesIO()
    np.savez(buffer, **npz_members(transform(windows, fb), fb, meta, file_name))
    return buffer.getvalue()


def _zip_members(data) -> dict[str, bytes]:
    with zipfile.ZipFile(data if not isinstance(data, bytes) else io.BytesIO(data)) as archive:
        return {info.filename: archive.read(info) for info in archive.infolist()}


@pytest.mark.parametrize(("m", "chunk"), [(6, 3), (7, 3), (7, 7), (1, 1), (1, 4)],
                         ids=["divides", "does-not-divide", "one-chunk", "M=1", "M=1-big-chunk"])
def test_streamed_npz_is_what_savez_writes(tmp_path, m, chunk):
    """The streamed NPZ is a standard .npz: the same ZIP members (``<name>.npy``) in the same
    order, each .npy byte for byte (header: dtype, C order, shape; then the data) as
    ``np.savez(**npz_members(transform(windows), ...))`` writes, so ``np.load`` without pickles
    gives equal arrays of equal dtype; for a chunk size dividing M, one not dividing it, one
    chunk, and M = 1. Progress counts every window once, chunk by chunk. Source: NumPy
    documentation, numpy.lib.format (the .npy format, NEP 1 "A simple file format for NumPy
    arrays", and the ZIP of .npy files numpy.savez writes)."""
    fb = _filterbank()
    windows, meta = _inputs(m)
    names = {"/srv/0000.npz": "mine.npz"}.get
    done = []
    path = tmp_path / "out.npz"
    shape = write_transform_npz(path, windows, fb, meta, names, chunk_windows=chunk,
                                progress=done.append)
    assert shape == (m, len(fb), N)
    assert done == [min(chunk, m - w0) for w0 in range(0, m, chunk)]
    reference = _savez_bytes(windows, fb, meta, names)
    streamed, expected = _zip_members(path), _zip_members(reference)
    assert list(streamed) == list(expected)
    for name, data in expected.items():
        assert streamed[name] == data, name
    with np.load(path, allow_pickle=False) as got, np.load(io.BytesIO(reference)) as want:
        assert got.files == want.files
        for name in want.files:
            assert got[name].dtype == want[name].dtype, name
            assert got[name].tobytes() == want[name].tobytes(), name


def test_default_chunks_hold_about_chunk_bytes_of_images(tmp_path, monkeypatch):
    """Without ``chunk_windows`` a chunk holds as many float32 (C, N) images as fit in
    ``CHUNK_BYTES`` (at least one), read when called; the file is the same whatever the chunks."""
    fb = _filterbank()
    windows, meta = _inputs(10)
    image_bytes = 4 * len(fb) * N
    monkeypatch.setattr(npz_stream, "CHUNK_BYTES", 4 * image_bytes + 1)
    assert chunk_windows_for(len(fb), N) == 4
    done = []
    write_transform_npz(tmp_path / "a.npz", windows, fb, meta, progress=done.append)
    assert done == [4, 4, 2]
    monkeypatch.setattr(npz_stream, "CHUNK_BYTES", 1)
    assert chunk_windows_for(len(fb), N) == 1
    write_transform_npz(tmp_path / "b.npz", windows, fb, meta)
    assert _zip_members(tmp_path / "a.npz") == _zip_members(tmp_path / "b.npz")


def test_a_failed_write_leaves_no_file(tmp_path, monkeypatch):
    """A transform that fails in the middle (second chunk of three) leaves neither the output
    nor a temp file in its folder, and an older file at that path keeps its content (temp file
    renamed over the target only once whole: common practice)."""
    fb = _filterbank()
    windows, meta = _inputs(6)
    calls = []

    def failing(chunk, filterbank):
        calls.append(len(chunk))
        if len(calls) == 2:
            raise RuntimeError("disk on fire")
        return transform(chunk, filterbank)

    monkeypatch.setattr(npz_stream, "transform", failing)
    with pytest.raises(RuntimeError, match="disk on fire"):
        write_transform_npz(tmp_path / "out.npz", windows, fb, meta, chunk_windows=2)
    assert calls == [2, 2] and os.listdir(tmp_path) == []
    (tmp_path / "old.npz").write_bytes(b"old")
    calls.clear()
    with pytest.raises(RuntimeError, match="disk on fire"):
        write_transform_npz(tmp_path / "old.npz", windows, fb, meta, chunk_windows=2)
    assert os.listdir(tmp_path) == ["old.npz"] and (tmp_path / "old.npz").read_bytes() == b"old"


def test_streamed_blocks_must_fill_the_declared_shape():
    """A streamed member whose blocks hold fewer or more rows than its declared first dimension,
    or another trailing shape, is refused (the .npy header already promised the shape)."""
    like = np.broadcast_to(np.float32(0.0), (4, 2, 3))
    block = np.zeros((2, 2, 3), np.float32)
    for blocks, message in (([block], "hold 2 rows"), ([block] * 3, "more than 4"),
                            ([np.zeros((4, 3, 2), np.float32)], "a block of shape")):
        with pytest.raises(ValueError, match=message):
            write_npz(io.BytesIO(), {"a": like}, {"a": iter(blocks)})
    with pytest.raises(ValueError, match="not among the members"):
        write_npz(io.BytesIO(), {"a": like}, {"b": iter([block])})
