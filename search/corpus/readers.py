"""Waveform readers: the format is recognised from the file's first bytes, never from its name.

Each reader returns a list of :class:`RawTrace`. Anything that goes wrong inside a reader (a
library exception, a malformed header, an impossible size) becomes a :class:`CorpusError` that
names the file and the cause, so a corrupt upload is a clear message and never a crash.
"""
from __future__ import annotations

import functools
import io
import os
import re
import struct
import warnings
import zipfile
from collections.abc import Callable, Iterator

import numpy as np

from burstlens.search.corpus.model import CorpusError, RawTrace
from burstlens.search.corpus.mseed_records import MAX_RECORD_BYTES, MIN_RECORD_BYTES, RecordError, record_layout

HEAD_BYTES = 4096
SAC_HEADER_BYTES = 632
SAC_V7_FOOTER_BYTES = 22 * 8
SEGY_HEADER_BYTES = 3600
SEGY_FORMAT_CODES = {1, 2, 3, 5, 8}
SEED_ID = re.compile(r"^[A-Za-z0-9_-]{0,8}\.[A-Za-z0-9_-]{0,8}\.[A-Za-z0-9_-]{0,8}\.[A-Za-z0-9_-]{0,8}$")

FORMATS = ("MSEED", "SAC", "SEGY", "WAV", "NPY", "NPZ", "CSV")

# Largest block of miniSEED records iter_waveform_chunks decodes at once, bytes of the file.
CHUNK_BYTES = 16 * 2**20
# The fixed section of a miniSEED data header (SEED Reference Manual v2.4 ch. 8).
MSEED_FIXED_HEADER_BYTES = 48


def detect_format(head: bytes, size: int) -> str | None:
    """Name of the format whose signature ``head`` (the file's first bytes) carries, or None.

    Signatures: RIFF/WAVE, the NumPy ``.npy`` magic, a zip archive (``.npz``), the miniSEED fixed
    header (6-character sequence number, quality D/R/Q/M, a plausible year and day; SEED Reference
    Manual v2.4 ch. 8), a SAC binary header of version 6/7 whose size matches ``npts`` (SAC User's
    Manual), a SEG-Y textual header opening with "C" or blank and a binary header with a known sample format
    code (SEG-Y rev 1), or text without control characters (CSV).
    """
    if size == 0 or not head:
        return None
    # magic numbers first, then the size-checked SAC header, then SEG-Y's weaker signature
    if len(head) >= 12 and head[:4] == b"RIFF" and head[8:12] == b"WAVE":
        return "WAV"
    if head[:6] == b"\x93NUMPY":
        return "NPY"
    if head[:4] in (b"PK\x03\x04", b"PK\x05\x06"):
        return "NPZ"
    if _is_mseed(head):
        return "MSEED"
    if _is_sac(head, size):
        return "SAC"
    if _is_segy(head, size):
        return "SEGY"
    if _is_text(head):
        return "CSV"
    return None


def _is_mseed(head: bytes) -> bool:
    if len(head) < 48:
        return False
    if not all(c in b"0123456789 \x00" for c in head[:6]) or head[6:7] not in (b"D", b"R", b"Q", b"M"):
        return False
    if head[7:8] not in (b" ", b"\x00"):
        return False
    for order in (">", "<"):
        year, day = struct.unpack(order + "HH", head[20:24])
        if 1900 <= year <= 2100 and 1 <= day <= 366:
            return True
    return False


def _is_sac(head: bytes, size: int) -> bool:
    if len(head) < SAC_HEADER_BYTES or size < SAC_HEADER_BYTES:
        return False
    for order in ("<", ">"):
        nvhdr, = struct.unpack(order + "i", head[304:308])
        npts, = struct.unpack(order + "i", head[316:320])
        if nvhdr not in (6, 7) or npts < 0:
            continue
        data_bytes = 4 * npts
        expected = SAC_HEADER_BYTES + data_bytes + (SAC_V7_FOOTER_BYTES if nvhdr == 7 else 0)
        if size == expected:
            return True
    return False


