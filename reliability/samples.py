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
    """One valid file of every format the readers take (DESIGN §6), keyed by a short name."""
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
    ``marker_path``. The readers must refuse them all without unpickling (DESIGN §6)."""
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
