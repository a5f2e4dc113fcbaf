"""Judging a search: bootstrap intervals, reference baselines and convergence records.

Pure functions (resampling, intervals, the one-step refit of a parameter on a resample) and one
small record-keeper (:class:`ConvergenceLog`). The scoring itself happens in the stages of
:mod:`search.fit`; this module only does the arithmetic on per-window scores, so it can be
tested without a transform.

Conventions: per-window scores are criterion values (bits for Rényi; lower is sharper) in window
order, shape ``(M,)``; bootstrap resamples are rows of window indices drawn with replacement,
shape ``(B, M)`` (Efron & Tibshirani, "An Introduction to the Bootstrap", 1993).
"""
from __future__ import annotations

import math
from collections import Counter

import numpy as np

# Central share of the bootstrap distribution reported as the interval (percentile method,
# Efron & Tibshirani 1993, ch. 13). With the default 8 resamples this is close to their range.
INTERVAL_LEVEL = 0.90


def bootstrap_indices(n_windows: int, resamples: int, rng: np.random.Generator) -> np.ndarray:
    """``(resamples, n_windows)`` int array: window indices drawn with replacement, seeded."""
    if resamples <= 0 or n_windows <= 0:
        return np.zeros((0, max(n_windows, 0)), dtype=np.int64)
    return rng.integers(0, n_windows, size=(resamples, n_windows), dtype=np.int64)


def reduce_scores(scores, how: str = "mean") -> float:
    """Corpus objective from per-window scores, in window order (delegates to search.criteria)."""
    from burstlens.search.criteria import reduce_scores as _reduce
    return float(_reduce(np.asarray(scores, dtype=np.float64), how=how))


def resampled_objectives(per_window, indices: np.ndarray, how: str = "mean") -> np.ndarray:
    """``(B,)`` objective of each bootstrap resample (rows of ``indices``) of the per-window
    scores, all rows at once; a resample holding a non-finite score is +inf, as in
    :func:`reduce_scores`."""
    drawn = np.asarray(per_window, dtype=np.float64)[np.asarray(indices, dtype=np.int64)]
    finite = np.all(np.isfinite(drawn), axis=1)
    with np.errstate(invalid="ignore"):
        return np.where(finite, reduce_rows(np.where(np.isfinite(drawn), drawn, 0.0), how),
                        np.inf)


def percentile_interval(values, level: float = INTERVAL_LEVEL) -> tuple[float, float]:
    """(low, high) central ``level`` percentile interval of finite bootstrap values (nan if none)."""
    v = np.asarray(values, dtype=np.float64)
    v = v[np.isfinite(v)]
    if v.size == 0:
        return math.nan, math.nan
    tail = 50.0 * (1.0 - level)
    low, high = np.percentile(v, [tail, 100.0 - tail])
    return float(low), float(high)


def objective_interval(per_window, indices: np.ndarray, how: str = "mean",
                       level: float = INTERVAL_LEVEL) -> dict:
    """``{"estimate", "low", "high"}`` of the corpus objective: estimate on all windows, interval
    from the bootstrap resamples (``low``/``high`` are null without resamples)."""
    estimate = reduce_scores(per_window, how)
    if len(indices) == 0:
        return {"estimate": estimate, "low": None, "high": None}
    low, high = percentile_interval(resampled_objectives(per_window, indices, how), level)
    return {"estimate": estimate, "low": _json_float(low), "high": _json_float(high)}


def parabola_step(j_minus: float, j_zero: float, j_plus: float, h: float, limit: float) -> float:
    """Offset of the minimum of the parabola through (−h, j_minus), (0, j_zero), (h, j_plus).

    Clipped to [−limit, limit]; when the three values are not convex (curvature ≤ 0) the best of
    the three sampled offsets is returned, so a flat or concave direction reports its edge rather
    than a spurious vertex.
    """
    values = np.array([j_minus, j_zero, j_plus], dtype=np.float64)
    offsets = (-h, 0.0, h)
    if not np.isfinite(values).all():
        return float(offsets[int(np.nanargmin(np.where(np.isfinite(values), values, np.nan)))]) \
            if np.isfinite(values).any() else 0.0
    curvature = j_plus - 2.0 * j_zero + j_minus
    if curvature <= 0:
        return float(offsets[int(np.argmin(values))])
    step = -h * (j_plus - j_minus) / (2.0 * curvature)
    return float(np.clip(step, -limit, limit))


