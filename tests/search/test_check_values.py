"""docs/design.md §4 check values, computed through the project's own transform and criteria.

Grid. fs = 1 kHz, N = 1024 samples (Δt = 1 ms), Gaussian atoms of duration σ0 = 20 ms (σ0 is
the std of |x|², i.e. x = exp(−t²/4σ0²)·cos(2π f0 t)), centred at f0 = fs/4 where the even-lag
alias of the discrete WVD (period fs/2) is farthest away. The atom's Wigner–Ville distribution
is a Gaussian with std σ0 in time and 1/(4π σ0) ≈ 3.98 Hz in frequency; channels sit on a
linear grid at Δf = 0.5 Hz (8 per frequency std) over at least ±10 frequency stds, so the
Riemann sums over the grid are exact to far below 1e-6 bits.

"The WVD" through the transform: every channel gets a kernel far smaller than the atom's cell,
σ_t = 0.1 ms (σ0/200) and conditional frequency spread 0.01 Hz (1/400 of the atom's), i.e.
cell area a = 4π·1e-4·0.01 ≈ 1.3e-5. That smoothing adds (1/200)² and (1/400)² to the
relative variances, +2.2e-5 bits, and its lag window exp(−2π²(0.01 Hz)²τ²) is > 0.999 over the
lags present. The matched spectrogram is a = 1 with σ_t = σ0.

Tolerance. Every continuous-plane value is asserted to ±0.01 bit: that is 1 % of the one-bit
counting step and 0.7 % of Σp^α, while the residual smoothing and the grid above account for
< 1e-4 bit, so a failure means the transform (or the criterion) is wrong, not the test grid.
"""
import math

import numpy as np
import pytest

from burstlens.search.criteria import Criterion, continuous_entropy, negative_mass_fraction, renyi_entropy
from burstlens.search.filterbank import Channel, Filterbank
from burstlens.search.tfd import transform

FS = 1000.0                              # Hz
N = 1024                                 # samples per window
DT = 1.0 / FS                            # s, the image's time step
DF = 0.5                                 # Hz, the channel spacing
SIGMA0 = 0.02                            # s, atom duration (std of |x|²)
F0 = FS / 4                              # Hz
SIGMA_F_ATOM = 1 / (4 * math.pi * SIGMA0)  # Hz, frequency std of the atom's WVD
T_MID = N / 2 / FS                       # s, window centre

WVD_TIME_SPREAD = 1e-4                   # s
WVD_CELL_AREA = 4 * math.pi * WVD_TIME_SPREAD * 0.01  # conditional frequency spread 0.01 Hz

TOL = 0.01                               # bits (see the module docstring)
H3_WVD_ATOM = math.log2(3) / 2 - 1       # −0.2075 bits (Baraniuk et al. 2001)


def atom(t0=T_MID, f0=F0, amplitude=1.0, chirp_hz_per_s=0.0):
    """Real Gaussian atom sampled on the window: amplitude·exp(−u²/4σ0²)·cos(2π(f0 u + β u²/2)),
    u = t − t0 (instantaneous frequency f0 + β u)."""
    u = np.arange(N) / FS - t0
    return amplitude * np.exp(-u**2 / (4 * SIGMA0**2)) * np.cos(
        2 * np.pi * (f0 * u + 0.5 * chirp_hz_per_s * u**2))


def centers(lo_hz, hi_hz):
    return np.arange(lo_hz, hi_hz + DF / 2, DF)


def images(windows, center_hz, time_spread_s, cell_area, chirp_hz_per_s=0.0):
    """The project's transform of (M, N) windows with one channel per centre: (M, C, N) float64."""
    bank = Filterbank([Channel(float(f), time_spread_s, cell_area, chirp_hz_per_s)
                       for f in center_hz], FS)
    return transform(np.atleast_2d(windows), bank, dtype=np.float64)


def wvd(windows, center_hz):
    return images(windows, center_hz, WVD_TIME_SPREAD, WVD_CELL_AREA)


def matched_spectrogram(windows, center_hz, chirp_hz_per_s=0.0):
    return images(windows, center_hz, SIGMA0, 1.0, chirp_hz_per_s)


def h_cont(image, alpha=3.0):
    """Rényi entropy of one (C, N) image on the continuous t–f plane, bits."""
    return continuous_entropy(renyi_entropy(image, alpha), DT, DF)


BAND = centers(F0 - 12 * SIGMA_F_ATOM, F0 + 12 * SIGMA_F_ATOM)   # ±48 Hz, 193 channels

