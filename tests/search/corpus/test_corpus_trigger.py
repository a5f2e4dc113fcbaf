"""STA/LTA, trigger intervals and window placement (search/corpus/windowing.py)."""
import numpy as np
import pytest
from hypothesis import given, settings
from scipy.signal import fftconvolve
from hypothesis import strategies as st
from obspy.signal.trigger import classic_sta_lta as ref_boxcar
from obspy.signal.trigger import recursive_sta_lta as ref_exponential
from obspy.signal.trigger import trigger_onset as ref_intervals

from burstlens.search.corpus import windowing as w


def _bursty(seed, n=40000):
    rng = np.random.default_rng(seed)
    x = rng.standard_normal(n)
    for centre in rng.integers(2000, n - 2000, 6):
        amp = rng.uniform(3, 40)
        x[centre: centre + 400] += amp * np.sin(np.arange(400) * 0.7) * np.exp(-np.arange(400) / 120)
    return x


@pytest.mark.parametrize("nsta,nlta", [(20, 300), (7, 1000), (50, 51), (3, 40)])
def test_boxcar_sta_lta_equals_obspy(nsta, nlta):
    """STA/LTA from equal-weight moving averages (Allen 1978) equals the reference library
    obspy.signal.trigger.classic_sta_lta, including the zeroed LTA warm-up, on noise with bursts."""
    x = _bursty(1)
    np.testing.assert_allclose(w.boxcar_sta_lta(x, nsta, nlta), ref_boxcar(x, nsta, nlta), rtol=1e-7, atol=1e-9)


@pytest.mark.parametrize("nsta,nlta", [(20, 300), (7, 1000), (50, 51), (1, 2)])
def test_exponential_sta_lta_equals_obspy(nsta, nlta):
    """STA/LTA from exponentially weighted (one-pole) averages equals
    obspy.signal.trigger.recursive_sta_lta, the reference library, sample for sample."""
    x = _bursty(2)
    np.testing.assert_allclose(w.exponential_sta_lta(x, nsta, nlta), ref_exponential(x, nsta, nlta),
                               rtol=1e-10, atol=1e-12)


def test_moving_sum_across_blocks_matches_direct_sum():
    """The block-wise trailing sum equals the direct definition Σ x[i−n+1..i], also where the window
    spans block boundaries and is longer than a block (common practice: check against the definition)."""
    rng = np.random.default_rng(3)
    x = rng.standard_normal(50000)
    for n in (1, 5, 9000, 40000):
        direct = fftconvolve(x, np.ones(n))[: x.size]
        np.testing.assert_allclose(w.moving_sum(x, n), direct, rtol=1e-9, atol=1e-9 * np.sqrt(n))


@settings(max_examples=60, deadline=None, derandomize=True, database=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    on=st.floats(1.5, 6.0),
    gap=st.floats(0.0, 1.4),
)
def test_trigger_intervals_equal_obspy(seed, on, gap):
    """Trigger on/off pairs equal obspy.signal.trigger.trigger_onset (reference library) for any
    thresholds off ≤ on on the STA/LTA of bursty noise."""
    x = _bursty(seed % 1000, n=20000)
    cf = ref_boxcar(x, 15, 300)
    off = on - gap
    ours = w.trigger_intervals(cf, on, off)
    ref = np.asarray(ref_intervals(cf, on, off), dtype=np.int64).reshape(-1, 2)
    np.testing.assert_array_equal(ours, ref)


def test_trigger_intervals_edge_cases_equal_obspy():
    """Edge cases — a trigger still on at the last sample, single-sample runs, nothing above the
    threshold — match obspy.signal.trigger.trigger_onset (reference library)."""
    cases = [
        np.array([0, 0, 5, 5, 2, 0, 4, 0, 6]),
        np.array([6, 1, 6, 1, 6]),
        np.array([0.0, 1.0, 2.0]),
        np.array([4, 2, 4, 2, 0, 0, 9, 9, 9]),
    ]
    for cf in cases:
        cf = cf.astype(float)
        ref = np.asarray(ref_intervals(cf, 3.5, 1.5), dtype=np.int64).reshape(-1, 2)
        np.testing.assert_array_equal(w.trigger_intervals(cf, 3.5, 1.5), ref)


def test_fast_length_is_a_power_of_two():
    """Window lengths are powers of two, the fastest FFT sizes (common practice): the smallest ≥ n
    ('ceil') or the closest in log scale ('nearest')."""
    assert w.fast_length(833) == 1024
    assert w.fast_length(700) == 1024
    assert w.fast_length(1024) == 1024
    assert w.fast_length(1025) == 2048
    assert w.fast_length(1400, "nearest") == 1024
    assert w.fast_length(1500, "nearest") == 2048


def test_burst_durations_join_triggers_within_gap():
    """Triggers closer than the gap (P and S of one event) form one burst from first on to last
    off; farther ones are separate (our definition of a burst, docs/design.md §6)."""
    onsets = np.array([[100, 120], [200, 260], [2000, 2010]])
    np.testing.assert_array_equal(w.burst_durations(onsets, 100), [161, 11])
    np.testing.assert_array_equal(w.burst_durations(onsets, 50), [21, 61, 11])


def test_place_burst_windows_merges_and_keeps_pre_trigger_share():
    """A window starts pre samples before its trigger; triggers inside it are merged; a window near
    an end moves inward to the guard, merging with its predecessor if it then overlaps (docs/design.md §6:
    fixed windows with a pre-trigger share, overlapping triggers merged)."""
    starts, counts, short = w.place_burst_windows(np.array([150, 1000, 1100, 1900, 5000, 9950]), 10000, 512, 128, 100)
    assert starts == [100, 872, 1772, 4872, 10000 - 100 - 512]
    assert counts == [1, 2, 1, 1, 1]
    starts, counts, short = w.place_burst_windows(np.array([9300, 9850]), 10000, 512, 128, 100)
    assert starts == [9172] and counts == [2]
    assert short == []
    starts, counts, short = w.place_burst_windows(np.array([300]), 600, 512, 128, 100)
    assert starts == [] and short == [300]


def test_rejection_reasons():
    """Flat, non-finite and clipped windows are named; a clean window is not (definitions in
    windowing.rejection_reason; flat-topped peaks mark a saturated digitiser, common practice)."""
    rng = np.random.default_rng(4)
    x = rng.standard_normal(256)
    assert w.rejection_reason(x, x) is None
    assert w.rejection_reason(np.full(256, 7), np.zeros(256)) == "flat"
    y = x.copy()
    y[10] = np.nan
    assert w.rejection_reason(x, y) == "non-finite"
    clipped = np.clip(np.rint(50 * x), -60, 60).astype(np.int32)
    assert w.rejection_reason(clipped, clipped.astype(float)) == "clipped"