def _is_segy(head: bytes, size: int) -> bool:
    # the 3200-byte textual header opens with a "C" card or is blank (EBCDIC or ASCII)
    if len(head) < SEGY_HEADER_BYTES or size <= SEGY_HEADER_BYTES or head[0] not in (0xC3, 0x43, 0x40, 0x20):
        return False
    for order in (">", "<"):
        interval, = struct.unpack(order + "H", head[3216:3218])
        samples, = struct.unpack(order + "H", head[3220:3222])
        code, = struct.unpack(order + "H", head[3224:3226])
        if code in SEGY_FORMAT_CODES and interval > 0 and samples > 0:
            return True
    return False


_CONTROL = bytes(c for c in range(32) if c not in (9, 10, 12, 13))


def _is_text(head: bytes) -> bool:
    if len(head.translate(None, _CONTROL)) != len(head):
        return False
    try:
        head.decode("utf-8")
    except UnicodeDecodeError as exc:
        # a multi-byte character cut by the head limit is still text
        if exc.start < len(head) - 4:
            return False
    return True


def read_head(path: str) -> tuple[bytes, int]:
    with open(path, "rb") as fh:
        head = fh.read(HEAD_BYTES)
    return head, os.path.getsize(path)


def read_waveform_file(path: str, fmt: str, *, csv_sampling_rate_hz: float | None = None) -> list[RawTrace]:
    """Read one file of a known format into raw traces; every failure is a CorpusError."""
    # the reader is looked up inside the check, so an unknown format is a CorpusError too
    return _checked_traces(path, fmt, lambda: _READERS[fmt](path, csv_sampling_rate_hz))


def iter_waveform_chunks(path: str, fmt: str, *, csv_sampling_rate_hz: float | None = None,
                         chunk_bytes: int | None = None) -> Iterator[list[RawTrace]]:
    """Read one file of a known format as successive lists of raw traces, in bounded memory.

    A miniSEED file is a sequence of independent records (SEED Reference Manual v2.4 ch. 8). When
    ``fmt`` is "MSEED", the file is larger than ``chunk_bytes`` and every block boundary falls on a
    record header, the file is decoded one block of whole records at a time: the block is the
    largest multiple of the first record's length that is at most ``chunk_bytes`` (at least one
    record); a file cut inside its last record streams too, and its last block fails. A trace that
    runs across blocks comes out in pieces, one per block, which
    :func:`burstlens.search.corpus.preprocess.join_contiguous` joins back. Every other file (other
    formats, small files, record lengths that vary) is read whole and yielded once, exactly as
    :func:`read_waveform_file` returns it.

    Parameters
    ----------
    path : str
        The file.
    fmt : str
        One of ``FORMATS``, as :func:`detect_format` named it.
    csv_sampling_rate_hz : float, optional
        Sampling rate, Hz, for formats that carry none (CSV, NPY, NPZ).
    chunk_bytes : int, optional
        Bytes of the file decoded at once; ``CHUNK_BYTES`` when None.

    Yields
    ------
    list of RawTrace
        The traces of one block, each with ``file == path``, validated as in :func:`read_waveform_file`.

    Raises
    ------
    CorpusError
        When a block cannot be read; the message names the file, the block's byte range and,
        for miniSEED, the byte offset of the first record cut short, not a record, or not
        decodable (see :func:`_mseed_traces`).
    """
    limit = CHUNK_BYTES if chunk_bytes is None else chunk_bytes
    block = _mseed_block_bytes(path, limit) if fmt == "MSEED" else None
    if block is None:
        yield read_waveform_file(path, fmt, csv_sampling_rate_hz=csv_sampling_rate_hz)
        return
    with open(path, "rb") as fh:
        offset = 0
        while raw := fh.read(block):
            where = f" (bytes {offset}-{offset + len(raw)})"
            traces = _checked_traces(path, fmt, functools.partial(_mseed_traces, path, raw, offset, where), where)
            offset += len(raw)
            del raw  # hold no file bytes while the caller works on the traces
            yield traces