# (description, atom keywords, channel centres): a centred atom, one shifted in time and
# modulated to another frequency, and one chirping at 500 Hz/s; its band covers the matched
# spectrogram's sweep over ±6·√2 σ0 (±85 Hz) plus 12 of its conditional stds (±68 Hz).
ATOMS = [
    ("centred", {}, BAND),
    ("shifted+modulated", {"t0": T_MID + 0.17, "f0": 180.0},
     centers(180.0 - 12 * SIGMA_F_ATOM, 180.0 + 12 * SIGMA_F_ATOM)),
    ("chirped", {"chirp_hz_per_s": 500.0}, centers(F0 - 160.0, F0 + 160.0)),
]


@pytest.fixture(scope="module")
def atom_wvds():
    return {name: wvd(atom(**kw), band)[0] for name, kw, band in ATOMS}


def test_wvd_of_gaussian_atom_h3_and_invariances(atom_wvds):
    """H_3 of the WVD of a Gaussian atom is log2(3)/2 − 1 = −0.2075 bits on the continuous
    plane, whatever its time shift, modulation or linear chirp (Baraniuk, Flandrin, Janssen,
    Michel, "Measuring time-frequency information content using the Rényi entropies", IEEE
    Trans. Inf. Theory 47(4), 2001: H_α of a Gaussian density depends only on det Σ, which the
    covariance-preserving shifts and shears leave unchanged)."""
    values = {name: h_cont(img) for name, img in atom_wvds.items()}
    for name, h in values.items():
        assert h == pytest.approx(H3_WVD_ATOM, abs=TOL), name
    spread = max(values.values()) - min(values.values())
    assert spread < TOL / 5, values


@pytest.mark.parametrize("name, kw, band", ATOMS, ids=[a[0] for a in ATOMS])
def test_matched_spectrogram_is_one_bit_above_wvd(atom_wvds, name, kw, band):
    """The spectrogram with the matched Gaussian window (a = 1, σ_t = σ0, and for the chirped
    atom the matched chirp) has H_3 = 0.7925 bits, exactly 1 bit above the atom's WVD: smoothing
    by the window's own WVD doubles the covariance, det Σ × 4 (Baraniuk et al. 2001; spectrogram
    as smoothed WVD: Cohen, Time-Frequency Analysis, 1995). docs/design.md §3: a channel's chirp β is
    the sweep rate of the arrivals it matches, so the window matched to an atom sweeping at +β
    is the channel with chirp +β."""
    spec = matched_spectrogram(atom(**kw), band, kw.get("chirp_hz_per_s", 0.0))[0]
    h_spec = h_cont(spec)
    assert h_spec == pytest.approx(H3_WVD_ATOM + 1, abs=TOL)
    assert h_spec - h_cont(atom_wvds[name]) == pytest.approx(1.0, abs=TOL)


def test_counting_two_equal_atoms_adds_one_bit():
    """Two equal Gaussian atoms far apart — in time, or in frequency — have an H_3 one bit above
    one atom, cross terms included (Baraniuk et al. 2001, the counting property of odd orders).
    Separation 16 σ0 in time / 16·(4πσ0)⁻¹ in frequency: the cross term's share of Σp³ decays as
    exp(−D²/24σ0²) and is below 1e-4 bit there (at 5 σ0 the step is only about 0.28 bit)."""
    d = 16 * SIGMA0
    df_sep = 16 * SIGMA_F_ATOM
    one = atom()
    in_time = atom(T_MID - d / 2) + atom(T_MID + d / 2)
    in_freq = atom(f0=F0 - df_sep / 2) + atom(f0=F0 + df_sep / 2)
    band = centers(F0 - df_sep / 2 - 12 * SIGMA_F_ATOM, F0 + df_sep / 2 + 12 * SIGMA_F_ATOM)
    img = wvd(np.stack([one, in_time, in_freq]), band)
    h_one = h_cont(img[0])
    for two in img[1:]:
        # the cross term is present: it is what makes the WVD of two atoms negative
        assert negative_mass_fraction(two) > 0.1
        assert h_cont(two) - h_one == pytest.approx(1.0, abs=TOL)


def test_unequal_energies_entropy_step():
    """Atoms of energies 1 and a² far apart: ΔH_3 = −½·log2((1 + a⁶)/(1 + a²)³), 0.4717 bit at
    a = 0.5 (Baraniuk et al. 2001, H_3 of a sum of disjoint components)."""
    a = 0.5
    expected = -0.5 * math.log2((1 + a**6) / (1 + a**2) ** 3)
    assert expected == pytest.approx(0.4717, abs=5e-5)
    d = 16 * SIGMA0
    img = wvd(np.stack([atom(), atom(T_MID - d / 2) + atom(T_MID + d / 2, amplitude=a)]), BAND)
    assert h_cont(img[1]) - h_cont(img[0]) == pytest.approx(expected, abs=TOL)


