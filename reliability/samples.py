"""Seed files for the bad-input experiment: one small valid file of every reader's format, a few
hostile ones, and byte-level mutations.

The waveform is made up (a seeded noise floor with three Gaussian-enveloped tone bursts, 4 s at
1 kHz) so that a valid file gets through format detection, preprocessing and the STA/LTA
windowing, and a mutated one can break any of those steps.
"""
from __future__ import annotations

import io
import pickle
import struct
import warnings
import zipfile

import numpy as np

FS = 1000.0


def waveform(seed: int = 0, seconds: float = 4.0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    n = int(FS * seconds)
    t = np.arange(n) / FS
    x = 0.05 * rng.standard_normal(n)
    for k in range(3):
        t0 = (k + 0.5) * seconds / 3
        x += np.exp(-0.5 * ((t - t0) / 0.02) ** 2) * np.cos(2 * np.pi * rng.uniform(80, 250) * (t - t0))
    return x


def valid_files(seed: int = 0) -> dict[str, bytes]:
    """One valid file of every format the readers take (docs/design.md §6), keyed by a short name."""
    from obspy import Stream, Trace, UTCDateTime
    from scipy.io import wavfile

    x = waveform(seed)
    counts = np.rint(x * 2000).astype(np.int32)
    header = {"network": "XX", "station": "RL01", "location": "00", "channel": "GPZ",
              "sampling_rate": FS, "starttime": UTCDateTime(2026, 1, 1)}
    out: dict[str, bytes] = {}
    single = x.astype(np.float32)
    for name, fmt, data, kw in (("mseed-steim2", "MSEED", counts, {"encoding": "STEIM2",
                                                                    "reclen": 512}),
                                ("mseed-float32", "MSEED", single, {"encoding": "FLOAT32"}),
                                ("sac", "SAC", single, {}),
                                ("segy", "SEGY", single, {"data_encoding": 5})):
        buf = io.BytesIO()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            Stream([Trace(data, header=dict(header))]).write(buf, format=fmt, **kw)
        out[name] = buf.getvalue()
    buf = io.BytesIO()
    wavfile.write(buf, int(FS), np.clip(counts, -32768, 32767).astype(np.int16))
    out["wav-int16"] = buf.getvalue()
    buf = io.BytesIO()
    wavfile.write(buf, int(FS), x.astype(np.float32))
    out["wav-float32"] = buf.getvalue()
    buf = io.BytesIO()
    np.save(buf, x)
    out["npy"] = buf.getvalue()
    buf = io.BytesIO()
    np.savez(buf, data=x, sampling_rate_hz=np.float64(FS))
    out["npz"] = buf.getvalue()
    out["csv"] = ("XX.RL01.00.GPZ\n" + "\n".join(f"{v:.6g}" for v in x)).encode()
    return out


class _Marker:
    """Unpickling this creates a marker file: proof that somebody unpickled untrusted bytes."""

    def __init__(self, path: str):
        self.path = path

    def __reduce__(self):
        return (open, (self.path, "w"))


def hostile_files(marker_path: str) -> dict[str, bytes]:
    """NumPy files holding object arrays (pickles); one of them, if unpickled, creates
    ``marker_path``. The readers must refuse them all without unpickling (docs/design.md §6)."""
    out = {}
    objects = np.empty(3, dtype=object)
    objects[:] = [1.0, "two", {"three": 3}]
    buf = io.BytesIO()
    np.save(buf, objects, allow_pickle=True)
    out["npy-object"] = buf.getvalue()
    bomb = np.empty(1, dtype=object)
    bomb[0] = _Marker(marker_path)
    buf = io.BytesIO()
    np.save(buf, bomb, allow_pickle=True)
    out["npy-pickle-marker"] = buf.getvalue()
    buf = io.BytesIO()
    np.savez(buf, data=bomb, sampling_rate_hz=np.float64(FS))
    out["npz-pickle-marker"] = buf.getvalue()
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w") as zf:  # a raw pickle disguised as an array member
        zf.writestr("data.npy", pickle.dumps(_Marker(marker_path)))
    out["npz-raw-pickle"] = buf.getvalue()
    return out


def mutate(blob: bytes, ops: list[tuple]) -> bytes:
    """Apply byte-level mutations: ``("flip", where, xor)``, ``("truncate", where)``,
    ``("insert", where, bytes)``, ``("delete", where, length)``, ``("int32", where, value, '<'|'>')``,
    ``("float64", where, value, '<'|'>')``; ``where`` in [0, 1) is a share of the length, or an
    int ≥ 1 for an absolute header offset."""
    data = bytearray(blob)
    for op in ops:
        if not data:
            break
        where = op[1]
        i = min(len(data) - 1, where if isinstance(where, int) else int(where * len(data)))
        kind = op[0]
        if kind == "flip":
            data[i] ^= op[2] or 1
        elif kind == "truncate":
            del data[i:]
        elif kind == "insert":
            data[i:i] = op[2]
        elif kind == "delete":
            del data[i:i + op[2]]
        elif kind in ("int32", "float64"):
            packed = struct.pack(op[3] + ("i" if kind == "int32" else "d"), op[2])
            data[i:i + len(packed)] = packed
    return bytes(data)


def mseed_sources() -> dict[str, bytes]:
    """Real multi-record miniSEED files for the truncation and garbage sweeps, keyed by a short
    name: test data that ObsPy ships (``obspy/io/mseed/tests/data``: Steim-1 512-byte records;
    two interleaved channels; a little-endian header), ``obspy.read()``'s example written with
    ``Stream.write(format="MSEED")`` (4096-byte float32 records), and this module's Steim-2 file."""
    import os

    import obspy

    data = os.path.join(os.path.dirname(obspy.__file__), "io", "mseed", "tests", "data")
    out = {}
    for name in ("BW.BGLD.__.EHE.D.2008.001.first_10_records", "timingquality.mseed",
                 "two_channels.mseed", "bizarre/endiantest.le-header.le-data.mseed"):
        with open(os.path.join(data, name), "rb") as fh:
            out["obspy:" + name] = fh.read()
    buf = io.BytesIO()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        obspy.read().write(buf, format="MSEED")
    out["obspy.read() example"] = buf.getvalue()
    out["mseed-steim2"] = valid_files()["mseed-steim2"]
    return out


def _header_order(record: bytes) -> str:
    """Byte order of a valid record's fixed header: the one with a plausible year."""
    return ">" if 1900 <= struct.unpack_from(">H", record, 20)[0] <= 2100 else "<"


def _blockette_1000_at(record: bytes) -> int:
    """Offset of blockette 1000 in a valid record, following the blockette chain from byte 46."""
    order = _header_order(record)
    at, = struct.unpack_from(order + "H", record, 46)
    while at:
        kind, following = struct.unpack_from(order + "HH", record, at)
        if kind == 1000:
            return at
        at = following
    raise ValueError("the record holds no blockette 1000")


GARBAGE_KINDS = ("random", "zeros", "spaces", "text", "shifted", "quality", "hour", "day",
                 "blockette-offset", "reclen-exponent")


def garbage_record(record: bytes, kind: str, rng: np.random.Generator) -> bytes:
    """``record`` (one whole miniSEED record) made into garbage of one kind, same length:
    random bytes, zeros, spaces after byte 6, text, the record rotated by 100 bytes, or its
    fixed header broken in one field (quality indicator, hour, day of year in both byte orders,
    first-blockette offset inside the header, blockette 1000 exponent); SEED Reference Manual
    v2.4 ch. 8 names the fields."""
    out = bytearray(record)
    if kind == "random":
        return rng.integers(0, 256, len(record), dtype=np.uint8).tobytes()
    if kind == "zeros":
        return bytes(len(record))
    if kind == "spaces":
        out[6:] = b"X" + b" " * (len(record) - 7)  # not a noise record: byte 6 is not a space
    elif kind == "text":
        return (b"this is not a record " * (len(record) // 21 + 1))[:len(record)]
    elif kind == "shifted":
        return record[100:] + record[:100]
    elif kind == "quality":
        out[6] = ord("V")
    elif kind == "hour":
        out[24] = 24 + int(rng.integers(0, 200))
    elif kind == "day":
        out[22:24] = b"\x00\x00"
    elif kind == "blockette-offset":
        struct.pack_into(_header_order(record) + "H", out, 46, int(rng.integers(1, 48)))
    elif kind == "reclen-exponent":
        out[_blockette_1000_at(record) + 6] = int(rng.choice([0, 6, 21, 40, 255]))
    else:
        raise ValueError(f"garbage kind {kind!r} is not one of {GARBAGE_KINDS}")
    return bytes(out)