def _mseed_block_bytes(path: str, limit: int) -> int | None:
    """Bytes per block of whole miniSEED records for a file larger than ``limit``, or None when the
    file is to be read whole (small, a block boundary not on a record header, or unreadable). The
    size need not be a multiple of the record length: a file cut inside its last record streams,
    and the walk of its last block reports the cut record."""
    size = os.path.getsize(path)
    if size <= limit:
        return None
    from obspy.io.mseed.util import get_record_information

    try:
        with warnings.catch_warnings(), open(path, "rb") as fh:
            warnings.simplefilter("ignore")
            reclen = int(get_record_information(fh)["record_length"])
    except Exception:  # the whole-file read reports what is wrong with the file
        return None
    if not MIN_RECORD_BYTES <= reclen <= MAX_RECORD_BYTES:  # a damaged exponent: the walk names it
        return None
    block = max(reclen, limit // reclen * reclen)
    # every block must open on a record header, else the records differ in length
    with open(path, "rb") as fh:
        for offset in range(block, size, block):
            fh.seek(offset)
            if not _is_mseed(fh.read(MSEED_FIXED_HEADER_BYTES)):
                return None
    return block


def _mseed_traces(path: str, raw: bytes, base: int, where: str) -> list[RawTrace]:
    """Raw traces of ``raw``, whole miniSEED records starting at byte ``base`` of ``path``.

    The record layout is walked first (:func:`record_layout`): a record cut short, a record whose
    header is not a SEED fixed header, or a broken blockette chain is a CorpusError naming the
    record's byte offset. ObsPy then decodes the records; its decoder failing, a Steim frame whose
    last sample disagrees with the reverse integration constant (ObsPy's "Data integrity check"
    warning; SEED Reference Manual v2.4 appendix B), or a sample count other than the records'
    fixed headers declare is a CorpusError naming the first record at fault (found by bisection
    over the records, which decode independently) and ``where``.
    """
    try:
        layout = record_layout(raw, base)
    except RecordError as exc:
        raise CorpusError(f"{path}{where}: miniSEED {exc}") from None
    stream, problem = _decoded(raw, layout.declared_samples)
    if problem is None:
        return _stream_traces(path, stream, where)
    found = _first_bad_record(raw, layout, base)
    if found is None:  # only the records together fail: name the run of bytes
        raise CorpusError(f"{path}{where}: not a readable MSEED file ({problem})")
    offset, cause = found
    raise CorpusError(f"{path}{where}: miniSEED record at byte {offset} cannot be decoded ({cause})")


def _decoded(raw, declared: int):
    """(ObsPy stream, None) for miniSEED bytes that decode cleanly to ``declared`` samples, else
    (None, what went wrong)."""
    import obspy

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            stream = obspy.read(io.BytesIO(raw), format="MSEED")
        except Exception as exc:  # the decoder's failure on a damaged record
            return None, f"{type(exc).__name__}: {' '.join(str(exc).split())[:300]}"
    for w in caught:
        if "integrity check" in str(w.message):
            return None, " ".join(str(w.message).split())[:300]
    decoded = sum(len(tr.data) for tr in stream)
    if decoded != declared:
        return None, f"{decoded} samples decoded where the records' headers declare {declared}"
    return stream, None


def _first_bad_record(raw, layout, base: int) -> tuple[int, str] | None:
    """(byte offset, cause) of the first record of ``layout`` that alone fails :func:`_decoded`,
    by bisection (the whole run is known to fail); None if no single record does."""
    view = memoryview(raw)

    def problem(lo, hi):
        a = int(layout.offsets[lo]) - base
        b = int(layout.offsets[hi - 1] + layout.lengths[hi - 1]) - base
        return _decoded(view[a:b], int(layout.samples[lo:hi].sum()))[1]

    lo, hi = 0, len(layout)
    while hi - lo > 1:
        mid = (lo + hi) // 2
        if problem(lo, mid) is not None:
            hi = mid
        else:
            lo = mid
    cause = problem(lo, hi) if hi > lo else None
    return None if cause is None else (int(layout.offsets[lo]), cause)


def _checked_traces(path: str, fmt: str, read: Callable[[], list[RawTrace]], where: str = "") -> list[RawTrace]:
    """Run ``read`` (a reader of ``path``) and check the traces it returns.

    Any failure, or a list without traces, an empty trace or a sampling rate that is not a positive
    finite number, becomes a CorpusError whose message opens with ``path`` and ``where`` (the part
    of the file read, or "" for all of it).
    """
    name = f"{path}{where}"
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            traces = read()
    except CorpusError:
        raise
    except MemoryError:
        raise CorpusError(f"{name}: not a readable {fmt} file (its header declares more data than fits "
                          "in memory)") from None
    except Exception as exc:  # any library failure on a malformed file is the file's fault
        raise CorpusError(f"{name}: not a readable {fmt} file ({type(exc).__name__}: {exc})") from None
    if not traces:
        raise CorpusError(f"{name}: {fmt} file holds no traces")
    for tr in traces:
        if tr.data.size == 0:
            raise CorpusError(f"{name}: empty trace {tr.trace_id} (0 samples)")
        if not (np.isfinite(tr.sampling_rate_hz) and tr.sampling_rate_hz > 0):
            raise CorpusError(f"{name}: trace {tr.trace_id} has an invalid sampling rate {tr.sampling_rate_hz!r} Hz")
    return traces


def _obspy_traces(path: str, fmt: str) -> list[RawTrace]:
    import obspy

    return _stream_traces(path, obspy.read(path, format=fmt))


def _stream_traces(path: str, stream, where: str = "") -> list[RawTrace]:
    """Raw traces of an ObsPy stream read from ``path``: masked gaps become NaN (float64)."""
    out = []
    for tr in stream:
        data = np.asarray(tr.data)
        if np.ma.isMaskedArray(tr.data):
            data = np.ma.filled(tr.data.astype(np.float64), np.nan)
        if data.dtype.kind not in "iuf":
            raise CorpusError(f"{path}{where}: trace {tr.id} holds {data.dtype} samples, not numbers")
        out.append(RawTrace(path, tr.id, float(tr.stats.sampling_rate), float(tr.stats.starttime.timestamp), data))
    return out


def _read_mseed(path, _rate):
    with open(path, "rb") as fh:
        raw = fh.read()
    return _mseed_traces(path, raw, 0, "")


def _read_sac(path, _rate):
    return _obspy_traces(path, "SAC")


def _read_segy(path, _rate):
    # SEG-Y carries no SEED codes: station is the file stem, location the trace sequence number.
    traces = _obspy_traces(path, "SEGY")
    stem = _stem(path)
    for k, tr in enumerate(traces):
        tr.trace_id = f".{stem}.{k:02d}."
    return traces


def _read_wav(path, _rate):
    from scipy.io import wavfile

    rate, data = wavfile.read(path, mmap=False)
    data = np.asarray(data)
    if data.dtype == np.uint8:  # 8-bit WAV is offset binary
        data = data.astype(np.int16) - 128
    if data.dtype.kind not in "iuf":
        raise CorpusError(f"{path}: WAV samples of type {data.dtype} are not supported")
    rows = data[:, None].T if data.ndim == 1 else data.T
    return _array_traces(path, rows, float(rate), None, None)


def _read_npy(path, rate):
    with open(path, "rb") as fh:
        array = _read_npy_stream(fh, os.path.getsize(path), path)
    return _array_traces(path, _as_rows(array, path), _declared_rate(path, rate, "NPY"), None, None)


def _read_npz(path, rate):
    with zipfile.ZipFile(path) as zf:
        arrays = {}
        for info in zf.infolist():
            if not info.filename.endswith(".npy"):
                continue
            with zf.open(info) as fh:
                arrays[info.filename[:-4]] = _read_npy_stream(fh, info.file_size, f"{path}[{info.filename}]")
    if "data" in arrays:
        data = arrays["data"]
    elif len(arrays) == 1:
        data = next(iter(arrays.values()))
    else:
        raise CorpusError(f"{path}: NPZ file needs an array named 'data' (found {sorted(arrays)})")
    rows = _as_rows(data, path)
    file_rate = None
    if "sampling_rate_hz" in arrays:
        value = arrays["sampling_rate_hz"]
        if value.size != 1 or value.dtype.kind not in "iuf":
            raise CorpusError(f"{path}: 'sampling_rate_hz' must be one number, got {value.dtype} of shape "
                              f"{value.shape}")
        file_rate = float(value.reshape(()))
    ids = None
    if "trace_ids" in arrays:
        ids = arrays["trace_ids"]
        if ids.dtype.kind != "U" or ids.shape != (rows.shape[0],):
            raise CorpusError(f"{path}: 'trace_ids' must be {rows.shape[0]} strings, got {ids.dtype} of shape "
                              f"{ids.shape}")
        ids = [str(s) for s in ids]
    start = None
    if "start" in arrays:
        start = _parse_start(path, arrays["start"])
    rate = file_rate if file_rate is not None else _declared_rate(path, rate, "NPZ")
    return _array_traces(path, rows, rate, start, ids)


def _read_npy_stream(fh, available: int, name: str) -> np.ndarray:
    """Read one ``.npy`` array from a stream, never unpickling and never trusting its size."""
    from numpy.lib import format as npformat

    version = npformat.read_magic(fh)
    if version == (1, 0):
        shape, fortran, dtype = npformat.read_array_header_1_0(fh)
    elif version in ((2, 0), (3, 0)):
        shape, fortran, dtype = npformat.read_array_header_2_0(fh)
    else:
        raise CorpusError(f"{name}: unsupported .npy version {version}")
    if dtype.hasobject:
        raise CorpusError(f"{name}: holds an object array; only numeric arrays are read (no pickles)")
    count = int(np.prod(shape, dtype=np.int64)) if shape else 1
    if count * dtype.itemsize > available:
        raise CorpusError(f"{name}: header declares {count} values of {dtype}, more than the file holds")
    raw = fh.read(count * dtype.itemsize)
    if len(raw) != count * dtype.itemsize:
        raise CorpusError(f"{name}: truncated array data")
    array = np.frombuffer(raw, dtype=dtype, count=count)
    return array.reshape(shape, order="F" if fortran else "C")


def _read_csv(path, rate):
    with open(path, "rb") as fh:
        text = fh.read().decode("utf-8-sig")
    lines = [ln.strip() for ln in text.splitlines()]
    lines = [ln for ln in lines if ln and not ln.startswith("#")]
    if not lines:
        raise CorpusError(f"{path}: CSV file holds no data rows")
    delimiter = next((d for d in (",", ";", "\t") if d in lines[0]), None)
    split = (lambda s: [c.strip() for c in s.split(delimiter)]) if delimiter else str.split
    header = split(lines[0])
    ids = None
    try:
        [float(c) for c in header]
        body = lines
    except ValueError:
        body = lines[1:]
        if all(SEED_ID.match(c) for c in header):
            ids = header
    if not body:
        raise CorpusError(f"{path}: unknown format (text without numeric rows)")
    try:
        rows = [[float(c) for c in split(ln)] for ln in body]
    except ValueError as exc:
        raise CorpusError(f"{path}: unknown format (text, but not a numeric CSV: {exc})") from None
    widths = {len(r) for r in rows}
    if len(widths) != 1:
        raise CorpusError(f"{path}: CSV rows have different numbers of columns {sorted(widths)}")
    data = np.asarray(rows, dtype=np.float64).T
    if ids is not None and len(ids) != data.shape[0]:
        ids = None
    return _array_traces(path, data, _declared_rate(path, rate, "CSV"), None, ids)


def _declared_rate(path: str, rate: float | None, fmt: str) -> float:
    if rate is None:
        raise CorpusError(
            f"{path}: {fmt} file carries no sampling rate; declare it with csv_sampling_rate_hz"
        )
    return float(rate)


def _as_rows(array: np.ndarray, path: str) -> np.ndarray:
    if array.dtype.kind not in "iuf":
        raise CorpusError(f"{path}: array of type {array.dtype} is not real numbers")
    if array.ndim == 1:
        return array[None, :]
    if array.ndim == 2:
        return array
    raise CorpusError(f"{path}: array of shape {array.shape}; expected (samples,) or (traces, samples)")


def _parse_start(path: str, value: np.ndarray) -> float:
    from obspy import UTCDateTime

    if value.size != 1:
        raise CorpusError(f"{path}: 'start' must be one ISO 8601 time or POSIX seconds")
    item = value.reshape(()).item()
    try:
        return float(UTCDateTime(item).timestamp)
    except Exception:
        raise CorpusError(f"{path}: 'start' {item!r} is not a time") from None


def _stem(path: str) -> str:
    base = os.path.basename(path).split(".")[0]
    return re.sub(r"[^A-Za-z0-9_-]", "_", base) or "X"


def _array_traces(path, rows, rate, start, ids) -> list[RawTrace]:
    """Traces from the rows of a plain array; without SEED ids, the row number is the location."""
    stem = _stem(path)
    out = []
    for k, row in enumerate(rows):
        trace_id = ids[k] if ids else f".{stem}.{k:02d}."
        out.append(RawTrace(path, trace_id, rate, start, np.ascontiguousarray(row)))
    return out


_READERS = {
    "MSEED": _read_mseed,
    "SAC": _read_sac,
    "SEGY": _read_segy,
    "WAV": _read_wav,
    "NPY": _read_npy,
    "NPZ": _read_npz,
    "CSV": _read_csv,
}