def test_h2_of_any_wvd_is_zero():
    """Moyal's formula ∫∫ W_z² dt df = (∫|z|² dt)² = (∫∫ W_z dt df)² makes p = W_z/∫∫W_z have
    ∫∫ p² = 1, so H_2 = −log2 ∫∫ p² dt df = 0 bits exactly on the continuous plane, for every
    finite-energy signal, negative values and cross terms included (J. E. Moyal, "Quantum
    mechanics as a statistical theory", Proc. Cambridge Philos. Soc. 45, 1949; Baraniuk et
    al. 2001, why α = 2 cannot count). Checked on the Gaussian atom, on two atoms, and on a
    seeded random burst (band-limited noise, 200–300 Hz, under a 50 ms Gaussian envelope) whose
    WVD is a third negative. The burst's lags reach 0.4 s, where the 0.01 Hz lag window still
    passes > 0.999; channels over 170–330 Hz cover its spectrum and its WVD's frequency detail
    (> 1/0.8 s) at Δf = 0.5 Hz."""
    rng = np.random.default_rng(20261202)
    spectrum = np.fft.rfft(rng.normal(size=N))
    freqs = np.fft.rfftfreq(N, DT)
    spectrum[(freqs < 200) | (freqs > 300)] = 0
    u = np.arange(N) / FS - T_MID
    burst = np.fft.irfft(spectrum, N) * np.exp(-u**2 / (4 * 0.05**2))
    d = 16 * SIGMA0
    windows = np.stack([atom(), atom(T_MID - d / 2) + atom(T_MID + d / 2), burst])
    img = wvd(windows, centers(170.0, 330.0))
    assert negative_mass_fraction(img[2]) > 0.2
    for one in img:
        assert h_cont(one, alpha=2.0) == pytest.approx(0.0, abs=TOL)


def test_stankovic_concentration_of_atom_wvd_and_spectrogram():
    """Stanković's M_2 = (∫∫ √p)² on the continuous plane is 2 for the WVD of a Gaussian atom and
    4 for its matched spectrogram (L. Stanković, "A measure of some time–frequency distributions
    concentration", Signal Processing 81(3), 2001; for a Gaussian density M_2 = 8π√det Σ).
    Scored through Criterion("concentration") as log2 M_2: 1 and 2 bits after the grid shift.
    √p is 1.4× wider than p, so the band is ±17 frequency stds here."""
    band = centers(F0 - 17 * SIGMA_F_ATOM, F0 + 17 * SIGMA_F_ATOM)
    crit = Criterion(name="concentration", p=2.0)
    x = atom()[None]
    log_m2_wvd = continuous_entropy(crit.score(wvd(x, band))[0], DT, DF)
    log_m2_spec = continuous_entropy(crit.score(matched_spectrogram(x, band))[0], DT, DF)
    assert log_m2_wvd == pytest.approx(1.0, abs=TOL)
    assert log_m2_spec == pytest.approx(2.0, abs=TOL)


def test_criterion_scores_stack_in_window_order():
    """Criterion("renyi", α = 3) on an (M, C, N) stack from the transform gives the per-image
    renyi_entropy in window order (DEVELOPERS.md contract): one atom, then two atoms, one bit
    apart on the grid as on the plane (Baraniuk et al. 2001)."""
    d = 16 * SIGMA0
    img = wvd(np.stack([atom(T_MID - d / 2) + atom(T_MID + d / 2), atom()]), BAND)
    scores = Criterion().score(img.astype(np.float32))
    assert scores.shape == (2,)
    assert scores[0] - scores[1] == pytest.approx(1.0, abs=TOL)
    assert scores[1] == pytest.approx(renyi_entropy(img[1]), abs=1e-5)  # float32 rounding


def test_pseudo_wvd_of_atom_gives_the_same_check_values():
    """The project's full-grid discrete pseudo-WVD (search.wvd.pseudo_wvd, Δf = fs/(2·Nf)) of the
    Gaussian atom gives H_3 = −0.2075 bits, H_2 = 0 and M_2 = 2 on the continuous plane
    (Baraniuk et al. 2001; Moyal 1949; Stanković 2001), and the same H_3 as the near-WVD
    filterbank above: two independent routes through the project's code agree."""
    from burstlens.search.criteria import concentration
    from burstlens.search.wvd import analytic_signal, pseudo_wvd

    n_freqs = N
    df = FS / (2 * n_freqs)
    w = pseudo_wvd(analytic_signal(atom()), n_freqs)  # (N, Nf)
    h3 = continuous_entropy(renyi_entropy(w, 3.0), DT, df)
    assert h3 == pytest.approx(H3_WVD_ATOM, abs=TOL)
    assert continuous_entropy(renyi_entropy(w, 2.0), DT, df) == pytest.approx(0.0, abs=TOL)
    assert continuous_entropy(concentration(w), DT, df) == pytest.approx(1.0, abs=TOL)
    assert h3 == pytest.approx(h_cont(wvd(atom(), BAND)[0]), abs=TOL / 10)