def one_step_refits(per_window_minus, per_window_zero, per_window_plus, h: float, limit: float,
                    indices: np.ndarray, how: str = "mean") -> np.ndarray:
    """``(B,)`` parameter offsets: the one-step refit of one channel parameter on each resample.

    Approximates refitting that parameter on a bootstrap resample while holding the other
    channels at their fitted values: the objective along the parameter is sampled on every window
    at offsets −h, 0, +h, each resample reduces those per-window scores with its own indices, and
    the vertex of the parabola through the three resampled objectives is its refit (one Newton
    step, clipped to ±``limit``). The spread of the offsets is the bootstrap spread of the
    parameter under that approximation (it ignores the coupling between channels).
    """
    out = np.empty(len(indices), dtype=np.float64)
    m, z, p = (np.asarray(a, dtype=np.float64) for a in (per_window_minus, per_window_zero, per_window_plus))
    for b, row in enumerate(indices):
        out[b] = parabola_step(reduce_scores(m[row], how), reduce_scores(z[row], how),
                               reduce_scores(p[row], how), h, limit)
    return out


def search_1d(objective, lo: float, hi: float, grid: int = 8, maxiter: int = 8,
              xatol: float = 0.01) -> tuple[float, float, list[tuple[float, float]]]:
    """Minimise a 1-D objective on [lo, hi]: a uniform grid, then bounded Brent between the
    neighbours of the best grid point (scipy.optimize.minimize_scalar, method="bounded").

    Returns ``(x_best, f_best, tried)`` with ``tried`` every (x, f) evaluated, in order. Used for
    the baselines (one parameter each: the window of a spectrogram, the Q of a scalogram).
    """
    from scipy.optimize import minimize_scalar

    tried: list[tuple[float, float]] = []

    def f(x):
        y = float(objective(float(x)))
        tried.append((float(x), y))
        return y if np.isfinite(y) else 1e300

    xs = np.linspace(lo, hi, grid)
    ys = [f(x) for x in xs]
    i = int(np.argmin(ys))
    a, b = xs[max(i - 1, 0)], xs[min(i + 1, grid - 1)]
    if maxiter > 0 and b > a:
        minimize_scalar(f, bounds=(a, b), method="bounded", options={"xatol": xatol, "maxiter": maxiter})
    x_best, f_best = min(tried, key=lambda t: (t[1] if np.isfinite(t[1]) else math.inf, t[0]))
    return x_best, f_best, tried


def rejected_by_reason(rejections) -> dict:
    """``{reason: count}`` of the corpus rejections, sorted by reason."""
    counts = Counter(str(r.get("reason", "unknown")) for r in rejections)
    return dict(sorted(counts.items()))


def wide_channels(bootstrap: dict, ratio: float = 1.5, chirp_share: float = 0.2,
                  chirp_bound_hz_per_s: float = 0.0) -> list[int]:
    """Indices of channels whose bootstrap interval is wide.

    Wide means: time spread or cell area high/low above ``ratio``, or a chirp interval wider than
    ``chirp_share`` of the chirp bound. ``bootstrap`` is ``diagnostics_['bootstrap']``.
    """
    out = []
    for i, ch in enumerate(bootstrap.get("channels") or []):
        wide = False
        for key in ("time_spread_s", "cell_area"):
            low, high = ch.get(key) or (None, None)
            if low and high and low > 0 and high / low > ratio:
                wide = True
        low, high = ch.get("chirp_hz_per_s") or (None, None)
        if chirp_bound_hz_per_s > 0 and low is not None and high is not None \
                and (high - low) > chirp_share * chirp_bound_hz_per_s:
            wide = True
        if wide:
            out.append(i)
    return out


def _json_float(x):
    """float for JSON: finite values as they are, nan/inf as None."""
    x = float(x)
    return x if math.isfinite(x) else None


