"""read_corpus end to end: windowing modes, data-derived defaults, rejections, cap, errors, hash."""
import hashlib
import json
import os
import shutil

import numpy as np
import pytest
from obspy import Stream, Trace, UTCDateTime

from burstlens.search.corpus import REJECTION_REASONS, Corpus, CorpusError, read_corpus

START = UTCDateTime(2026, 2, 3, 4, 5, 6)  # first sample of the records _write_mseed writes


def _burst_record(fs, seconds, onsets_s, seed=0, amp=600.0, noise=10.0):
    """Noise with decaying bursts at fs/8 lasting ~40 periods (so durations scale with the rate)."""
    rng = np.random.default_rng(seed)
    x = rng.standard_normal(int(seconds * fs)) * noise
    f = fs / 8.0
    k = np.arange(int(80 * fs / f))
    for t0 in onsets_s:
        i = int(t0 * fs)
        x[i: i + k.size] += amp * np.sin(2 * np.pi * f * k / fs) * np.exp(-k / (15 * fs / f))
    return x


def _write_mseed(path, data, fs, station="A1", channel="HHZ", start=START):
    tr = Trace(np.rint(data).astype(np.int32), header={
        "network": "XX", "station": station, "location": "00", "channel": channel,
        "sampling_rate": fs, "starttime": start})
    Stream([tr]).write(str(path), format="MSEED", encoding="STEIM2")
    return path


ONSETS = (3.1, 7.4, 11.9, 16.2, 20.5, 24.8)


def test_bursts_found_with_defaults_scaled_to_the_rate(tmp_path):
    """The same call finds every burst at 5 kHz, 4 kHz, 2 kHz and 250 Hz: the dominant frequency,
    STA (4 periods), LTA (20 × STA) and window length derive from the data, so for a record that
    is the same in samples they are about the same in samples at every rate (docs/design.md §6; STA/LTA lengths after
    Trnkoczy, "Understanding and parameter setting of STA/LTA trigger algorithm", NMSOP-2 IS 8.1,
    2012). Without a trigger kind the reader uses equal-weight averages and records 'boxcar'."""
    sizes = set()
    for fs in (5000.0, 4000.0, 2000.0, 250.0):
        path = _write_mseed(tmp_path / f"r{fs:g}.mseed", _burst_record(fs, 28.0, ONSETS), fs)
        corpus = read_corpus(path)
        d = corpus.defaults
        assert d["dominant_frequency_hz"] == pytest.approx(fs / 8, rel=0.15)
        assert d["sta_samples"] == pytest.approx(32, abs=5)
        assert d["lta_samples"] == pytest.approx(20 * d["sta_samples"], abs=1)
        assert corpus.n_windows == len(ONSETS)
        pre = d["pre_trigger"] * corpus.window_s
        np.testing.assert_allclose([m["offset_s"] + pre for m in corpus.window_meta], ONSETS, atol=64 / fs)
        for key in ("sampling_rate_hz", "sta_s", "lta_s", "trigger_on", "trigger_off", "window_s", "pre_trigger",
                    "trigger", "max_windows", "seed", "windowing"):
            assert key in d
        assert d["trigger"] == "boxcar"
        sizes.add(corpus.window_samples)
    # bursts last ~ 15-period e-folding: the window covers them, rounded to an FFT size, and in
    # samples it hardly depends on the rate (the noise differs between the records)
    assert sizes <= {256, 512} and max(sizes) / min(sizes) <= 2


