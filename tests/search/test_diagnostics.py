"""Bootstrap arithmetic, the one-step refit, the baseline line search and the convergence log."""
import math

import numpy as np
import pytest

from burstlens.search import diagnostics as dg


def test_bootstrap_indices_are_seeded_resamples_with_replacement():
    """Resamples draw n indices in [0, n) with replacement (Efron & Tibshirani, An Introduction
    to the Bootstrap, 1993, ch. 6), the same for the same seed."""
    a = dg.bootstrap_indices(50, 8, np.random.default_rng(3))
    b = dg.bootstrap_indices(50, 8, np.random.default_rng(3))
    assert a.shape == (8, 50) and a.min() >= 0 and a.max() < 50
    assert np.array_equal(a, b)
    assert any(len(set(row)) < 50 for row in a)          # with replacement: repeats occur
    assert dg.bootstrap_indices(50, 0, np.random.default_rng(3)).shape == (0, 50)


def test_interval_of_a_mean_has_the_standard_error_width():
    """For the mean of n iid N(0, 1) scores the bootstrap 90 % percentile interval has half-width
    close to 1.645/√n (Efron & Tibshirani 1993, ch. 5 and 13: the bootstrap standard error of a
    mean equals the plug-in standard error)."""
    rng = np.random.default_rng(0)
    n = 400
    scores = rng.standard_normal(n)
    idx = dg.bootstrap_indices(n, 400, np.random.default_rng(1))
    iv = dg.objective_interval(scores, idx, "mean")
    half = 0.5 * (iv["high"] - iv["low"])
    sd = scores.std(ddof=0)
    assert half == pytest.approx(1.645 * sd / math.sqrt(n), rel=0.2)
    assert iv["low"] < iv["estimate"] < iv["high"]
    assert iv["estimate"] == pytest.approx(scores.mean())


def test_interval_without_resamples_is_null():
    """bootstrap = 0 gives the estimate alone (common practice: no interval without resamples)."""
    iv = dg.objective_interval(np.arange(5.0), np.zeros((0, 5), dtype=int), "median")
    assert iv == {"estimate": 2.0, "low": None, "high": None}


@pytest.mark.parametrize("vertex", [-0.07, 0.0, 0.031])
def test_parabola_step_finds_the_vertex_of_a_parabola(vertex):
    """Three-point parabolic interpolation is exact for a quadratic (R. P. Brent, Algorithms
    for Minimization without Derivatives, 1973, ch. 5)."""
    def f(d):
        return 2.0 * (d - vertex) ** 2 + 1.0

    h = 0.1
    assert dg.parabola_step(f(-h), f(0.0), f(h), h, 1.0) == pytest.approx(vertex, abs=1e-12)


def test_parabola_step_clips_and_handles_concave_and_invalid():
    """Outside the trust region the step is clipped; a concave or flat triple returns its best
    sampled offset (common practice for safeguarded Newton steps)."""
    def f(d):
        return (d - 5.0) ** 2

    assert dg.parabola_step(f(-0.1), f(0.0), f(0.1), 0.1, 0.2) == 0.2
    assert dg.parabola_step(1.0, 2.0, 1.5, 0.1, 0.2) == -0.1     # concave: left sample lowest
    assert dg.parabola_step(math.inf, 1.0, 0.5, 0.1, 0.2) == 0.1


def test_one_step_refit_of_quadratic_scores_is_the_resample_mean():
    """If each window's score is (d − c_m)², the minimiser of the resampled mean is the resampled
    mean of c_m; the one-step refit recovers it exactly (parabolic interpolation, Brent 1973)."""
    rng = np.random.default_rng(5)
    c = 0.02 * rng.standard_normal(40)
    h = 0.1
    per = {d: (d - c) ** 2 for d in (-h, 0.0, h)}
    idx = dg.bootstrap_indices(40, 16, np.random.default_rng(6))
    steps = dg.one_step_refits(per[-h], per[0.0], per[h], h, 2 * h, idx, "mean")
    assert np.allclose(steps, [c[row].mean() for row in idx], atol=1e-12)


