"""The site's noise sample (search/corpus/placement.py ``noise_starts``/``noise_candidates``,
cutting.py, ingest.py): noise-only windows of the burst windows' length, cut from the quiet
stretches between triggers and kept as a seeded, order-free bottom-k sample."""
from pathlib import Path

import numpy as np
import pytest
from obspy import Stream, Trace, UTCDateTime

from burstlens.search.corpus import placement, preprocess, read_corpus

DEMO = Path(__file__).resolve().parents[3] / "demo_corpus"
FS = 200.0
START = UTCDateTime(2026, 6, 1, 0, 0, 0)
BURST_S = 1.5
TAU_S = 0.25        # decay time of the bursts' envelope
PEAK = 900.0        # largest burst amplitude, counts
NOISE_RMS = 10.0 * np.sqrt(1.25)  # white of rms 10 coloured by x[i] += 0.5 x[i−1]
# a burst's envelope PEAK·exp(−t/TAU_S) stands above 3 × the noise rms for at most this long
LOUD_S = TAU_S * np.log(PEAK / (3 * NOISE_RMS))


def _record(seconds: float, seed: int, every: float = 20.0):
    """Coloured noise (rms ≈ 11.2 counts) with a decaying 30 Hz burst of BURST_S s every
    ``every`` s ± 3 s; returns (int32 counts, burst onsets in s)."""
    rng = np.random.default_rng(seed)
    x = rng.standard_normal(int(seconds * FS)) * 10.0
    x[1:] += 0.5 * x[:-1]
    onsets = np.arange(every / 2, seconds - every / 2, every)
    onsets = onsets + rng.uniform(-3.0, 3.0, onsets.size)
    k = np.arange(int(BURST_S * FS))
    for t0 in onsets:
        i = int(t0 * FS)
        x[i: i + k.size] += rng.uniform(300, PEAK) * np.sin(2 * np.pi * 30.0 * k / FS) * np.exp(-k / (TAU_S * FS))
    return np.rint(x).astype(np.int32), onsets


def _write(path, channels: dict, start=START, station="P1"):
    Stream([Trace(data, header={"network": "XX", "station": station, "location": "00", "channel": cha,
                                "sampling_rate": FS, "starttime": start})
            for cha, data in channels.items()]).write(str(path), format="MSEED", encoding="STEIM2")
    return path


@pytest.fixture(scope="module")
def site(tmp_path_factory):
    """Twenty minutes of two channels (about 60 bursts each) as one file, and the same samples as
    four 5-minute files."""
    folder = tmp_path_factory.mktemp("noise")
    records = {cha: _record(1200.0, seed) for seed, cha in enumerate(("HHZ", "HHN"))}
    data = {cha: r[0] for cha, r in records.items()}
    _write(folder / "whole.mseed", data)
    (folder / "parts").mkdir()
    n = int(300 * FS)
    for k, a in enumerate(range(0, int(1200 * FS), n)):
        _write(folder / "parts" / f"part{k}.mseed", {c: d[a: a + n] for c, d in data.items()}, START + a / FS)
    return {"file": folder / "whole.mseed", "parts": folder / "parts",
            "onsets": {f"XX.P1.00.{cha}": r[1] for cha, r in records.items()}, "samples": data}


def _spy_triggers(monkeypatch) -> dict:
    """Segment index → the trigger (on, off) intervals the reader's triggering pass found."""
    seen = {}
    real = placement.trigger_intervals

    def spy(pieces, **options):
        out = real(pieces, **options)
        seen.update(out)
        return out

    monkeypatch.setattr(placement, "trigger_intervals", spy)
    return seen


def _tiling(intervals, n: int, lo: int, hi: int) -> list[int]:
    """The rule written out sample by sample: windows of n at a stride of n from the start of
    each stretch of [lo, hi) outside every [on − n, off + n]."""
    free = np.ones(hi, dtype=bool)
    free[:lo] = False
    for on, off in intervals:
        free[max(0, on - n): off + n + 1] = False
    starts, s = [], 0
    while s < hi:
        if not free[s]:
            s += 1
            continue
        e = s
        while e < hi and free[e]:
            e += 1
        starts += list(range(s, e - n + 1, n))
        s = e
    return starts


def _without_files(meta):
    return [{k: v for k, v in m.items() if k != "file"} for m in meta]