def test_given_options_are_used_and_recorded(tmp_path):
    """Given STA/LTA lengths, thresholds, window and trigger kind override the derived defaults and
    are written into Corpus.defaults as used (docs/design.md §6: every default the run chose is recorded)."""
    fs = 4000.0
    path = _write_mseed(tmp_path / "r.mseed", _burst_record(fs, 28.0, ONSETS), fs)
    corpus = read_corpus(path, sta_s=0.01, lta_s=0.2, trigger_on=4.0, trigger_off=1.2, window_s=0.128,
                         trigger="exponential", pre_trigger=0.1)
    d = corpus.defaults
    assert (d["sta_s"], d["lta_s"], d["trigger_on"], d["trigger_off"], d["trigger"]) == (
        0.01, 0.2, 4.0, 1.2, "exponential")
    assert corpus.window_samples == 512 and d["window_source"] == "given"
    assert corpus.n_windows == len(ONSETS)


def test_overlapping_triggers_merge_into_one_window(tmp_path):
    """Two bursts 80 ms apart (a P and an S) fall in one window, which counts two triggers; a burst
    a second later gets its own window (docs/design.md §6: overlapping triggers merged)."""
    fs = 4000.0
    x = _burst_record(fs, 12.0, (4.0, 6.0), seed=1)
    k = np.arange(200)
    i = int(4.08 * fs)
    x[i: i + k.size] += 3000 * np.sin(2 * np.pi * 300 * k / fs) * np.exp(-k / 50)
    path = _write_mseed(tmp_path / "ps.mseed", x, fs)
    corpus = read_corpus(path, window_s=0.256, sta_s=0.005, lta_s=0.1)
    assert corpus.n_windows == 2
    assert [m["triggers"] for m in corpus.window_meta] == [2, 1]


def test_trigger_offset_points_at_the_trigger_onset(tmp_path):
    """Each burst window's ``trigger_offset_s`` is the time from its first sample to the first
    STA/LTA trigger onset inside it, the same sample as an independent pick: ObsPy's
    ``classic_sta_lta`` and ``trigger_onset`` (the reference library) on the record band-passed
    like the trigger's input (Butterworth order 4, zero phase, scipy.signal). Windows clipped at
    the trace's tapered ends hold the onset before or after pre_trigger·N, and a merged window
    points at its first trigger (docs/design.md §6)."""
    from obspy.signal.trigger import classic_sta_lta, trigger_onset
    from scipy import signal

    fs = 4000.0
    x = _burst_record(fs, 28.0, (1.02, 5.3, 9.1, 9.16, 14.0, 26.95), seed=4)
    path = _write_mseed(tmp_path / "r.mseed", x, fs)
    corpus = read_corpus(path, window_s=0.128, sta_s=0.008, lta_s=0.16)
    d = corpus.defaults
    sos = signal.butter(4, d["trigger_band_hz"], btype="bandpass", fs=fs, output="sos")
    raw = np.rint(x) - np.mean(np.rint(x))
    cf = classic_sta_lta(signal.sosfiltfilt(sos, raw), d["sta_samples"], d["lta_samples"])
    reference = trigger_onset(cf, d["trigger_on"], d["trigger_off"])[:, 0]
    n, pre = corpus.window_samples, int(round(d["pre_trigger"] * corpus.window_samples))
    starts = np.rint(np.array([m["offset_s"] for m in corpus.window_meta]) * fs).astype(int)
    found = np.rint(np.array([m["trigger_offset_s"] for m in corpus.window_meta]) * fs).astype(int)
    expected = reference[np.searchsorted(reference, starts)] - starts
    assert corpus.n_windows == 5 and [m["triggers"] for m in corpus.window_meta] == [1, 1, 2, 1, 1]
    np.testing.assert_allclose(found, expected, atol=1)
    assert found[0] < pre and found[-1] > pre and list(found[1:-1]) == [pre] * 3
    assert np.all((found >= 0) & (found < n))
    assert all(set(m) >= {"file", "trace_id", "start", "offset_s", "triggers"} for m in corpus.window_meta)


