"""The streaming reader (search/corpus/stream.py, placement.py, cutting.py): continuous records are
read in bounded pieces, and the result does not depend on how the samples reach the reader."""
from pathlib import Path

import numpy as np
import pytest
from obspy import Stream, Trace, UTCDateTime

from burstlens.search.corpus import CorpusError, cutting, read_corpus, readers, stream

DEMO = Path(__file__).resolve().parents[3] / "demo_corpus"
FS = 200.0
START = UTCDateTime(2026, 4, 7, 0, 0, 0)


def _record(seconds: float, seed: int, fs: float = FS) -> np.ndarray:
    """Coloured noise (rms ≈ 10 counts) with a decaying burst at fs/6.7 (30 Hz at 200 Hz) every
    ~15 s."""
    rng = np.random.default_rng(seed)
    n = int(seconds * fs)
    x = rng.standard_normal(n) * 10.0
    x[1:] += 0.5 * x[:-1]
    k = np.arange(int(1.5 * fs))
    for onset in np.arange(7.0, seconds - 7.0, 15.0) + rng.uniform(-3, 3, int((seconds - 14.0) // 15.0) + 1):
        i = int(onset * fs)
        x[i: i + k.size] += rng.uniform(150, 900) * np.sin(2 * np.pi * 0.15 * k) * np.exp(-k / (0.25 * fs))
    return np.rint(x).astype(np.int32)


def _write(path, channels: dict, start=START, reclen=512, fs=FS):
    Stream([Trace(data, header={"network": "XX", "station": "P1", "location": "00", "channel": cha,
                                "sampling_rate": fs, "starttime": start})
            for cha, data in channels.items()]).write(str(path), format="MSEED", encoding="STEIM2", reclen=reclen)


@pytest.fixture(scope="module")
def two_hours():
    return {"HHZ": _record(7200.0, 1), "HHN": _record(7200.0, 2)}


@pytest.fixture
def small_pieces(monkeypatch):
    """Pieces of 2^14 samples (82 s) with 2^12 (20 s) of overlap: a two-hour trace is 88 pieces."""
    monkeypatch.setattr(stream, "PIECE_SAMPLES", 1 << 14)
    monkeypatch.setattr(stream, "MARGIN_SAMPLES", 1 << 12)


def _hourly(folder, channels, minutes=10):
    """The records as files of ``minutes`` each, named so that they sort in time order."""
    folder.mkdir()
    n = int(minutes * 60 * FS)
    total = next(iter(channels.values())).size
    for k, a in enumerate(range(0, total, n)):
        _write(folder / f"part{k:03d}.mseed", {c: d[a: a + n] for c, d in channels.items()}, START + a / FS)
    return folder


def _without_files(corpus):
    meta = [{k: v for k, v in m.items() if k != "file"} for m in corpus.window_meta]
    traces = [{k: v for k, v in t.items() if k not in ("file", "files")} for t in corpus.traces]
    rejections = [{k: v for k, v in r.items() if k != "file"} for r in corpus.rejections]
    return meta, traces, rejections, corpus.defaults


def test_the_result_does_not_depend_on_files_or_read_blocks(tmp_path, two_hours, small_pieces, monkeypatch):
    """Two hours of two channels read as one file, as twelve 10-minute files, and as one file
    decoded 64 KiB of records at a time give the same windows bit for bit, the same records
    (but for file names), the same triggers and defaults: the pieces are laid out by the samples'
    place in their trace, never by files or blocks. Source: the issue's contract (chunked vs whole,
    identical windows); miniSEED records are independent (SEED Reference Manual v2.4, ch. 8)."""
    _write(tmp_path / "day.mseed", two_hours)
    whole = read_corpus(tmp_path / "day.mseed")
    split = read_corpus(_hourly(tmp_path / "hourly", two_hours))
    monkeypatch.setattr(readers, "CHUNK_BYTES", 1 << 16)
    blocks = read_corpus(tmp_path / "day.mseed")
    assert whole.defaults["triggers"] > 500 and whole.n_windows > 500
    for other in (split, blocks):
        np.testing.assert_array_equal(other.windows, whole.windows)
        assert _without_files(other) == _without_files(whole)
    assert len(split.traces) == 2 and len(split.traces[0]["files"]) == 12


def _same_up_to_the_detrend(one, many):
    """The same triggers, window length and starts; windows within 1 % of each window's rms."""
    for key in ("triggers", "window_samples", "sta_samples", "lta_samples", "trigger_band_hz", "windows_found"):
        assert many.defaults[key] == one.defaults[key], key
    assert [m["offset_s"] for m in many.window_meta] == [m["offset_s"] for m in one.window_meta]
    rms = np.sqrt(np.mean(one.windows ** 2, axis=1))
    assert np.all(np.sqrt(np.mean((many.windows - one.windows) ** 2, axis=1)) < 0.01 * rms)


def test_pieces_give_the_triggers_of_one_pass_over_a_day(tmp_path, monkeypatch):
    """A generated day (one channel at 80 Hz, 6.9 M samples, ~5700 bursts) processed as one piece
    (the whole-trace pass) and as 106 pieces with 51 s of overlap: the same STA/LTA triggers, the
    same window length and window starts, and windows that differ only by the per-piece linear
    detrend (under 1 % of each window's rms). Source: STA/LTA after Allen (1978) is causal with its
    state carried over pieces; the zero-phase filters settle within the overlap (common
    practice)."""
    _write(tmp_path / "day.mseed", {"HHZ": _record(86400.0, 7, fs=80.0)}, fs=80.0)
    monkeypatch.setattr(stream, "PIECE_SAMPLES", 1 << 23)
    one = read_corpus(tmp_path / "day.mseed", max_windows=10_000)
    monkeypatch.setattr(stream, "PIECE_SAMPLES", 1 << 16)
    monkeypatch.setattr(stream, "MARGIN_SAMPLES", 1 << 12)
    many = read_corpus(tmp_path / "day.mseed", max_windows=10_000)
    assert one.defaults["triggers"] > 4000 and one.n_windows > 4000
    _same_up_to_the_detrend(one, many)


def test_on_the_demo_pieces_give_the_triggers_of_one_pass(monkeypatch):
    """The committed demo corpus (one minute at 4 kHz per trace: one piece each by default) read
    in pieces of 4 s with 1 s of overlap: the same triggers, window starts, and windows within
    1 % of their rms. Source: as above (Allen 1978; common practice)."""
    one = read_corpus(DEMO, max_windows=5000)
    monkeypatch.setattr(stream, "PIECE_SAMPLES", 1 << 14)
    monkeypatch.setattr(stream, "MARGIN_SAMPLES", 1 << 12)
    many = read_corpus(DEMO, max_windows=5000)
    assert one.defaults["triggers"] > 100
    _same_up_to_the_detrend(one, many)


def test_the_kept_windows_do_not_depend_on_file_order(tmp_path, two_hours, small_pieces):
    """With more windows than max_windows, the seeded sample is the same windows (trace id and
    offset) when the channels come in files that sort in the other order, and another seed gives
    another sample. Source: bottom-k sampling by hashed keys is order-free (Cohen & Kaplan 2007)."""
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    _write(tmp_path / "a" / "1.mseed", {"HHZ": two_hours["HHZ"]})
    _write(tmp_path / "a" / "2.mseed", {"HHN": two_hours["HHN"]})
    _write(tmp_path / "b" / "1.mseed", {"HHN": two_hours["HHN"]})
    _write(tmp_path / "b" / "2.mseed", {"HHZ": two_hours["HHZ"]})

    def kept(folder, seed=0):
        corpus = read_corpus(tmp_path / folder, max_windows=100, seed=seed)
        assert corpus.n_windows == 100 < corpus.defaults["windows_found"]
        return {(m["trace_id"], m["offset_s"]) for m in corpus.window_meta}

    assert kept("a") == kept("b")
    assert kept("a", seed=1) != kept("a")


def test_the_window_sample_is_uniform():
    """Each of 40 windows is kept in close to k/F = 10/40 of 4000 seeds (within 5 binomial standard
    deviations) and every sample has exactly 10 windows in window order. Source: definition of a
    simple random sample; bottom-k with i.i.d. uniform keys is one (Cohen & Kaplan 2007)."""
    seg = stream.SegmentInfo(stream.TraceInfo(0, "XX.P1.00.HHZ", FS, 0.0, "i", 10, [(0, "f")]), 0, 10, 0)
    counts = np.zeros(40)
    for seed in range(4000):
        sample = cutting.WindowSample(10, seed)
        for start in range(40):
            sample.offer(cutting.Found((0, start), cutting.window_key(seed, seg, start), np.zeros(1), {}), start)
        kept = [f.order[1] for f in sample.kept()]
        assert len(kept) == 10 and kept == sorted(kept)
        counts[kept] += 1
    p = 10 / 40
    assert np.all(np.abs(counts - 4000 * p) < 5 * np.sqrt(4000 * p * (1 - p)))


def test_duplicates_are_judged_in_window_order_whatever_the_arrival():
    """Of windows with the same samples, the first in window order is kept and the other is a
    'duplicate', whichever arrives first; a sample full of duplicates still keeps k distinct
    windows. Source: the reader's rejection rule (DEVELOPERS.md, 'duplicate')."""
    seg = stream.SegmentInfo(stream.TraceInfo(0, "XX.P1.00.HHZ", FS, 0.0, "i", 10, [(0, "f")]), 0, 10, 0)
    for arrival in ([0, 1, 2, 3], [3, 2, 1, 0]):
        sample = cutting.WindowSample(2, 0)
        for start in arrival:
            digest = 99 if start in (1, 3) else start
            sample.offer(cutting.Found((0, start), cutting.window_key(0, seg, start), np.zeros(1), {}), digest)
        assert sample.found == 3 and sample.duplicates == {(0, 3)}
        assert len(sample.kept()) == 2 and (0, 3) not in [f.order for f in sample.kept()]


def test_a_file_broken_in_the_middle_of_a_stream_is_named(tmp_path, two_hours):
    """Twelve 10-minute files of which the seventh has a record whose Steim-2 data frames are
    garbage (every dnib 11, an impossible code, SEED Reference Manual v2.4 appendix B): the read
    fails with a CorpusError naming that file, and returns nothing. Source: the reader's error
    contract (DEVELOPERS.md)."""
    folder = _hourly(tmp_path / "hourly", two_hours)
    broken = folder / "part006.mseed"
    data = bytearray(broken.read_bytes())
    data[9 * 512 + 64: 10 * 512] = b"\xff" * 448  # keep the fixed header and blockette 1000
    broken.write_bytes(bytes(data))
    with pytest.raises(CorpusError, match="part006.mseed"):
        read_corpus(folder)


def test_a_missing_file_splits_the_trace(tmp_path, two_hours, small_pieces):
    """Without the fourth 10-minute file each channel is two segments, one before and one after
    the hole, and no window spans it. Source: contiguity rule for joining (half a sample, common
    practice)."""
    folder = _hourly(tmp_path / "hourly", two_hours)
    (folder / "part003.mseed").unlink()
    corpus = read_corpus(folder, max_windows=5000)
    assert len(corpus.traces) == 4
    hole = (1800.0, 2400.0)
    for m in corpus.window_meta:
        begin = UTCDateTime(m["start"]) - START
        assert begin + corpus.window_s <= hole[0] or begin >= hole[1]
