"""The invented demo site (search/demo_site.py) and the committed demo_corpus/."""
import hashlib
import json
import os

import numpy as np
import pytest

from burstlens.search import demo_site as ds
from burstlens.search.corpus import read_corpus

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
DEMO = os.path.join(ROOT, "demo_corpus")


def test_brune_worked_example():
    """Mw −1, Δσ = 1 MPa, β = 3500 m/s gives fc ≈ 503 Hz: M0 = 10^(1.5·(−1) + 9.1) N·m (IASPEI
    standard Mw: IASPEI Magnitude Working Group, "Summary of Magnitude Working Group
    Recommendations on Standard Procedures for Determining Earthquake Magnitudes from Digital
    Data", 2013) and fc = 0.4906·β·(Δσ/M0)^(1/3) (Brune, JGR 75, 1970)."""
    m0 = ds.moment_from_mw(-1.0)
    assert m0 == pytest.approx(10 ** 7.6)
    assert ds.corner_frequency_hz(m0, 1e6, 3500.0) == pytest.approx(503.0, abs=0.5)


def test_corner_frequency_constant_from_radius_and_stress_drop():
    """0.4906 = (2.34/2π)·(16/7)^(1/3), from r = 2.34β/(2π fc) and Δσ = 7M0/(16r³) (Brune 1970;
    Eshelby's circular crack): the fc returned gives back Δσ through those two relations."""
    m0, stress, beta = 3.0e8, 2.5e6, 3468.0
    fc = ds.corner_frequency_hz(m0, stress, beta)
    r = 2.34 * beta / (2 * np.pi * fc)
    assert 7 * m0 / (16 * r ** 3) == pytest.approx(stress, rel=2e-4)


def test_brune_spectrum_is_the_transform_of_the_moment_rate():
    """M0/(1 + i f/fc)² is the Fourier transform of M0 ωc² t e^{−ωc t} (Brune 1970 ω² model): flat
    at M0 below fc, M0/2 in modulus at fc, f⁻² above; checked against a finely sampled FFT."""
    fs, n, m0, fc = 200000.0, 2 ** 16, 1.0e7, 200.0
    t = np.arange(n) / fs
    wc = 2 * np.pi * fc
    f = np.fft.rfftfreq(n, 1 / fs)
    numeric = np.fft.rfft(m0 * wc ** 2 * t * np.exp(-wc * t)) / fs
    np.testing.assert_allclose(numeric, ds.brune_moment_rate(f, m0, fc), atol=1e-4 * m0)
    assert abs(ds.brune_moment_rate(fc, m0, fc)) == pytest.approx(m0 / 2)
    assert abs(ds.brune_moment_rate(100 * fc, m0, fc)) == pytest.approx(m0 / (1 + 100 ** 2))


def test_attenuation_modulus_and_causal_dispersion():
    """The operator's modulus is exp(−π f t*), t* = T/Q; its constant-Q dispersion (Aki & Richards
    2002, §5.5) makes the pulse rise faster than it decays: more energy after the peak than before."""
    fs, n = 4000.0, 8192
    f = np.fft.rfftfreq(n, 1 / fs)
    op = ds.attenuation(f, 0.2, 100.0)
    np.testing.assert_allclose(np.abs(op), np.exp(-np.pi * f * 0.2 / 100.0), rtol=1e-12)
    h = np.fft.irfft(op * np.exp(-2j * np.pi * f * 0.5), n)
    peak = int(np.argmax(h))
    assert np.sum(h[peak + 1:] ** 2) > 1.5 * np.sum(h[:peak] ** 2)


def test_double_couple_radiation_mean_squares():
    """For a unit double couple the far-field mean squares over the focal sphere are 4/15 (P) and
    2/5 (S), and the S vector is transverse to the ray (Aki & Richards 2002, ch. 4; Boore &
    Boatwright, BSSA 74, 1984)."""
    rng = np.random.default_rng(0)
    mt = ds.random_double_couple(rng)
    rays = rng.standard_normal((200000, 3))
    rays /= np.linalg.norm(rays, axis=1, keepdims=True)
    mg = rays @ mt
    rp = np.einsum("ij,ij->i", rays, mg)
    s = mg - rp[:, None] * rays
    assert np.mean(rp ** 2) == pytest.approx(4 / 15, rel=0.01)
    assert np.mean(np.sum(s ** 2, axis=1)) == pytest.approx(2 / 5, rel=0.01)
    up, us = ds.radiation(mt, rays[0])
    assert abs(np.dot(us, rays[0])) < 1e-12 and np.allclose(np.cross(up, rays[0]), 0)


