"""``read_corpus(..., progress=)`` (search/corpus/ingest.py): what the callback sees, and that it
changes nothing in the result."""
import numpy as np
import pytest
from obspy import Stream, Trace, UTCDateTime

from burstlens.search.corpus import READ_STAGES, ReadProgress, read_corpus
from burstlens.search.settings import CORPUS_OPTIONS

START = UTCDateTime(2026, 2, 3, 4, 0, 0)


def _burst_record(fs, seconds, onsets_s, seed):
    """Noise with decaying bursts at fs/8 lasting ~40 periods."""
    rng = np.random.default_rng(seed)
    x = rng.standard_normal(int(seconds * fs)) * 10.0
    k = np.arange(640)
    for t0 in onsets_s:
        i = int(t0 * fs)
        x[i: i + k.size] += 600.0 * np.sin(2 * np.pi * k / 8) * np.exp(-k / 120)
    return x


def _write_mseed(path, data, fs, station, start=START):
    tr = Trace(np.rint(data).astype(np.int32), header={
        "network": "XX", "station": station, "location": "00", "channel": "HHZ",
        "sampling_rate": fs, "starttime": start})
    Stream([tr]).write(str(path), format="MSEED", encoding="STEIM2")


@pytest.fixture
def folder(tmp_path):
    """Four waveform files holding five traces (two hourly-style pieces of one channel that join,
    one file at another rate, a CSV of two columns) and a README the reader skips. Returns the
    folder and the seconds of samples written, summed over traces (samples / rate)."""
    a = _burst_record(1000.0, 40.0, (5.2, 14.1, 23.7, 33.3), seed=1)
    _write_mseed(tmp_path / "a1.mseed", a[:20000], 1000.0, "A1")
    _write_mseed(tmp_path / "a2.mseed", a[20000:], 1000.0, "A1", start=START + 20.0)
    b = _burst_record(500.0, 24.0, (4.4, 12.8, 19.5), seed=2)
    _write_mseed(tmp_path / "b.mseed", b, 500.0, "B1")
    c = np.column_stack([_burst_record(1000.0, 12.0, (3.3, 8.1), seed=s) for s in (3, 4)])
    np.savetxt(tmp_path / "c.csv", np.rint(c), fmt="%d", delimiter=",")
    (tmp_path / "README.md").write_text("# site notes\nnot a waveform\n")
    seconds = 20000 / 1000.0 + 20000 / 1000.0 + b.size / 500.0 + 2 * (c.shape[0] / 1000.0)
    return tmp_path, seconds


def _read(path, **options):
    seen = []
    corpus = read_corpus(path, csv_sampling_rate_hz=1000.0, progress=seen.append, **options)
    return corpus, seen


@pytest.mark.parametrize("windowing", ["bursts", "sliding", "whole"])
def test_progress_counts_files_hours_segments_and_windows(folder, windowing):
    """The callback gets a ReadProgress after each file (files_read 1..N of N, the README not
    counted; hours_read ending at the samples / rate / 3600 of every trace read), then after each
    segment per stage, in READ_STAGES order ('triggering' only for bursts), segments_done 1..S
    with S the corpus's traces; windows_found never falls and ends at the windows found before
    the cap, here all kept. Source: the read_corpus contract in DEVELOPERS.md."""
    path, seconds = folder
    options = {"window_s": 0.5} if windowing == "sliding" else {}
    corpus, seen = _read(path, windowing=windowing, **options)
    assert all(isinstance(p, ReadProgress) for p in seen)
    reading = [p for p in seen if p.stage == "reading"]
    assert [p.files_read for p in reading] == [1, 2, 3, 4]
    assert {p.files_total for p in seen} == {4} == {len(corpus.files)}
    hours = [p.hours_read for p in seen]
    assert hours == sorted(hours) and hours[-1] == pytest.approx(seconds / 3600.0, abs=1e-9)
    stages = [s for s in READ_STAGES if windowing == "bursts" or s != "triggering"]
    assert [p.stage for p in seen] == [p.stage for p in reading] + [s for s in stages[1:] for _ in corpus.traces]
    for stage in stages[1:]:
        steps = [p for p in seen if p.stage == stage]
        assert [p.segments_done for p in steps] == list(range(1, len(corpus.traces) + 1))
        assert {p.segments_total for p in steps} == {len(corpus.traces)}
    found = [p.windows_found for p in seen]
    assert found == sorted(found)
    assert found[-1] == corpus.defaults["windows_found"] == corpus.n_windows


def test_windows_found_counts_before_the_cap(folder):
    """With more windows than max_windows, the last windows_found is the count before the seeded
    subsample (Corpus.defaults windows_found), larger than the windows kept. Source: the
    read_corpus contract in DEVELOPERS.md (cap and seeded subsample)."""
    path, _ = folder
    corpus, seen = _read(path, windowing="sliding", window_s=0.5, max_windows=5)
    assert seen[-1].stage == "cutting"
    assert seen[-1].windows_found == corpus.defaults["windows_found"] > corpus.n_windows == 5
    assert corpus.defaults["windows_kept"] == 5


@pytest.mark.parametrize("options", [{}, {"windowing": "sliding", "window_s": 0.5, "max_windows": 7, "seed": 3},
                                     {"windowing": "whole", "components": "Z"}])
def test_progress_changes_nothing(folder, options):
    """The same call with and without a callback gives the same windows (array equal), the same
    window and trace records, rejections, defaults and hash; progress is no corpus option and
    leaves no trace in the defaults. Source: the read_corpus contract in DEVELOPERS.md."""
    path, _ = folder
    with_progress, seen = _read(path, **options)
    without = read_corpus(path, csv_sampling_rate_hz=1000.0, **options)
    assert seen
    np.testing.assert_array_equal(with_progress.windows, without.windows)
    for field in ("window_meta", "traces", "rejections", "defaults", "source_hash", "files", "skipped"):
        assert getattr(with_progress, field) == getattr(without, field), field
    assert "progress" not in CORPUS_OPTIONS and "progress" not in without.defaults


@pytest.mark.parametrize("stop_at", ["reading", "triggering", "cutting"])
def test_an_exception_in_the_callback_propagates(folder, stop_at):
    """What the callback raises reaches the caller unchanged, at any stage, so a caller can stop
    the reading. Source: the read_corpus contract in DEVELOPERS.md."""
    path, _ = folder

    class Stop(Exception):
        pass

    def progress(p):
        if p.stage == stop_at:
            raise Stop(p.stage)

    with pytest.raises(Stop, match=stop_at):
        read_corpus(path, csv_sampling_rate_hz=1000.0, progress=progress)