class ConvergenceLog:
    """Every evaluation of a search and the best-so-far trace, per stage (docs/design.md §8).

    ``evaluations`` rows: ``{"stage", "round", "params", "objective", "seconds"}``; ``best_so_far``
    rows: ``{"evaluation", "stage", "objective"}`` appended whenever a stage's best improves
    (objectives of different stages are on different window sets and are not comparable).
    Plain lists of dicts, so the log pickles with a checkpoint and dumps to JSON as it is.
    """

    def __init__(self):
        self.evaluations: list[dict] = []
        self.best_so_far: list[dict] = []
        self._best: dict[str, float] = {}

    def add(self, stage: str, round_: int, params: dict, objective: float, seconds: float) -> None:
        self.evaluations.append({"stage": stage, "round": int(round_), "params": params,
                                 "objective": _json_float(objective), "seconds": float(seconds)})
        if np.isfinite(objective) and objective < self._best.get(stage, math.inf):
            self._best[stage] = float(objective)
            self.best_so_far.append({"evaluation": len(self.evaluations) - 1, "stage": stage,
                                     "objective": float(objective)})

    def best(self, stage: str) -> float:
        return self._best.get(stage, math.inf)

    def count(self, stage: str | None = None) -> int:
        if stage is None:
            return len(self.evaluations)
        return sum(1 for e in self.evaluations if e["stage"] == stage)


# Resamples of the paired gain interval: cheap (no refits), enough for stable 5 % / 95 % tails
# (Efron & Tibshirani 1993, ch. 19, recommend ≥ 1000 for percentile intervals).
GAIN_RESAMPLES = 2000


def reduce_rows(scores: np.ndarray, how: str) -> np.ndarray:
    """The corpus reducer applied to each row of ``scores`` (B, M) at once, (B,)."""
    from scipy.stats import trim_mean

    from burstlens.search.criteria import TRIM_FRACTION

    if how == "mean":
        return scores.mean(axis=1)
    if how == "median":
        return np.median(scores, axis=1)
    return trim_mean(scores, TRIM_FRACTION, axis=1)


def paired_gain(result, baseline, rng: np.random.Generator, how: str = "mean",
                resamples: int = GAIN_RESAMPLES, level: float = INTERVAL_LEVEL) -> dict:
    """Gain in bits of ``result`` over ``baseline`` (reduced baseline − reduced result; > 0 means
    the result is sharper) with a paired percentile bootstrap interval.

    ``result``, ``baseline``: per-window scores (M,) on the same windows in the same order. Each
    resample draws M window indices with replacement and reduces both score columns over the
    same draw, so the interval reflects the per-window differences, not the spread of windows
    (paired bootstrap: Efron & Tibshirani, "An Introduction to the Bootstrap", 1993, ch. 13).
    Returns ``{"estimate", "low", "high", "level", "resamples"}``; values are None where a score
    is not finite.
    """
    r = np.asarray(result, dtype=np.float64)
    b = np.asarray(baseline, dtype=np.float64)
    if r.shape != b.shape or r.ndim != 1 or r.size == 0:
        raise ValueError(f"result and baseline must be equal-length 1-D score arrays, got "
                         f"{r.shape} and {b.shape}")
    out = {"estimate": None, "low": None, "high": None, "level": level, "resamples": int(resamples)}
    if not (np.all(np.isfinite(r)) and np.all(np.isfinite(b))):
        return out
    out["estimate"] = reduce_scores(b, how) - reduce_scores(r, how)
    if resamples > 0:
        draws = bootstrap_indices(r.size, int(resamples), rng)
        gains = reduce_rows(b[draws], how) - reduce_rows(r[draws], how)
        low, high = percentile_interval(gains, level)
        out["low"], out["high"] = _json_float(low), _json_float(high)
    return out


def interval_on(per_window, rng: np.random.Generator, how: str = "mean",
                resamples: int = GAIN_RESAMPLES, level: float = INTERVAL_LEVEL) -> dict:
    """``{"objective", "low", "high"}``: the reduced scores with a percentile bootstrap interval
    (None where a score is not finite)."""
    s = np.asarray(per_window, dtype=np.float64)
    if s.size == 0 or not np.all(np.isfinite(s)):
        return {"objective": None, "low": None, "high": None}
    iv = objective_interval(s, bootstrap_indices(s.size, int(resamples), rng), how, level)
    return {"objective": iv["estimate"], "low": iv["low"], "high": iv["high"]}