def test_search_1d_reaches_the_minimum():
    """Grid then bounded Brent (scipy.optimize.minimize_scalar, method="bounded") finds the
    minimum of a smooth unimodal function within its tolerance (reference library)."""
    calls = []

    def f(x):
        calls.append(x)
        return (x - 1.234) ** 2 + 0.1 * (x - 1.234) ** 4

    x, y, tried = dg.search_1d(f, -3.0, 4.0, grid=8, maxiter=12, xatol=1e-3)
    assert x == pytest.approx(1.234, abs=2e-3)
    assert y == min(t[1] for t in tried) and len(tried) == len(calls)


def test_convergence_log_best_so_far_per_stage():
    """best_so_far holds strictly improving values per stage (docs/design.md §8 best-so-far trace)."""
    log = dg.ConvergenceLog()
    for stage, y in [("family", 5.0), ("family", 6.0), ("family", 4.0), ("refine", 9.0),
                     ("family", math.inf), ("refine", 8.5)]:
        log.add(stage, 0, {}, y, 0.1)
    assert [(b["stage"], b["objective"]) for b in log.best_so_far] == [
        ("family", 5.0), ("family", 4.0), ("refine", 9.0), ("refine", 8.5)]
    assert log.evaluations[4]["objective"] is None      # non-finite values are JSON nulls
    assert log.count("family") == 4 and log.count() == 6 and log.best("refine") == 8.5


def test_wide_channels_and_rejection_counts():
    """Wide means a ratio above 1.5 for spreads, or a chirp interval above 20 % of its bound
    (the report's own thresholds); rejections are counted by reason."""
    boot = {"channels": [
        {"time_spread_s": [0.01, 0.012], "cell_area": [1, 1.2], "chirp_hz_per_s": [0, 10]},
        {"time_spread_s": [0.01, 0.02], "cell_area": [1, 1], "chirp_hz_per_s": [0, 0]},
        {"time_spread_s": [0.01, 0.011], "cell_area": [1, 1], "chirp_hz_per_s": [-300, 300]},
    ]}
    assert dg.wide_channels(boot, chirp_bound_hz_per_s=1000.0) == [1, 2]
    assert dg.rejected_by_reason([{"reason": "flat"}, {"reason": "clipped"}, {"reason": "flat"}]) \
        == {"clipped": 1, "flat": 2}


def test_paired_gain_interval_matches_scipy_paired_bootstrap():
    """The gain's paired percentile interval agrees with scipy.stats.bootstrap(paired=True,
    method="percentile") on the same per-window scores within Monte Carlo error (reference
    library; Efron & Tibshirani 1993, ch. 13), the estimate is the difference of means, and
    pairing matters: a common per-window offset leaves the interval narrow."""
    from scipy.stats import bootstrap

    rng = np.random.default_rng(8)
    common = rng.normal(12.0, 1.0, 200)              # windows differ a lot from each other
    result = common + rng.normal(-0.3, 0.1, 200)     # the result is 0.3 bit sharper on each
    gain = dg.paired_gain(result, common, np.random.default_rng(1))
    assert gain["estimate"] == pytest.approx(common.mean() - result.mean(), abs=1e-12)
    assert gain["resamples"] == 2000 and gain["level"] == 0.9
    ref = bootstrap((common, result), lambda b, r, axis: b.mean(axis) - r.mean(axis), paired=True,
                    method="percentile", confidence_level=0.9, n_resamples=20000,
                    random_state=np.random.default_rng(2), vectorized=True)
    low, high = ref.confidence_interval
    width = high - low
    assert gain["low"] == pytest.approx(low, abs=0.1 * width)
    assert gain["high"] == pytest.approx(high, abs=0.1 * width)
    assert width < 0.05                              # unpaired, the spread of windows would show
    assert dg.paired_gain([1.0, np.inf], [1.0, 2.0], np.random.default_rng(0))["estimate"] is None
