"""Fuzzing: arbitrary or damaged bytes give a CorpusError, never another exception."""
import io
import os
import tempfile

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from obspy import Stream, Trace, UTCDateTime
from scipy.io import wavfile

from burstlens.search.corpus import CorpusError, read_corpus
from burstlens.search.corpus.readers import FORMATS, read_waveform_file

# libmseed's log callback inside ObsPy may fail to decode damaged bytes; ObsPy ignores that itself
pytestmark = pytest.mark.filterwarnings("ignore::pytest.PytestUnraisableExceptionWarning")

# derandomized: the same examples on every run (FUZZ_EXAMPLES raises the count for a deeper soak)
FUZZ = settings(max_examples=int(os.environ.get("FUZZ_EXAMPLES", "80")), deadline=None, derandomize=True,
                database=None, suppress_health_check=[HealthCheck.too_slow])


def _valid_files() -> dict[str, bytes]:
    """One small valid file of every format, as bytes."""
    rng = np.random.default_rng(0)
    data = np.rint(rng.standard_normal(1200) * 100).astype(np.int32)
    out = {}
    for fmt, kw in (("MSEED", {"encoding": "STEIM2", "reclen": 512}), ("SAC", {}), ("SEGY", {"data_encoding": 5})):
        tr = Trace(data.astype(np.float32) if fmt != "MSEED" else data,
                   header={"network": "XX", "station": "F1", "location": "00", "channel": "GPZ",
                           "sampling_rate": 1000.0, "starttime": UTCDateTime(2026, 1, 1)})
        buf = io.BytesIO()
        import warnings
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            Stream([tr]).write(buf, format=fmt, **kw)
        out[fmt] = buf.getvalue()
    buf = io.BytesIO()
    wavfile.write(buf, 1000, data.astype(np.int16))
    out["WAV"] = buf.getvalue()
    buf = io.BytesIO()
    np.save(buf, data)
    out["NPY"] = buf.getvalue()
    buf = io.BytesIO()
    np.savez(buf, data=data, sampling_rate_hz=1000.0)
    out["NPZ"] = buf.getvalue()
    out["CSV"] = "\n".join(str(v) for v in data).encode()
    return out


VALID = _valid_files()


def _check(blob: bytes, fmt: str | None = None, windowing: str = "whole") -> None:
    fd, path = tempfile.mkstemp(suffix=".dat")
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(blob)
        try:
            if fmt is None:
                read_corpus(path, csv_sampling_rate_hz=1000.0, windowing=windowing)
            else:
                read_waveform_file(path, fmt, csv_sampling_rate_hz=1000.0)
        except CorpusError as exc:
            assert path in str(exc) or "=" in str(exc), f"message does not name the file: {exc}"
    finally:
        os.unlink(path)


def test_valid_fuzz_seeds_are_readable():
    """The unmutated seed files read without error (so the mutations below start from valid input)."""
    for fmt, blob in VALID.items():
        fd, path = tempfile.mkstemp()
        with os.fdopen(fd, "wb") as fh:
            fh.write(blob)
        try:
            traces = read_waveform_file(path, fmt, csv_sampling_rate_hz=1000.0)
            assert traces and traces[0].data.size == 1200, fmt
        finally:
            os.unlink(path)


@pytest.mark.parametrize("fmt", FORMATS)
@FUZZ
@given(blob=st.binary(max_size=2048))
def test_every_reader_on_arbitrary_bytes_raises_only_corpus_error(fmt, blob):
    """Each reader, forced onto arbitrary bytes, either reads them or raises CorpusError naming the
    file — never another exception (robustness; property-based testing with hypothesis)."""
    _check(VALID[fmt][:8] + blob, fmt)


@pytest.mark.parametrize("windowing", ["whole", "bursts"])
@pytest.mark.parametrize("fmt", FORMATS)
@FUZZ
@given(data=st.data())
def test_mutated_valid_files_raise_only_corpus_error(fmt, windowing, data):
    """A valid file with bytes overwritten, cut or inserted goes through the whole read_corpus (format
    recognition, reader, preprocessing, windowing) and yields a Corpus or a CorpusError, nothing
    else (property-based testing with hypothesis)."""
    blob = bytearray(VALID[fmt])
    for _ in range(data.draw(st.integers(1, 6))):
        kind = data.draw(st.sampled_from(["set", "cut", "insert"]))
        at = data.draw(st.integers(0, max(len(blob) - 1, 0)))
        if kind == "set" and blob:
            blob[at] = data.draw(st.integers(0, 255))
        elif kind == "cut":
            del blob[at: at + data.draw(st.integers(1, 64))]
        else:
            blob[at:at] = data.draw(st.binary(min_size=1, max_size=16))
    _check(bytes(blob), windowing=windowing)


@FUZZ
@given(blob=st.binary(max_size=4096))
def test_read_corpus_on_arbitrary_bytes_raises_only_corpus_error(blob):
    """read_corpus on a file of arbitrary bytes returns a Corpus or raises CorpusError (robustness)."""
    _check(blob)
