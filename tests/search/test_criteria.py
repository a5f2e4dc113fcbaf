"""Pure checks of search.criteria: closed forms, invalid candidates, reducers, validation."""
import json
import math

import numpy as np
import pytest
from scipy.stats import trim_mean

from burstlens.search import criteria
from burstlens.search.criteria import (
    Criterion,
    concentration,
    continuous_entropy,
    gini_index,
    hoyer_sparsity,
    negative_mass_fraction,
    reduce_scores,
    renyi_entropy,
)


# ---------------------------------------------------------------- sparsity measures


@pytest.mark.parametrize("n", [2, 7, 100])
def test_gini_one_hot_and_constant(n):
    """Gini index of a one-hot vector is 1 − 1/N and of a constant vector 0 (Hurley & Rickard,
    "Comparing measures of sparsity", IEEE Trans. Inf. Theory 55(10), 2009)."""
    one_hot = np.zeros(n)
    one_hot[n // 2] = 3.0
    assert gini_index(one_hot) == pytest.approx(1 - 1 / n, abs=1e-12)
    assert gini_index(np.full(n, 0.7)) == pytest.approx(0.0, abs=1e-12)


def test_gini_of_1234_and_its_invariances():
    """Gini([1, 2, 3, 4]) = 0.25; invariant to scale (the "scaling" property) and to order and
    sign, since it acts on sorted magnitudes (Hurley & Rickard 2009)."""
    assert gini_index([1, 2, 3, 4]) == pytest.approx(0.25, abs=1e-12)
    assert gini_index([40, -10, 30, 20]) == pytest.approx(0.25, abs=1e-12)
    assert gini_index(np.array([[4.0, 1.0], [2.0, 3.0]])) == pytest.approx(0.25, abs=1e-12)
    assert math.isnan(gini_index(np.zeros(5)))


@pytest.mark.parametrize("n", [2, 16, 1000])
def test_hoyer_one_hot_and_constant(n):
    """Hoyer's sparseness is 1 for a one-hot vector and 0 for a constant one (Hoyer,
    "Non-negative matrix factorization with sparseness constraints", JMLR 5, 2004)."""
    one_hot = np.zeros(n)
    one_hot[0] = -2.0
    assert hoyer_sparsity(one_hot) == pytest.approx(1.0, abs=1e-12)
    assert hoyer_sparsity(np.full(n, 5.0)) == pytest.approx(0.0, abs=1e-12)


def test_hoyer_two_level_value():
    """Hoyer's measure of [1, 1, 0, 0]: (√4 − 2/√2)/(√4 − 1) = 2 − √2, from its definition
    (Hoyer, JMLR 5, 2004)."""
    assert hoyer_sparsity([1, 1, 0, 0]) == pytest.approx(2 - math.sqrt(2), abs=1e-12)
    with pytest.raises(ValueError, match="at least 2"):
        hoyer_sparsity([1.0])


# ---------------------------------------------------------------- Rényi entropy closed form


def _gaussian_density(cov, half_width=12.0, n=481):
    """Sample a zero-mean 2-D Gaussian density on a square grid ±half_width std; returns the
    samples and the grid steps (dx, dy)."""
    sx, sy = math.sqrt(cov[0][0]), math.sqrt(cov[1][1])
    x = np.linspace(-half_width * sx, half_width * sx, n)
    y = np.linspace(-half_width * sy, half_width * sy, n)
    X, Y = np.meshgrid(x, y, indexing="ij")
    inv = np.linalg.inv(cov)
    q = inv[0, 0] * X**2 + 2 * inv[0, 1] * X * Y + inv[1, 1] * Y**2
    rho = np.exp(-q / 2) / (2 * math.pi * math.sqrt(np.linalg.det(cov)))
    return rho, x[1] - x[0], y[1] - y[0]


@pytest.mark.parametrize("alpha", [0.5, 1.0, 2.0, 3.0, 4.5])
@pytest.mark.parametrize("cov", [[[0.02**2, 0.0], [0.0, 4.0**2]],
                                 [[0.03**2, 0.6 * 0.03 * 5.0], [0.6 * 0.03 * 5.0, 5.0**2]]])
def test_renyi_of_sampled_gaussian_matches_closed_form(alpha, cov):
    """The Rényi entropy of a 2-D Gaussian density with covariance Σ is
    log2(2π√det Σ) + log2(α)/(α−1) (Shannon limit log2 e at α = 1); the grid value plus
    log2(dt·df) recovers it (Baraniuk, Flandrin, Janssen, Michel, "Measuring time-frequency
    information content using the Rényi entropies", IEEE Trans. Inf. Theory 47(4), 2001).
    Riemann sums of a Gaussian over ±12 std at 20 points per std err far below 1e-9."""
    cov = np.array(cov)
    rho, dt, df = _gaussian_density(cov)
    expected = math.log2(2 * math.pi * math.sqrt(np.linalg.det(cov)))
    expected += math.log2(math.e) if alpha == 1.0 else math.log2(alpha) / (alpha - 1)
    h = continuous_entropy(renyi_entropy(rho, alpha), dt, df)
    assert h == pytest.approx(expected, abs=1e-9)


def test_concentration_is_half_order_renyi_and_gaussian_value():
    """For a non-negative image log2 M_2 = H_{1/2} (Stanković, "A measure of some time–frequency
    distributions concentration", Signal Processing 81(3), 2001, with Baraniuk et al. 2001);
    for a 2-D Gaussian density that is log2(8π√det Σ) on the continuous plane (the α = ½ case
    of the closed form above)."""
    rng = np.random.default_rng(3)
    image = rng.random((12, 40)) ** 3
    assert concentration(image, 2.0) == pytest.approx(renyi_entropy(image, 0.5), abs=1e-12)
    cov = np.array([[0.01**2, 0.0], [0.0, 8.0**2]])
    rho, dt, df = _gaussian_density(cov)
    m2 = continuous_entropy(concentration(rho), dt, df)
    assert m2 == pytest.approx(math.log2(8 * math.pi * math.sqrt(np.linalg.det(cov))), abs=1e-9)


def test_renyi_uniform_and_one_hot():
    """H_α of a uniform image of K cells is log2 K, of a one-hot image 0, for every α
    (Baraniuk et al. 2001; Rényi entropies of discrete distributions)."""
    for alpha in (0.5, 1.0, 2.0, 3.0):
        assert renyi_entropy(np.ones((8, 32)), alpha) == pytest.approx(8.0, abs=1e-12)
        one_hot = np.zeros(50)
        one_hot[7] = 2.5
        assert renyi_entropy(one_hot, alpha) == pytest.approx(0.0, abs=1e-12)


def test_shannon_is_the_alpha_to_one_limit_signed_included():
    """H_α → −Σ p·log2|p| as α → 1, for a non-negative and for a signed image under the
    documented sign(p)|p|^α convention (l'Hôpital on the definition; Baraniuk et al. 2001)."""
    rng = np.random.default_rng(11)
    positive = rng.random(300)
    signed = positive - 0.15
    assert signed.min() < 0 and signed.sum() > 0
    for image in (positive, signed):
        h1 = renyi_entropy(image, 1.0)
        assert renyi_entropy(image, 1 + 1e-7) == pytest.approx(h1, abs=1e-5)
        assert renyi_entropy(image, 1 - 1e-7) == pytest.approx(h1, abs=1e-5)


def test_signed_images_odd_and_even_orders():
    """Integer α uses the ordinary power p^α (odd α keeps the sign of negative cells, even α
    does not); this is what lets H_3 stay meaningful for a signed Wigner–Ville image
    (Baraniuk et al. 2001)."""
    x = np.array([3.0, 1.0, -0.5, 0.25])
    p = x / x.sum()
    assert renyi_entropy(x, 3) == pytest.approx(-0.5 * math.log2(np.sum(p**3)), abs=1e-12)
    assert renyi_entropy(x, 2) == pytest.approx(-math.log2(np.sum(p**2)), abs=1e-12)
    # non-integer order: the odd extension sign(p)|p|^α
    odd = np.sum(np.sign(p) * np.abs(p) ** 2.5)
    assert renyi_entropy(x, 2.5) == pytest.approx(math.log2(odd) / (1 - 2.5), abs=1e-12)


# ---------------------------------------------------------------- invalid candidates


@pytest.mark.parametrize("image", [np.zeros((4, 5)),
                                   -np.ones((4, 5)),
                                   np.array([1.0, -1.0]),
                                   np.array([1.0, np.nan, 2.0]),
                                   np.array([1.0, np.inf])])
def test_non_positive_or_non_finite_sum_scores_inf(image):
    """An image whose sum is not positive and finite is not a distribution: every criterion
    scores +inf (docs/design.md §4 invalid-candidate rule; common practice)."""
    assert renyi_entropy(image) == math.inf
    assert concentration(image) == math.inf
    for crit in (Criterion(), Criterion(name="concentration"), Criterion(name="sparsity"),
                 Criterion(name="sparsity", measure="hoyer")):
        assert crit.score(image.reshape(1, 1, -1))[0] == math.inf


def test_negative_cube_sum_scores_inf():
    """A signed image with Σp > 0 but Σp³ ≤ 0 has no real H_3: +inf (Baraniuk et al. 2001
    define H_α only where Σp^α > 0)."""
    x = np.array([1.0, 1.0, 1.0, -2.5])  # Σ = 0.5 > 0, Σx³ = 3 − 15.625 < 0
    assert renyi_entropy(x, 3.0) == math.inf
    assert Criterion(alpha=3.0).score(x.reshape(1, 2, 2))[0] == math.inf
    assert math.isfinite(renyi_entropy(x, 2.0))


def test_overflowing_near_cancelling_image_scores_inf_not_minus_inf():
    """A signed image whose sum nearly cancels makes p huge; an overflow must mark the candidate
    invalid (+inf), never make it look infinitely sharp (common practice)."""
    x = np.array([1e200, -1e200, 1e50])  # Σ = 1e50, so p = ±1e150 and p³ overflows
    assert renyi_entropy(x, 3.0) == math.inf


# ---------------------------------------------------------------- invariances and Criterion


def test_scale_invariance_of_every_criterion():
    """Each criterion normalises the image to unit sum, so a positive scale factor changes
    nothing (Baraniuk et al. 2001; Stanković 2001; Hurley & Rickard 2009, scaling property)."""
    rng = np.random.default_rng(5)
    images = rng.random((6, 8, 30)) ** 2 - 0.05
    for crit in (Criterion(), Criterion(alpha=0.7), Criterion(name="concentration", p=3.0),
                 Criterion(name="sparsity"), Criterion(name="sparsity", measure="hoyer"),
                 Criterion(negative_mass_penalty=2.0)):
        base = crit.score(images)
        for c in (1e-30, 7.5, 1e30):
            np.testing.assert_allclose(crit.score(c * images), base, rtol=1e-12, atol=1e-12)


def test_score_matches_single_image_functions_and_shapes():
    """Criterion.score of an (M, C, N) stack equals the single-image functions row by row; a
    (C, N) image gives shape (1,); float32 input is summed in float64 (DEVELOPERS.md contract)."""
    rng = np.random.default_rng(7)
    images = (rng.random((5, 6, 20)) ** 4).astype(np.float32)
    cases = [
        (Criterion(alpha=3.0), lambda im: renyi_entropy(im, 3.0)),
        (Criterion(alpha=0.5), lambda im: renyi_entropy(im, 0.5)),
        (Criterion(name="concentration"), concentration),
        (Criterion(name="sparsity"), lambda im: -gini_index(im)),
        (Criterion(name="sparsity", measure="hoyer"), lambda im: -hoyer_sparsity(im)),
    ]
    for crit, single in cases:
        scores = crit.score(images)
        assert scores.shape == (5,) and scores.dtype == np.float64
        np.testing.assert_allclose(scores, [single(im.astype(np.float64)) for im in images],
                                   rtol=1e-12)
        assert crit.score(images[2]).shape == (1,)
        assert crit.score(images[2])[0] == pytest.approx(scores[2], rel=1e-12)
    with pytest.raises(ValueError, match=r"\(M, C, N\)"):
        Criterion().score(np.ones(10))


def test_block_processing_does_not_change_scores(monkeypatch):
    """Scores do not depend on how many windows are processed per block (memory bound;
    common practice)."""
    rng = np.random.default_rng(9)
    images = rng.random((7, 4, 16))
    whole = Criterion().score(images)
    monkeypatch.setattr(criteria, "BLOCK_ELEMENTS", 100)  # 1 window per block
    np.testing.assert_array_equal(Criterion().score(images), whole)


def test_negative_mass_fraction_and_penalty():
    """Σ|p⁻|/Σ|p| of [3, −1, 2, −2] is 3/8 and the penalty adds λ times it to the score
    (docs/design.md §4 negative_mass_penalty; common practice)."""
    x = np.array([3.0, -1.0, 2.0, -2.0])
    assert negative_mass_fraction(x) == pytest.approx(3 / 8)
    assert negative_mass_fraction(np.abs(x)) == 0.0
    img = np.array([[[3.0, -1.0], [2.0, 0.5]]])
    frac = 1.0 / 6.5
    for name in ("renyi", "concentration", "sparsity"):
        plain = Criterion(name=name).score(img)[0]
        penalised = Criterion(name=name, negative_mass_penalty=0.8).score(img)[0]
        assert penalised == pytest.approx(plain + 0.8 * frac, abs=1e-12)


# ---------------------------------------------------------------- reducers


def test_reducers_in_window_order_and_inf_propagation():
    """mean / median / 10 %-trimmed mean (scipy.stats.trim_mean) of per-window scores; any
    invalid (+inf or NaN) window makes the objective +inf (docs/design.md §4)."""
    rng = np.random.default_rng(13)
    s = rng.normal(size=41)
    assert reduce_scores(s) == pytest.approx(np.mean(s), rel=1e-15)
    assert reduce_scores(s, "median") == np.median(s)
    assert reduce_scores(s, "trimmed") == pytest.approx(trim_mean(s, 0.1), rel=1e-15)
    with_outlier = np.append(s[:19], 1e6)  # 20 values: trimming drops 2 each side
    assert reduce_scores(with_outlier, "trimmed") == pytest.approx(
        np.mean(np.sort(with_outlier)[2:-2]), rel=1e-12)
    for how in ("mean", "median", "trimmed"):
        assert reduce_scores(np.append(s, np.inf), how) == math.inf
        assert reduce_scores(np.append(s, np.nan), how) == math.inf
    with pytest.raises(ValueError, match="mean, median, trimmed"):
        reduce_scores(s, "max")
    with pytest.raises(ValueError, match="non-empty 1-D"):
        reduce_scores([], "mean")


# ---------------------------------------------------------------- validation and JSON


@pytest.mark.parametrize("kwargs, message", [
    ({"name": "entropy"}, r"criterion name must be one of renyi, concentration, sparsity; got 'entropy'"),
    ({"measure": "l1"}, r"measure must be one of gini, hoyer; got 'l1'"),
    ({"alpha": 0.0}, r"alpha must be a finite number > 0.*got 0\.0"),
    ({"alpha": -2}, r"alpha must be a finite number > 0.*got -2"),
    ({"alpha": float("nan")}, r"alpha .*got nan"),
    ({"alpha": True}, r"alpha must be a number, got True"),
    ({"alpha": "3"}, r"alpha must be a number, got '3'"),
    ({"p": 1.0}, r"p must be a finite number > 1.*got 1\.0"),
    ({"negative_mass_penalty": -0.1}, r"negative_mass_penalty must be a finite number >= 0, got -0\.1"),
])
def test_criterion_validation_names_field_and_value(kwargs, message):
    """Bad criterion settings raise ValueError naming the field, the valid choices or range, and
    the value given (project rules: clear errors; common practice)."""
    with pytest.raises(ValueError, match=message):
        Criterion(**kwargs)


def test_criterion_json_round_trip_and_errors():
    """to_json gives the six documented fields and from_json inverts it; unknown fields and
    non-objects are refused with their names (DEVELOPERS.md contract)."""
    crit = Criterion(name="sparsity", alpha=2, p=3, measure="hoyer", negative_mass_penalty=0.5,
                     excess=True)
    obj = json.loads(json.dumps(crit.to_json()))
    assert obj == {"name": "sparsity", "alpha": 2.0, "p": 3.0, "measure": "hoyer",
                   "negative_mass_penalty": 0.5, "excess": True}
    assert Criterion.from_json(obj) == crit
    assert Criterion.from_json({"alpha": 5}) == Criterion(alpha=5.0)
    with pytest.raises(ValueError, match="unknown criterion field.*beta"):
        Criterion.from_json({"name": "renyi", "beta": 1})
    with pytest.raises(ValueError, match="JSON object, got list"):
        Criterion.from_json(["renyi"])
    with pytest.raises(ValueError, match="alpha"):
        Criterion.from_json({"alpha": -1})


def test_continuous_entropy_shift_and_errors():
    """H_cont = H_grid + log2(dt·df) for floats and arrays; non-positive steps are refused
    (Baraniuk et al. 2001, grid-to-plane relation)."""
    assert continuous_entropy(3.0, 1e-3, 0.5) == pytest.approx(3.0 + math.log2(5e-4))
    np.testing.assert_allclose(continuous_entropy(np.array([1.0, 2.0]), 0.25, 2.0),
                               [0.0, 1.0])
    with pytest.raises(ValueError, match="dt_s must be a positive finite number, got 0"):
        continuous_entropy(1.0, 0, 1.0)
    with pytest.raises(ValueError, match="df_hz .*got -1"):
        continuous_entropy(1.0, 1.0, -1)


def test_burst_excess_noise_bias_is_the_same_for_every_spectrogram_window():
    """The premise of scoring the bursts' excess: for stationary Gaussian noise a spectrogram's
    values are exponentially distributed (χ² with 2 degrees of freedom) with the smoothed
    spectrum as mean, whatever the window (from memory: D. B. Percival, A. T. Walden, "Spectral
    Analysis for Physical Applications", 1993, ch. 6), so the noise's share of the excess
    (search.criteria.burst_excess), per unit area of the plane, is the same for a short and a
    long window. Checked on white noise: a Kolmogorov–Smirnov test against the exponential law
    (scipy.stats.kstest) at interior points, and the plane integrals of the excess and of its
    cube within 5 % of each other for windows 4× apart."""
    from scipy.stats import expon, kstest

    from burstlens.search.criteria import burst_excess
    from burstlens.search.spectrogram import spectrogram_images
    from burstlens.search.wvd import analytic_signal

    fs, n = 1000.0, 4096
    z = analytic_signal(np.random.default_rng(5).standard_normal((4, n)))
    integrals = []
    for sigma in (0.004, 0.016):
        images = list(spectrogram_images(z, fs, sigma, [100.0, 400.0]))
        inner = np.concatenate([im[:, im.shape[1] // 4: 3 * im.shape[1] // 4].ravel()
                                for im, _ in images])
        # thinned to points about one cell apart, so they are close to independent
        values = inner[:: max(1, inner.size // 400)]
        assert kstest(values / values.mean(), expon.cdf).pvalue > 0.01
        ex = [(burst_excess(im[:, im.shape[1] // 4: 3 * im.shape[1] // 4]), cell)
              for im, cell in images]
        mean = np.mean(inner)
        integrals.append([sum(float(np.sum(e / mean * c)) for e, c in ex),
                          sum(float(np.sum((e / mean) ** 3 * c)) for e, c in ex)])
    np.testing.assert_allclose(integrals[0], integrals[1], rtol=0.05)
