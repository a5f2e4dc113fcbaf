"""The data-driven bound on sweep rates (search/sweeps.py)."""
import os

import numpy as np
import pytest
from scipy.signal import chirp

from burstlens.search import demo_site as ds
from burstlens.search import read_corpus
from burstlens.search.sweeps import sweep_rate_bound

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
DEMO = os.path.join(ROOT, "demo_corpus")
FS, N = 4000.0, 1024
BAND = [200.0, 1400.0]


def _chirp_windows(rate_hz_per_s, count=16, noise=0.2, seed=0):
    """Windows holding one linear chirp each (sin² envelope, crossing ≤ 1100 Hz of the band)
    in white noise of std ``noise`` (peak amplitude 1)."""
    rng = np.random.default_rng(seed)
    t = np.arange(N) / FS - 0.1 * N / FS
    dur = min(0.8 * N / FS, 1100.0 / abs(rate_hz_per_s))
    f0 = 250.0 if rate_hz_per_s > 0 else 1350.0
    env = ((t >= 0) & (t <= dur)) * np.sin(np.pi * np.clip(t / dur, 0, 1)) ** 2
    x = env * chirp(t, f0, dur, f0 + rate_hz_per_s * dur)
    return x + noise * rng.standard_normal((count, N))


@pytest.mark.parametrize("rate", [-2e3, 2e3, 1e4, 4e4])
def test_bound_covers_linear_chirps_within_three_times(rate):
    """The WVD ridge of a linear chirp lies on f0 + βt (Claasen & Mecklenbräuker, Philips J.
    Res. 35, 1980; Boashash, Proc. IEEE 80(4), 1992), so the bound from ridge slopes is ≥ |β|
    and within 3× of it (the safety factor is 2; at 2 kHz/s the band/window floor, 2.3×, rules)."""
    out = sweep_rate_bound(_chirp_windows(rate), FS, BAND)
    assert abs(rate) <= out["chirp_bound_hz_per_s"] <= 3.0 * abs(rate)
    assert out["windows_with_sweeps"] == 16
    assert out["chirp_bound_hz_per_s"] >= out["floor_hz_per_s"]


def test_demo_corpus_bound_covers_the_fastest_guided_wave():
    """The demo's guided wave arrives at frequency f at its group delay r/U(f), so it sweeps at
    U²/(r|U′|) (stationary phase; common practice): fastest at the nearest station of a guided
    event. At its band centre that rate, over every guided event and station of the committed
    catalogue, is within the bound found from the windows; the bound stays far below the cap."""
    corpus = read_corpus([DEMO])
    fs = corpus.sampling_rate_hz
    out = sweep_rate_bound(corpus.windows, fs, [fs / 100.0, 0.45 * fs])  # the search's default band
    sources = ds.make_catalogue(np.random.default_rng(ds.DEFAULT_SEED), ds.DURATION_S)  # as generate()
    stations = np.array(list(ds.STATIONS.values()))
    nearest = min(np.linalg.norm(stations - np.asarray(s.location), axis=1).min() for s in sources if s.guided)
    fastest = float(ds.guided_sweep_rate_hz_per_s(ds.GUIDED_CENTRE_HZ, nearest))
    assert fastest > out["floor_hz_per_s"]  # the old band/window bound would not cover it
    assert out["chirp_bound_hz_per_s"] >= fastest
    assert out["chirp_bound_hz_per_s"] <= out["cap_hz_per_s"] / 10


def test_white_noise_falls_back_to_band_over_window():
    """White noise holds no sweep: no loud, straight ridge run, so the bound is band width /
    window duration and no huge spurious value (common practice: a detector quiet on noise)."""
    noise = np.random.default_rng(3).standard_normal((200, N))
    out = sweep_rate_bound(noise, FS, BAND)
    assert out["windows_with_sweeps"] == 0
    assert out["chirp_bound_hz_per_s"] == pytest.approx((BAND[1] - BAND[0]) / (N / FS))
    assert out["quantile_hz_per_s"] is None
    assert "band width / window duration" in out["source"]


def test_deterministic():
    """Same windows, same answer, bit for bit (a fixed stride, no randomness; common practice
    for reproducible runs)."""
    x = _chirp_windows(1e4, count=40, seed=7)
    assert sweep_rate_bound(x, FS, BAND) == sweep_rate_bound(x.copy(), FS, BAND)


def test_bad_band_names_the_value():
    """A band outside [0, fs/2] is a ValueError naming band_hz (common practice)."""
    with pytest.raises(ValueError, match="band_hz"):
        sweep_rate_bound(np.zeros((2, N)), FS, [100.0, 3000.0])