def test_noise_windows_lie_only_in_quiet_stretches(site, monkeypatch):
    """Every noise window keeps one window length from every trigger interval, overlaps no burst
    window and no generated burst while the burst stands above 3 × the noise rms, and is as quiet
    as the background (rms within 1.5 × the generator's noise rms, the burst windows being far
    louder); the windows found are exactly the tiling of the rule (stride one window from each
    free stretch's start, outside the taper and the first LTA), and the count and duration are
    recorded. Source: the noise-sample rule of the brief; the generated burst times (ground
    truth); common practice (noise taken between triggers)."""
    intervals = _spy_triggers(monkeypatch)
    corpus = read_corpus(site["file"], max_windows=10_000)
    d, n = corpus.defaults, corpus.window_samples
    noise = d["noise"]
    assert corpus.noise_windows.shape == (placement.NOISE_WINDOWS, n) and corpus.noise_windows.dtype == np.float64
    assert len(corpus.noise_meta) == noise["windows_kept"] == placement.NOISE_WINDOWS
    assert noise["source"] == "quiet stretches between triggers" and noise["max_windows"] == placement.NOISE_WINDOWS
    assert noise["duration_s"] == pytest.approx(placement.NOISE_WINDOWS * corpus.window_s)
    assert noise["rejected_by_reason"] == {} and not corpus.rejections
    assert "window" in noise["rule"] and "stride" in noise["rule"]

    found = 0
    for index, trace in enumerate(corpus.traces):
        size = len(site["samples"][trace["trace_id"].split(".")[-1]])
        guard = preprocess.taper_length(size, FS)
        tiling = _tiling(intervals[index], n, max(guard, d["lta_samples"]), size - guard)
        found += len(tiling)
        bursts = [round(m["offset_s"] * FS) for m in corpus.window_meta if m["trace_id"] == trace["trace_id"]]
        mine = [round(m["offset_s"] * FS) for m in corpus.noise_meta if m["trace_id"] == trace["trace_id"]]
        assert mine and set(mine) <= set(tiling)
        for s in mine:
            assert all(s + n <= on - n or s > off + n for on, off in intervals[index])
            assert all(s + n <= b or s >= b + n for b in bursts)
            assert all(s + n <= t0 * FS or s >= (t0 + LOUD_S) * FS for t0 in site["onsets"][trace["trace_id"]])
    assert noise["windows_found"] == found and noise["windows_checked"] == min(found, placement.NOISE_CANDIDATES)
    assert len(corpus.window_meta) == d["windows_found"]  # every burst window is in the check above
    rms = np.sqrt(np.mean(corpus.noise_windows ** 2, axis=1))
    assert rms.max() < 1.5 * NOISE_RMS
    assert np.median(np.sqrt(np.mean(corpus.windows ** 2, axis=1))) > 3 * NOISE_RMS
    json_noise = corpus.to_json()
    assert json_noise["defaults"]["noise"] == noise and len(json_noise["noise_meta"]) == placement.NOISE_WINDOWS


def test_noise_starts_tile_each_free_stretch():
    """A worked example of the rule: intervals [100, 120] and [400, 450] in [10, 900) with
    windows of 50: free [10, 50), [171, 350), [501, 900): windows at 171, 221, 271 and 501 … 801.
    Source: the noise-sample rule of the brief (widening by one window, stride of one window)."""
    starts = placement.noise_starts(np.array([[100, 120], [400, 450]]), 50, 10, 900)
    assert starts.tolist() == [171, 221, 271, 501, 551, 601, 651, 701, 751, 801]
    assert placement.noise_starts(np.empty((0, 2), dtype=np.int64), 50, 10, 130).tolist() == [10, 60]


def test_noise_windows_do_not_depend_on_files_or_where_the_passes_run(site):
    """One file, four 5-minute files, and the four files read through a mapper give the same
    noise windows bit for bit, the same records but for file names, the same noise record.
    Source: bottom-k sampling by hashed keys is order-free (Cohen & Kaplan, "Summarizing data
    using bottom-k sketches", PODC 2007); the reader's contract (a mapper changes nothing)."""
    one = read_corpus(site["file"])
    parts = read_corpus(site["parts"])
    mapped = read_corpus(site["parts"], mapper=lambda fn, items: list(map(fn, items)))
    assert one.noise_windows.shape[0] == placement.NOISE_WINDOWS
    for other in (parts, mapped):
        np.testing.assert_array_equal(other.noise_windows, one.noise_windows)
        assert _without_files(other.noise_meta) == _without_files(one.noise_meta)
        assert other.defaults["noise"] == one.defaults["noise"]
    assert mapped.noise_meta == parts.noise_meta
    assert {m["file"] for m in parts.noise_meta} <= {str(p) for p in site["parts"].iterdir()}


def test_the_noise_sample_does_not_depend_on_the_block_of_starts_hashed(site, monkeypatch):
    """The candidates are chosen from the starts made and hashed 1000 at a time as from blocks of
    65536: the same noise windows bit for bit. Source: the smallest keys of a set are those of the
    union of the smallest of its parts (definition of the bottom-k sample, Cohen & Kaplan 2007)."""
    one = read_corpus(site["file"])
    monkeypatch.setattr(placement, "NOISE_BLOCK", 1000)
    blocks = read_corpus(site["file"])
    assert one.defaults["noise"]["windows_found"] > 2000
    np.testing.assert_array_equal(blocks.noise_windows, one.noise_windows)
    assert blocks.noise_meta == one.noise_meta


