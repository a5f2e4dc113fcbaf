"""Samples so large that their energy overflows float64 (search/corpus/ingest.py, check_magnitude):
a CorpusError naming the file, the trace and the largest |x|, whatever the windowing, the split of
the files or the way the passes run; samples up to the limit read as before.

The float64 range is that of IEEE 754-2008 binary64: the largest finite value is (2 − 2^-52)·2^1023,
so a sum of squares overflows once it reaches 2^1024 (common practice).
"""
import numpy as np
import pytest
from obspy import Stream, Trace, UTCDateTime

from burstlens.search.corpus import CorpusError, read_corpus, stream
from burstlens.search.corpus.ingest import MAX_ABS_SAMPLE

FS = 1000.0
WINDOWINGS = ("bursts", "sliding", "whole")


def _bursts(seconds: float = 40.0, seed: int = 0) -> np.ndarray:
    """White noise (rms 1) with a decaying 40 Hz burst (peak 30) every 5 s, float64."""
    rng = np.random.default_rng(seed)
    x = rng.standard_normal(int(seconds * FS))
    k = np.arange(int(0.5 * FS))
    for onset in np.arange(3.0, seconds - 2.0, 5.0):
        i = int(onset * FS)
        x[i: i + k.size] += 30.0 * np.sin(2 * np.pi * 40.0 * k / FS) * np.exp(-k / (0.08 * FS))
    return x


def _read(path, windowing, **kw):
    return read_corpus(str(path), windowing=windowing, csv_sampling_rate_hz=FS, **kw)


@pytest.mark.parametrize("windowing", WINDOWINGS)
def test_huge_npy_is_a_corpus_error_naming_the_file(tmp_path, windowing):
    """Property: a .npy whose samples are finite but near 1e300 (their squares overflow float64)
    gives a CorpusError naming the file, its trace, the cause and the largest |x|, never the
    survey's plain ValueError, in every windowing."""
    x = _bursts() * 1e299
    path = tmp_path / "huge_site.npy"
    np.save(path, x)
    with pytest.raises(CorpusError) as err:
        _read(path, windowing)
    message = str(err.value)
    assert message.startswith(f"{path}: trace .huge_site.00.: ")
    assert "energy overflows float64" in message
    assert f"largest |x| = {np.abs(x).max():.4g}" in message


def test_one_huge_sample_is_located(tmp_path):
    """Property: one sample of 1e300 in ordinary data is found, and the message gives its time
    from the start of the trace (sample 12 345 at 1000 Hz: 12.345 s)."""
    x = _bursts()
    x[12345] = -1e300
    path = tmp_path / "spike.npy"
    np.save(path, x)
    with pytest.raises(CorpusError, match=r"spike\.npy: .*largest \|x\| = 1e\+300 at 12\.345 s into the trace"):
        _read(path, "sliding")


def test_the_sample_in_the_next_file_is_named_when_the_overlap_carries_it(tmp_path, monkeypatch):
    """Property: when the huge sample lies in the next piece's core but inside the overlap of the
    piece before (which is processed first), the error still names the file that holds it.
    Pieces of 2^14 samples with 2^12 of overlap; the trace is two miniSEED files joined at the
    first core's end (sample 16 384), the huge sample 100 samples later, in the second file."""
    monkeypatch.setattr(stream, "PIECE_SAMPLES", 1 << 14)
    monkeypatch.setattr(stream, "MARGIN_SAMPLES", 1 << 12)
    x = _bursts()
    x[(1 << 14) + 100] = 1e300
    start = UTCDateTime(2026, 1, 1)
    for name, part, t0 in (("a.mseed", x[: 1 << 14], start), ("b.mseed", x[1 << 14:], start + (1 << 14) / FS)):
        trace = Trace(part, header={"network": "XX", "station": "OV", "location": "00", "channel": "HHZ",
                                    "sampling_rate": FS, "starttime": t0})
        Stream([trace]).write(str(tmp_path / name), format="MSEED", encoding="FLOAT64")
    with pytest.raises(CorpusError) as err:
        read_corpus(str(tmp_path), windowing="sliding")
    message = str(err.value)
    assert str(tmp_path / "b.mseed") in message
    assert "XX.OV.00.HHZ" in message and "energy overflows float64" in message


def test_a_cluster_read_refuses_alike(tmp_path):
    """Property: with a ``mapper`` (the passes run as tasks, one per group of files) the same
    CorpusError comes back as in the local read."""
    x = _bursts() * 1e299
    path = tmp_path / "huge.npy"
    np.save(path, x)
    with pytest.raises(CorpusError) as local:
        _read(path, "bursts")
    with pytest.raises(CorpusError) as mapped:
        _read(path, "bursts", mapper=lambda fn, items: [fn(item) for item in items])
    assert str(mapped.value) == str(local.value)


@pytest.mark.parametrize("windowing", WINDOWINGS)
def test_samples_below_the_limit_read_as_the_same_samples_at_unit_scale(tmp_path, windowing):
    """Property: a normal file is unaffected, up to the limit. Scaling by a power of two is exact
    in binary floating point (IEEE 754-2008; Goldberg, "What every computer scientist should
    know about floating-point arithmetic", 1991, from memory), and every step of the reader is
    either linear or scale-free, so the file scaled by 2^440 (just under the 2^448 limit) gives
    the same windows times 2^440 bit for bit, the same placements and the same defaults."""
    x = _bursts(seed=1)
    np.save(tmp_path / "unit.npy", x)
    np.save(tmp_path / "scaled.npy", np.ldexp(x, 440))
    unit = _read(tmp_path / "unit.npy", windowing)
    scaled = _read(tmp_path / "scaled.npy", windowing)
    assert np.array_equal(scaled.windows, np.ldexp(unit.windows, 440))
    assert np.array_equal(scaled.noise_windows, np.ldexp(unit.noise_windows, 440))
    assert [m["offset_s"] for m in scaled.window_meta] == [m["offset_s"] for m in unit.window_meta]
    assert scaled.defaults == unit.defaults


def test_a_sample_at_the_limit_reads_and_its_energy_is_finite(tmp_path):
    """Property: the limit is inclusive and safe: a sample of exactly 2^448 reads, and the kept
    windows' energies Σx² stay finite in float64; the next float64 above it is refused."""
    x = _bursts()
    x[20000] = MAX_ABS_SAMPLE
    np.save(tmp_path / "edge.npy", x)
    corpus = _read(tmp_path / "edge.npy", "sliding", window_s=1.024)
    assert np.isfinite(np.square(corpus.windows).sum(axis=1)).all()
    assert np.abs(corpus.windows).max() > MAX_ABS_SAMPLE / 4  # the sample is in a kept window
    x[20000] = np.nextafter(MAX_ABS_SAMPLE, np.inf)
    np.save(tmp_path / "over.npy", x)
    with pytest.raises(CorpusError, match=r"over\.npy: .*energy overflows float64"):
        _read(tmp_path / "over.npy", "sliding", window_s=1.024)