def test_whole_windowing_one_window_per_event_file(tmp_path):
    """'whole': each trace is one window; traces of different lengths are cut to the median length
    around their energy peak, a shorter one is rejected as 'too short' (docs/design.md §6)."""
    fs = 1000.0
    rng = np.random.default_rng(2)
    for k, n in enumerate((900, 1000, 1000, 1100, 400)):
        x = rng.standard_normal(n)
        x[n // 2: n // 2 + 50] += 30
        np.save(tmp_path / f"ev{k}.npy", x)
    corpus = read_corpus(tmp_path, windowing="whole", csv_sampling_rate_hz=fs)
    assert corpus.window_samples == 1000
    assert corpus.n_windows == 3
    assert [(os.path.basename(r["file"]), r["reason"]) for r in corpus.rejections] == [
        ("ev0.npy", "too short"), ("ev4.npy", "too short")]
    corpus = read_corpus(tmp_path, windowing="whole", csv_sampling_rate_hz=fs, window_s=0.4)
    assert corpus.n_windows == 5
    # the cut keeps the burst: the energy peak lies in every window
    assert all(np.max(np.abs(w)) > 10 for w in corpus.windows)
    assert all(m["trigger_offset_s"] is None for m in corpus.window_meta)


def test_sliding_windows_every_hop(tmp_path):
    """'sliding': windows of window_s every hop_s inside the tapered ends (docs/design.md §6)."""
    fs = 1000.0
    x = np.random.default_rng(3).standard_normal(20000)
    np.save(tmp_path / "cont.npy", x)
    corpus = read_corpus(tmp_path / "cont.npy", windowing="sliding", window_s=0.5, hop_s=0.25, csv_sampling_rate_hz=fs)
    guard = 1000  # taper: min(5 %, 1 s) per side
    expected = (20000 - 2 * guard - 500) // 250 + 1
    assert corpus.n_windows == expected
    np.testing.assert_allclose(np.diff([m["offset_s"] for m in corpus.window_meta]), 0.25)
    assert corpus.defaults["hop_s"] == 0.25
    assert all(m["trigger_offset_s"] is None for m in corpus.window_meta)


def test_rejections_carry_named_reasons(tmp_path):
    """Flat, clipped, duplicate, non-finite and too-short windows are rejected with those names,
    and the accepted windows are the rest (docs/design.md §6: rejections are part of the result)."""
    fs = 1000.0
    rng = np.random.default_rng(4)
    good = rng.standard_normal(2000) * 100
    flat = np.full(2000, 5.0)
    clipped = np.clip(rng.standard_normal(2000) * 100, -150, 150)
    gappy = rng.standard_normal(2000)
    gappy[700:720] = np.nan
    np.save(tmp_path / "a_good.npy", good)
    np.save(tmp_path / "b_copy.npy", good)
    np.save(tmp_path / "c_flat.npy", flat)
    np.save(tmp_path / "d_clip.npy", np.rint(clipped))
    np.save(tmp_path / "e_gap.npy", gappy)
    np.save(tmp_path / "f_short.npy", good[:300])
    corpus = read_corpus(tmp_path, windowing="whole", window_s=1.0, csv_sampling_rate_hz=fs)
    reasons = {os.path.basename(r["file"]): r["reason"] for r in corpus.rejections}
    assert reasons == {"b_copy.npy": "duplicate", "c_flat.npy": "flat", "d_clip.npy": "clipped",
                       "e_gap.npy": "non-finite", "f_short.npy": "too short"}
    assert set(reasons.values()) == set(REJECTION_REASONS)
    assert corpus.n_windows == 1 and corpus.window_meta[0]["file"].endswith("a_good.npy")
    assert corpus.to_json()["rejected_by_reason"] == {r: 1 for r in REJECTION_REASONS}


def test_non_finite_run_splits_a_continuous_trace(tmp_path):
    """In 'bursts' mode a NaN run is a gap: the trace is split there, the run is recorded as a
    'non-finite' rejection, and bursts on both sides are found."""
    fs = 4000.0
    x = _burst_record(fs, 28.0, ONSETS)
    x[int(14 * fs): int(14.2 * fs)] = np.nan
    np.save(tmp_path / "gap.npy", x)
    corpus = read_corpus(tmp_path / "gap.npy", csv_sampling_rate_hz=fs)
    assert len(corpus.traces) == 2
    assert [r["reason"] for r in corpus.rejections] == ["non-finite"]
    assert corpus.rejections[0]["offset_s"] == pytest.approx(14.0)
    assert corpus.n_windows == len(ONSETS)


def test_contiguous_files_are_joined_and_gaps_split(tmp_path):
    """Consecutive files of one channel (e.g. hourly files) are joined into one trace, so a burst on
    the boundary is found and attributed to the file where its window starts; a real time gap
    between files keeps them apart (docs/design.md §6: split at gaps)."""
    fs = 1000.0
    start = UTCDateTime(2026, 2, 3, 4, 0, 0)
    x = _burst_record(fs, 40.0, (8.0, 19.9, 31.0), seed=9)
    _write_mseed(tmp_path / "h1.mseed", x[:20000], fs, start=start)
    _write_mseed(tmp_path / "h2.mseed", x[20000:], fs, start=start + 20.0)
    _write_mseed(tmp_path / "h3.mseed", x[:20000] * 0.5, fs, start=start + 60.0)  # after a gap
    corpus = read_corpus(tmp_path)
    assert [t.get("files") for t in corpus.traces] == [[str(tmp_path / "h1.mseed"), str(tmp_path / "h2.mseed")], None]
    assert [t["duration_s"] for t in corpus.traces] == [40.0, 20.0]
    first = [m for m in corpus.window_meta if m["start"] < "2026-02-03T04:01:00"]
    assert len(first) == 3
    assert [os.path.basename(m["file"]) for m in first] == ["h1.mseed", "h1.mseed", "h2.mseed"]


def test_cap_is_a_seeded_subsample_in_window_order(tmp_path):
    """max_windows keeps a seeded random subset in window order: the same seed gives the same
    windows, and the defaults record how many were found (docs/design.md §6: cap and seeded subsample)."""
    fs = 1000.0
    np.save(tmp_path / "c.npy", np.random.default_rng(5).standard_normal(30000))
    kw = dict(windowing="sliding", window_s=0.5, csv_sampling_rate_hz=fs, max_windows=10)
    a = read_corpus(tmp_path, seed=7, **kw)
    b = read_corpus(tmp_path, seed=7, **kw)
    c = read_corpus(tmp_path, seed=8, **kw)
    full = read_corpus(tmp_path, windowing="sliding", window_s=0.5, csv_sampling_rate_hz=fs)
    offsets = [m["offset_s"] for m in a.window_meta]
    assert a.n_windows == 10 and offsets == sorted(offsets)
    np.testing.assert_array_equal(a.windows, b.windows)
    assert offsets != [m["offset_s"] for m in c.window_meta]
    assert a.defaults["windows_found"] == full.n_windows and a.defaults["windows_kept"] == 10
    index = {m["offset_s"]: i for i, m in enumerate(full.window_meta)}
    for w, m in zip(a.windows, a.window_meta, strict=True):
        np.testing.assert_array_equal(w, full.windows[index[m["offset_s"]]])
    assert sum(t["windows"] for t in a.traces) == 10


def test_source_hash_is_sha256_of_bytes_in_sorted_path_order(tmp_path):
    """source_hash is sha256 over the input files' bytes concatenated in sorted path order,
    whatever order the paths were given in (FIPS 180-4 sha256 via hashlib)."""
    fs = 4000.0
    p1 = _write_mseed(tmp_path / "b.mseed", _burst_record(fs, 28.0, ONSETS, seed=1), fs, station="B")
    p2 = _write_mseed(tmp_path / "a.mseed", _burst_record(fs, 28.0, ONSETS, seed=2), fs, station="A")
    expected = hashlib.sha256(p2.read_bytes() + p1.read_bytes()).hexdigest()
    assert read_corpus([p1, p2]).source_hash == expected
    assert read_corpus([p2, p1]).source_hash == expected
    assert read_corpus(tmp_path).files == [str(tmp_path / "a.mseed"), str(tmp_path / "b.mseed")]


def test_to_json_is_a_summary_without_samples(tmp_path):
    """Corpus.to_json() is JSON-serialisable, carries counts, traces, defaults and hash, and no
    samples (DEVELOPERS.md contract)."""
    fs = 4000.0
    path = _write_mseed(tmp_path / "r.mseed", _burst_record(fs, 28.0, ONSETS), fs)
    corpus = read_corpus(path)
    summary = json.loads(json.dumps(corpus.to_json()))
    assert summary["n_windows"] == corpus.n_windows == len(summary["window_meta"])
    assert summary["window_samples"] == corpus.window_samples
    assert summary["source_hash"] == corpus.source_hash
    assert "windows" not in summary
    assert len(json.dumps(summary)) < 20000
    assert isinstance(corpus, Corpus) and corpus.windows.dtype == np.float64


# --- bad input: each case gives its message -------------------------------------------------------

def test_unknown_format_names_the_file(tmp_path):
    """A file of no known format, named directly, is an error naming it; inside a folder it is
    skipped and listed."""
    junk = tmp_path / "notes.bin"
    junk.write_bytes(bytes(range(256)) * 4)
    with pytest.raises(CorpusError, match=rf"{junk}: unknown format"):
        read_corpus(junk)
    ms3 = tmp_path / "new.ms3"
    ms3.write_bytes(b"MS\x03" + bytes(60))
    with pytest.raises(CorpusError, match=rf"{ms3}: miniSEED 3 is not read"):
        read_corpus(ms3)
    ms3.unlink()
    fs = 4000.0
    _write_mseed(tmp_path / "r.mseed", _burst_record(fs, 28.0, ONSETS), fs)
    (tmp_path / "README.md").write_text("# notes\nthe array was installed last week\n")
    corpus = read_corpus(tmp_path)
    assert {os.path.basename(s["file"]) for s in corpus.skipped} == {"notes.bin", "README.md"}


def test_unreadable_file_names_the_file_and_cause(tmp_path):
    """A truncated miniSEED file (valid header, missing data) is an error naming the file, the cut
    record's byte offset and the cause (its blockette 1000 declares more bytes than remain; SEED
    Reference Manual v2.4, IRIS/FDSN 2012, ch. 8); a missing path is named too."""
    fs = 4000.0
    good = _write_mseed(tmp_path / "r.mseed", _burst_record(fs, 28.0, ONSETS), fs)
    bad = tmp_path / "cut.mseed"
    bad.write_bytes(good.read_bytes()[:300])
    with pytest.raises(CorpusError, match=rf"{bad}: miniSEED record at byte 0 is cut short: its blockette 1000 "
                                          r"declares 4096 bytes, 300 remain"):
        read_corpus(bad)
    with pytest.raises(CorpusError, match=r"nowhere\.mseed: no such file or folder"):
        read_corpus(tmp_path / "nowhere.mseed")


def test_empty_file_and_empty_trace(tmp_path):
    """An empty file and a trace with zero samples are errors that say so and name the file."""
    empty = tmp_path / "empty.mseed"
    empty.write_bytes(b"")
    with pytest.raises(CorpusError, match=rf"{empty}: an empty file"):
        read_corpus(empty)
    zero = tmp_path / "zero.npy"
    np.save(zero, np.zeros(0))
    with pytest.raises(CorpusError, match=rf"{zero}: empty trace .*0 samples"):
        read_corpus(zero, csv_sampling_rate_hz=100.0)


def test_csv_without_rate(tmp_path):
    """A CSV without a declared rate is an error naming the file and the option to pass."""
    path = tmp_path / "log.csv"
    path.write_text("\n".join(str(v) for v in np.arange(100.0)))
    with pytest.raises(CorpusError, match=rf"{path}: CSV file carries no sampling rate.*csv_sampling_rate_hz"):
        read_corpus(path)


def test_object_array_is_refused_without_unpickling(tmp_path):
    """An .npy holding an object array (a pickle) is refused with a CorpusError; nothing is
    unpickled (numpy allow_pickle=False semantics)."""
    path = tmp_path / "obj.npy"
    np.save(path, np.array([{"a": 1}, None], dtype=object), allow_pickle=True)
    with pytest.raises(CorpusError, match=rf"{path}: holds an object array"):
        read_corpus(path, csv_sampling_rate_hz=100.0)


def test_zero_windows_says_why(tmp_path):
    """Noise without bursts gives zero windows: the error names the file, the threshold and the
    trace count and suggests windowing='whole'; all-flat windows name the reason counts."""
    noise = tmp_path / "quiet.mseed"
    _write_mseed(noise, np.random.default_rng(6).standard_normal(40000) * 10, 4000.0)
    with pytest.raises(CorpusError,
                       match=rf"{noise}: zero usable windows: no triggers above 3.5 in 1 traces.*windowing='whole'"):
        read_corpus(noise)
    flat = tmp_path / "flat.npy"
    np.save(flat, np.ones(5000))
    with pytest.raises(CorpusError, match=r"zero usable windows: every window was rejected \(flat \d+\)"):
        read_corpus(flat, windowing="sliding", window_s=0.5, csv_sampling_rate_hz=1000.0)


@pytest.mark.parametrize("options,message", [
    ({"windowing": "events"}, r"windowing='events': expected one of bursts, whole, sliding"),
    ({"trigger": "fancy"}, r"trigger='fancy'"),
    ({"trigger": "classic"}, r"trigger='classic': expected one of boxcar \(equal-weight moving averages\), "
                             r"exponential \(recursive exponentially weighted averages\)"),
    ({"window_s": -1}, r"window_s=-1: must be a positive number"),
    ({"max_windows": 0}, r"max_windows=0"),
    ({"pre_trigger": 1.5}, r"pre_trigger=1.5"),
    ({"trigger_on": 1.0, "trigger_off": 2.0}, r"trigger_off=2.0: must not exceed trigger_on=1.0"),
    ({"sta_s": 1.0, "lta_s": 0.5}, r"sta_s=1.0: must be shorter than lta_s=0.5"),
    ({"components": "ZZ9!"}, r"components='ZZ9!'"),
    ({"bandpass_hz": (10.0, 3000.0)}, r"bandpass_hz=.*Nyquist 2000 Hz"),
])
def test_bad_options_name_the_option(tmp_path, options, message):
    """Each bad option value is a CorpusError naming the option and the value."""
    fs = 4000.0
    path = _write_mseed(tmp_path / "r.mseed", _burst_record(fs, 28.0, ONSETS), fs)
    with pytest.raises(CorpusError, match=message):
        read_corpus(path, **options)


def test_failed_read_leaves_nothing_behind(tmp_path):
    """A failing read writes nothing: the input folder is byte-identical afterwards (docs/design.md §6:
    nothing half-ingested is kept)."""
    fs = 4000.0
    _write_mseed(tmp_path / "r.mseed", _burst_record(fs, 28.0, ONSETS), fs)
    shutil.copy(tmp_path / "r.mseed", tmp_path / "s.mseed")
    (tmp_path / "t.csv").write_text("1\n2\n3\n")
    before = {p: (tmp_path / p).read_bytes() for p in os.listdir(tmp_path)}
    with pytest.raises(CorpusError, match="csv_sampling_rate_hz"):
        read_corpus(tmp_path)
    assert {p: (tmp_path / p).read_bytes() for p in os.listdir(tmp_path)} == before