def test_the_noise_sample_is_capped_seeded_and_in_window_order(site):
    """With more noise windows found than NOISE_WINDOWS, exactly NOISE_WINDOWS are kept, in window
    order (trace, then time), the same for the same seed and another sample for another seed.
    Source: seeded bottom-k sampling (Cohen & Kaplan 2007); the cap of the brief."""
    def kept(seed):
        corpus = read_corpus(site["file"], seed=seed)
        noise = corpus.defaults["noise"]
        assert noise["windows_kept"] == placement.NOISE_WINDOWS < noise["windows_found"]
        places = [(m["trace_id"], m["offset_s"]) for m in corpus.noise_meta]
        assert places == sorted(places)  # traces by SEED id, then time
        return places

    assert kept(0) == kept(0)
    assert set(kept(1)) != set(kept(0))


def test_noise_rejections_are_counted_in_the_noise_record_only(tmp_path):
    """A dead channel (constant counts, which never triggers) beside a live one, and a copy of the
    live one under another station name: every noise window of the dead channel is counted 'flat'
    and every one of the copy 'duplicate' in the noise record, none is in Corpus.rejections, and
    the kept ones are all of the live channel (the first in window order of each pair of equal
    windows). Source: the reader's rejection rules ('flat': raw peak-to-peak 0; 'duplicate': the
    same raw samples, the first in window order kept; DEVELOPERS.md)."""
    data, _ = _record(240.0, 7, every=30.0)
    _write(tmp_path / "a.mseed", {"HHZ": data, "HHN": np.full(data.size, 3, dtype=np.int32)}, station="S1")
    _write(tmp_path / "b.mseed", {"HHZ": data}, station="S9")
    corpus = read_corpus(tmp_path, window_s=1.0)
    noise, n = corpus.defaults["noise"], corpus.window_samples
    assert noise["windows_found"] == noise["windows_checked"] < placement.NOISE_CANDIDATES  # all checked
    guard = preprocess.taper_length(data.size, FS)
    dead = len(_tiling([], n, max(guard, corpus.defaults["lta_samples"]), data.size - guard))
    rejected = noise["rejected_by_reason"]
    assert rejected == {"duplicate": (noise["windows_found"] - dead) // 2, "flat": dead}
    assert noise["windows_kept"] == placement.NOISE_WINDOWS < noise["windows_found"] - sum(rejected.values())
    assert {m["trace_id"] for m in corpus.noise_meta} == {"XX.S1.00.HHZ"}
    assert all(r["reason"] != "flat" for r in corpus.rejections)
    assert sum(r["reason"] == "duplicate" for r in corpus.rejections) == corpus.defaults["windows_found"]


@pytest.mark.parametrize("windowing", ["whole", "sliding"])
def test_whole_and_sliding_windows_give_no_noise_sample(site, windowing):
    """'whole' and 'sliding' windowing know no quiet stretches: the noise sample is empty, (0, N),
    and the record says why. Source: the brief ('whole' windows are event files)."""
    corpus = read_corpus(site["file"], windowing=windowing, window_s=4.0)
    assert corpus.noise_windows.shape == (0, corpus.window_samples) and corpus.noise_meta == []
    noise = corpus.defaults["noise"]
    assert noise["source"] is None and f"'{windowing}' windows" in noise["reason"]
    assert "noise floor" in noise["reason"]


def test_no_free_stretch_gives_an_empty_sample(site):
    """Windows of 40 s with bursts every 20 s: every sample lies within one window of a trigger,
    so no noise window is placed; the sample is empty, with its source, and no error. Source: the
    noise-sample rule of the brief."""
    corpus = read_corpus(site["file"], window_s=40.0)
    noise = corpus.defaults["noise"]
    assert corpus.noise_windows.shape == (0, corpus.window_samples)
    assert noise["source"] == "quiet stretches between triggers"
    assert noise["windows_found"] == noise["windows_kept"] == 0 and noise["duration_s"] == 0.0


def test_the_demo_corpus_has_a_noise_sample():
    """The committed demo corpus gives a full noise sample, none overlapping a burst window of its
    trace. Source: the noise-sample rule of the brief."""
    corpus = read_corpus(DEMO)
    noise = corpus.defaults["noise"]
    assert noise["windows_kept"] == placement.NOISE_WINDOWS == corpus.noise_windows.shape[0]
    assert noise["duration_s"] == pytest.approx(placement.NOISE_WINDOWS * corpus.window_s)
    assert corpus.defaults["windows_found"] == corpus.n_windows  # every burst window is checked below
    for m in corpus.noise_meta:
        for b in corpus.window_meta:
            if b["trace_id"] == m["trace_id"]:
                assert abs(m["offset_s"] - b["offset_s"]) >= corpus.window_s - 0.5 / corpus.sampling_rate_hz