def test_guided_wave_is_an_up_chirp():
    """The reef guided wave's group velocity falls with frequency (Krey 1963 channel waves, our
    linear model), so its frequency rises with time: the spectrogram ridge increases
    (scipy.signal.ShortTimeFFT as the reference spectrogram)."""
    from scipy.signal import ShortTimeFFT
    from scipy.signal.windows import gaussian

    fs, buf = ds.SAMPLING_RATE_HZ, 8192
    f = np.fft.rfftfreq(buf, 1 / fs)
    station = np.array(ds.STATIONS["Q275A"])
    loc = tuple(station + np.array([500.0, 0.0, 0.0]))
    mt = ds.random_double_couple(np.random.default_rng(1))
    with_gw = ds.Source("event", 0.0, loc, -1.0, 1e6, mt, True)
    without = ds.Source("event", 0.0, loc, -1.0, 1e6, mt, False)
    a = ds.arrivals(with_gw, station, f, 0.05, np.random.default_rng(2))
    b = ds.arrivals(without, station, f, 0.05, np.random.default_rng(2))
    x = np.fft.irfft((a - b) * fs, n=buf, axis=1)
    x = x[np.argmax(np.sum(x ** 2, axis=1))]
    sft = ShortTimeFFT(gaussian(128, 24), hop=16, fs=fs)
    power = np.abs(sft.stft(x)) ** 2
    frames = np.flatnonzero(power.sum(axis=0) > 0.2 * power.sum(axis=0).max())
    ridge = sft.f[np.argmax(power[:, frames], axis=0)]
    assert np.corrcoef(frames, ridge)[0, 1] > 0.8
    assert ridge[-1] - ridge[0] > 200.0


def test_catalogue_within_the_stated_physics():
    """Events span Mw −2.5…0 and Δσ 0.1–10 MPa, lie 50–800 m from every station, some carry a
    guided wave, and there are two blasts; each corner frequency is Brune's for its Mw and Δσ."""
    sources = ds.make_catalogue(np.random.default_rng(ds.DEFAULT_SEED), ds.DURATION_S)  # as generate() does
    events = [s for s in sources if s.kind == "event"]
    assert all(-2.5 <= s.mw <= 0.0 and 1e5 <= s.stress_drop_pa <= 1e7 for s in events)
    coords = np.array(list(ds.STATIONS.values()))
    for s in events:
        d = np.linalg.norm(coords - np.asarray(s.location), axis=1)
        assert d.min() >= 50.0 and d.max() <= 800.0
    assert 0 < sum(s.guided for s in events) < len(events)
    blast_times = np.array(sorted(s.time_s for s in sources if s.kind == "blast"))
    assert np.sum(np.diff(blast_times) > 1.0) + 1 == 2
    s = events[0]
    assert s.corner_hz == pytest.approx(ds.corner_frequency_hz(ds.moment_from_mw(s.mw), s.stress_drop_pa, ds.VS))


def test_regeneration_is_byte_identical_to_the_committed_demo(tmp_path):
    """`burstlens demo-corpus` regenerates every committed file byte for byte (sha256, FIPS 180-4)."""
    written = ds.write_demo_corpus(str(tmp_path))
    names = sorted(os.path.basename(p) for p in written)
    committed = sorted(n for n in os.listdir(DEMO) if n != "README.md")
    assert names == committed
    for name in names:
        with open(tmp_path / name, "rb") as a, open(os.path.join(DEMO, name), "rb") as b:
            assert hashlib.sha256(a.read()).hexdigest() == hashlib.sha256(b.read()).hexdigest(), name


def test_committed_demo_reads_as_a_burst_corpus():
    """demo_corpus/ reads with the defaults into 150–300 windows of 1024 samples at 4 kHz from
    5 stations × 3 components with their SEED codes; README and catalogue are skipped; ≤ 20 MB."""
    corpus = read_corpus(DEMO)
    assert corpus.sampling_rate_hz == 4000.0
    assert corpus.window_samples == 1024
    assert 150 <= corpus.n_windows <= 300
    ids = {t["trace_id"] for t in corpus.traces}
    assert ids == {f"XX.{s}.00.{c}" for s in ds.STATIONS for c in ds.CHANNELS}
    assert all(t["windows"] > 0 for t in corpus.traces)
    assert {os.path.basename(s["file"]) for s in corpus.skipped} == {"README.md", "catalogue.json"}
    total = sum(os.path.getsize(os.path.join(DEMO, n)) for n in os.listdir(DEMO))
    assert total <= 20e6
    with open(os.path.join(DEMO, "catalogue.json")) as fh:
        assert json.load(fh)["seed"] == ds.DEFAULT_SEED
