"""Streaming STA/LTA, triggers and energy peak (search/corpus/windowing.py): a trace fed chunk by
chunk gives the whole-array functions' results bit for bit, whatever the chunking."""
import numpy as np
import pytest
from obspy.signal.trigger import classic_sta_lta as ref_boxcar
from obspy.signal.trigger import recursive_sta_lta as ref_exponential
from obspy.signal.trigger import trigger_onset as ref_intervals

from burstlens.search.corpus import windowing as w

WHOLE = {"boxcar": w.boxcar_sta_lta, "exponential": w.exponential_sta_lta}
REFERENCE = {"boxcar": ref_boxcar, "exponential": ref_exponential}
PAIRS = [(20, 300), (7, 1000), (50, 10000), (50, 51), (1, 2)]
CHUNKINGS = ["one chunk", "random", "block edges", "short first chunk", "empty chunks"]


def _bursty(seed, n=100_000):
    """Unit noise with decaying sine bursts 3–40 times louder (the shape of the trigger tests' data)."""
    rng = np.random.default_rng(seed)
    x = rng.standard_normal(n)
    for centre in rng.integers(0, n - 400, max(1, n // 7000)):
        amp = rng.uniform(3, 40)
        x[centre: centre + 400] += amp * np.sin(np.arange(400) * 0.7) * np.exp(-np.arange(400) / 120)
    return x


def _block(n):
    """moving_sum's block length for a window of n samples."""
    return max(w._CHUNK, 4 * n)


def _cuts(name, n, windows, seed=0):
    """Chunk boundaries (sorted sample indices; repeats make empty chunks) for a trace of n samples."""
    rng = np.random.default_rng(seed)
    if name == "one chunk":
        return []
    if name == "random":
        return sorted(rng.integers(0, n + 1, 40).tolist())
    if name == "block edges":  # chunk edges one before, at and one after every block edge of each sum
        edges = {k * _block(m) + d for m in windows for k in (1, 2, 3) for d in (-1, 0, 1)}
        return sorted(e for e in edges if 0 < e < n)
    if name == "short first chunk":  # chunks shorter than the LTA before the first block edge
        return sorted([3, 3, 4, max(windows) // 2 + 4, max(windows) + 1])
    return [0, 0, n // 2, n // 2, n, n]  # "empty chunks": at the start, in the middle and at the end


def _stream_cf(x, kind, nsta, nlta, cuts):
    stream = w.StreamingStaLta(kind, nsta, nlta)
    parts = [stream(piece) for piece in np.split(x, cuts)]
    assert all(p.shape == piece.shape for p, piece in zip(parts, np.split(x, cuts), strict=True))
    return np.concatenate(parts)


def _stream_triggers(cf, on, off, cuts):
    tracker = w.TriggerTracker(on, off)
    seen = 0
    pairs = []
    for piece in np.split(cf, cuts):
        done = tracker.feed(piece)
        seen += piece.size
        # a pair is complete only once a sample below `off` after its run has been fed
        assert done.dtype == np.int64 and done.shape[1:] == (2,) and np.all(done[:, 1] + 1 < seen)
        pairs.append(done)
    pairs.append(tracker.close())
    return np.concatenate(pairs)


def _stream_peak(x, width, cuts):
    peak = w.EnergyPeak(width)
    for piece in np.split(x, cuts):
        peak.feed(piece)
    return peak.argmax


@pytest.mark.parametrize("chunking", CHUNKINGS)
@pytest.mark.parametrize("nsta,nlta", PAIRS)
@pytest.mark.parametrize("kind", ["boxcar", "exponential"])
def test_streaming_sta_lta_is_bit_identical(kind, nsta, nlta, chunking):
    """Chunk-by-chunk STA/LTA (Allen 1978; Trnkoczy 2012) equals the whole-array function bit for
    bit (np.array_equal) for one chunk, random sizes, edges straddling moving_sum's blocks, a first
    chunk shorter than the LTA and empty chunks (our contract with the corpus reader)."""
    x = _bursty(nsta + nlta)
    cf = _stream_cf(x, kind, nsta, nlta, _cuts(chunking, x.size, (nsta, nlta), seed=nlta))
    assert np.array_equal(cf, WHOLE[kind](x, nsta, nlta))


@pytest.mark.parametrize("nsta,nlta", [(5, 300), (1, 2), (40, 41)])
@pytest.mark.parametrize("kind", ["boxcar", "exponential"])
def test_streaming_sta_lta_one_sample_chunks(kind, nsta, nlta):
    """One-sample chunks give the whole-array STA/LTA bit for bit (Allen 1978), both on a short
    trace from its first sample and across the first moving_sum block edge (our contract)."""
    x = _bursty(11, n=2000)
    assert np.array_equal(_stream_cf(x, kind, nsta, nlta, np.arange(1, x.size)), WHOLE[kind](x, nsta, nlta))
    y = _bursty(12, n=_block(nlta) + 700)
    cuts = np.concatenate(([_block(nlta) - 600], np.arange(_block(nlta) - 599, y.size)))
    assert np.array_equal(_stream_cf(y, kind, nsta, nlta, cuts), WHOLE[kind](y, nsta, nlta))


@pytest.mark.parametrize("kind,nsta,nlta", [
    *[("boxcar", nsta, nlta) for nsta, nlta in [(20, 300), (7, 1000), (50, 10000)]],
    *[("exponential", nsta, nlta) for nsta, nlta in [(20, 300), (7, 1000), (50, 10000), (1, 2)]],
])
def test_streaming_sta_lta_equals_obspy(kind, nsta, nlta):
    """Chunk-by-chunk STA/LTA, concatenated, equals the reference library on the whole trace:
    obspy.signal.trigger.classic_sta_lta (boxcar) and recursive_sta_lta (exponential), which follow
    Allen 1978 and Trnkoczy 2012, within rtol 1e-9 (they sum in another order; a one-sample boxcar
    STA is left out: there both sums lose digits on the quietest samples, see the trigger tests)."""
    x = _bursty(nsta * nlta)
    cf = _stream_cf(x, kind, nsta, nlta, _cuts("random", x.size, (nsta, nlta), seed=1))
    np.testing.assert_allclose(cf, REFERENCE[kind](x, nsta, nlta), rtol=1e-9, atol=1e-12)


@pytest.mark.parametrize("seed", range(6))
def test_trigger_tracker_equals_whole_and_obspy(seed):
    """Trigger pairs from a characteristic function fed in random chunks (some empty) equal
    trigger_intervals on the whole cf and obspy.signal.trigger.trigger_onset, the reference library,
    for several on/off thresholds (Trnkoczy 2012: trigger on at 'on', off below 'off')."""
    rng = np.random.default_rng(seed)
    cf = w.boxcar_sta_lta(_bursty(seed, n=30000), 15, 300)
    for on, off in [(2.0, 1.0), (3.5, 3.5), (5.0, 1.5), (1.2, 0.9)]:
        cuts = sorted(rng.integers(0, cf.size + 1, int(rng.integers(1, 300))).tolist())
        ours = _stream_triggers(cf, on, off, cuts)
        ref = np.asarray(ref_intervals(cf, on, off), dtype=np.int64).reshape(-1, 2)
        assert ref.shape[0] > 0
        np.testing.assert_array_equal(ours, w.trigger_intervals(cf, on, off))
        np.testing.assert_array_equal(ours, ref)


@pytest.mark.parametrize("cf", [
    [0, 2, 2, 2, 5, 2, 0, 4, 4],  # 'on' three samples after the run start; a run open at the end
    [5, 5, 1, 2, 6, 0, 0, 2, 2],  # a run from sample 0; a run without 'on' open at the end
    [2, 6, 2, 6, 0, 6, 0, 0, 4],  # two 'on' samples in one run; one-sample runs, the last open
    [0, 0, 0, 2, 2, 2, 2, 2, 2],  # no 'on' at all
])
def test_trigger_tracker_every_two_cuts(cf):
    """For every way to cut a short cf into three chunks (so chunk edges fall on, before and after
    every on and off sample, runs have their 'on' sample in a later chunk than their start, and
    runs are still open at the end), the pairs equal trigger_intervals and
    obspy.signal.trigger.trigger_onset (reference library) on the whole cf."""
    cf = np.asarray(cf, dtype=float)
    whole = w.trigger_intervals(cf, 3.5, 1.5)
    np.testing.assert_array_equal(whole, np.asarray(ref_intervals(cf, 3.5, 1.5), dtype=np.int64).reshape(-1, 2))
    for i in range(cf.size + 1):
        for j in range(i, cf.size + 1):
            np.testing.assert_array_equal(_stream_triggers(cf, 3.5, 1.5, [i, j]), whole)


def test_trigger_tracker_reports_a_pair_when_its_run_ends():
    """A run of cf ≥ off still going at a chunk's end is reported by the feed that ends it, even
    when its 'on' sample came in a later chunk than its start; the run open at the end of the data
    comes from close(), its off the last sample (obspy.signal.trigger.trigger_onset convention)."""
    tracker = w.TriggerTracker(3.5, 1.5)
    assert tracker.feed(np.array([0.0, 2.0, 2.0])).shape == (0, 2)
    assert tracker.feed(np.array([2.0, 5.0])).shape == (0, 2)
    np.testing.assert_array_equal(tracker.feed(np.array([2.0, 0.0, 4.0])), [[4, 5]])
    np.testing.assert_array_equal(tracker.feed(np.array([4.0])), np.empty((0, 2)))
    np.testing.assert_array_equal(tracker.close(), [[7, 8]])


@pytest.mark.parametrize("width", [1, 16, 500, 9000])
@pytest.mark.parametrize("chunking", CHUNKINGS)
def test_energy_peak_equals_whole_argmax(width, chunking):
    """The streamed energy peak equals int(np.argmax(moving_sum(x², width))) on the whole trace for
    any chunking (our contract; argmax's first-occurrence rule is numpy's)."""
    x = _bursty(width)
    whole = int(np.argmax(w.moving_sum(np.square(x), width)))
    assert _stream_peak(x, width, _cuts(chunking, x.size, (width,), seed=width)) == whole


def test_energy_peak_ties_take_the_first():
    """Equal maxima (integer pulses, so the sums are exact wherever the blocks fall) resolve to the
    first occurrence, as np.argmax does, also when the chunk edge lies inside the first plateau or
    the later copies come in later chunks (numpy documentation of argmax)."""
    x = np.zeros(3 * w._CHUNK)
    for start in (w._CHUNK - 5, 40000, 2 * w._CHUNK + 100):  # the first pulse straddles a block edge
        x[start: start + 10] = 3.0
    energy = w.moving_sum(np.square(x), 20)
    assert np.count_nonzero(energy == energy.max()) > 20  # plateaus: a real tie
    whole = int(np.argmax(energy))
    assert whole == w._CHUNK + 4
    for cuts in ([], [whole], [whole + 1], [whole - 1, whole + 2], [40009], list(range(1000, x.size, 777))):
        assert _stream_peak(x, 20, cuts) == whole
    with pytest.raises(ValueError):
        _ = w.EnergyPeak(20).argmax


def test_carried_history_stays_bounded():
    """After 10 million samples in chunks of 100 000 the carried history of the boxcar STA/LTA and
    of the energy peak stays within one moving_sum block plus the window (bounded memory for a week
    of data; the exponential form carries none), checked after every chunk (common practice)."""
    nsta, nlta, width = 50, 3000, 9000
    rng = np.random.default_rng(5)
    boxcar, exponential = w.StreamingStaLta("boxcar", nsta, nlta), w.StreamingStaLta("exponential", nsta, nlta)
    peak = w.EnergyPeak(width)
    for _ in range(100):
        chunk = rng.standard_normal(100_000)
        boxcar(chunk)
        exponential(chunk)
        peak.feed(chunk)
        assert 0 < boxcar.history_samples <= _block(nlta) + nlta
        assert 0 < peak.history_samples <= _block(width) + width
        assert exponential.history_samples == 0
    assert boxcar.position == exponential.position == 10_000_000
