"""Sharpness criteria for time–frequency images (lower is sharper) and corpus reducers.

Every criterion first normalises an image to unit sum, ``p = image / Σ image`` (the signed sum:
for a Wigner–Ville-type distribution it is the signal energy). An image whose sum is not positive
and finite is not a distribution and scores ``+inf`` (an invalid candidate), as does any image
whose score comes out non-finite. (The sparsity measures themselves act on magnitudes and are
scale invariant; :class:`Criterion` applies the same validity rule to them.)

Units: an image is a density on the time–frequency plane. Cell (c, n) of a filterbank image has
its own area ``ΔA_c = Δt·Δf_c`` (``cell_size``, s·Hz; :func:`cell_sizes` gives it for a channel
grid, whose log spacing makes cells unequal). With ``p = S·ΔA / Σ S·ΔA`` the Rényi entropy is
``H_α = 1/(1−α)·log2 Σ p^α ΔA^{1−α}``: bits on the continuous plane, comparable across grids as
long as the grid samples the image (spacing ≤ the narrowest kernel's frequency spread). Without
``cell_size`` every cell counts 1 (bits *on the grid*); for equal cells ``dt_s`` × ``df_hz`` the
two differ by ``log2(dt_s · df_hz)`` (:func:`continuous_entropy`).

Positivity: smoothing below the Heisenberg cell lets Wigner–Ville interference through as
negative values, and signed scores then reward it (measured: two separated atoms scored below
one). :func:`negative_share` is the share of the absolute mass that is negative; the search
treats a share above its ceiling as an invalid candidate whatever the criterion.

Shapes: the single-image functions take any shape (an image is flattened); :class:`Criterion`
scores a stack ``(M, C, N)`` (M windows, C channels, N samples) in one vectorised pass.

References
- Rényi entropy of a t–f distribution: R. G. Baraniuk, P. Flandrin, A. J. E. M. Janssen,
  O. J. J. Michel, "Measuring time-frequency information content using the Rényi entropies",
  IEEE Trans. Inf. Theory 47(4), 2001.
- Concentration measure: L. Stanković, "A measure of some time–frequency distributions
  concentration", Signal Processing 81(3), 2001.
- Gini index: N. Hurley, S. Rickard, "Comparing measures of sparsity", IEEE Trans. Inf. Theory
  55(10), 2009.
- Hoyer's measure: P. O. Hoyer, "Non-negative matrix factorization with sparseness constraints",
  J. Mach. Learn. Res. 5, 2004.
"""
from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import numpy as np
from scipy.stats import trim_mean

CRITERIA = ("renyi", "concentration", "sparsity")
SPARSITY_MEASURES = ("gini", "hoyer")
REDUCERS = ("mean", "median", "trimmed")
TRIM_FRACTION = 0.1  # cut from each side by reduce_scores(how="trimmed")

# Rows scored per block: the float64 working copy stays near 2 MB (cache-sized, and bounded
# whatever M is); larger blocks measured 2–4× slower on the 2-core dev machine.
_BLOCK_ELEMENTS = 1 << 18


# --------------------------------------------------------------------------------------------
# Cell sizes


def channel_widths_hz(centers_hz) -> np.ndarray:
    """Frequency extent Δf_c (Hz) of each channel's cell, shape (C,), in the order given.

    The cell of a centre reaches halfway to each neighbour (midpoint rule on an unequal grid);
    an edge channel takes the full gap to its one neighbour. A single channel has no spacing
    and gets 1 Hz (its scores are then per hertz). Centres must be distinct.
    """
    f = np.asarray(centers_hz, dtype=np.float64).ravel()
    if f.size == 0 or not np.all(np.isfinite(f)):
        raise ValueError(f"centers_hz must be a non-empty array of finite values, got {centers_hz!r}")
    if f.size == 1:
        return np.ones(1)
    order = np.argsort(f, kind="stable")
    g = f[order]
    gaps = np.diff(g)
    if np.any(gaps <= 0):
        raise ValueError("centers_hz must be distinct to define channel cells")
    widths = np.empty_like(g)
    widths[0], widths[-1] = gaps[0], gaps[-1]
    widths[1:-1] = 0.5 * (gaps[:-1] + gaps[1:])
    out = np.empty_like(widths)
    out[order] = widths
    return out


def cell_sizes(centers_hz, sampling_rate_hz: float) -> np.ndarray:
    """Area ΔA_c = Δf_c / fs (s·Hz) of the cells of each channel row, shape (C, 1).

    Broadcasts against a (C, N) image, so ``Criterion().score(images, cell_size=...)`` scores
    the image as a density on the plane (:func:`channel_widths_hz` for Δf_c; Δt = 1/fs).
    """
    fs = float(sampling_rate_hz)
    if not (math.isfinite(fs) and fs > 0):
        raise ValueError(f"sampling_rate_hz must be a positive finite number, got {sampling_rate_hz!r}")
    return (channel_widths_hz(centers_hz) / fs)[:, None]


# --------------------------------------------------------------------------------------------
# Row-wise kernels: x is (M, K) float64, one image per row; w is None (every cell counts 1) or
# (K,) cell sizes; each returns (M,) float64.


def _weighted_sum(values: np.ndarray, w) -> np.ndarray:
    # product then numpy's pairwise sum, not BLAS or einsum: the same bits whatever the thread
    # count or the arrays' alignment in memory (a fit must not depend on where it ran)
    return values.sum(axis=1) if w is None else (values * w).sum(axis=1)


def _unit_sum_rows(x: np.ndarray, w=None) -> tuple[np.ndarray, np.ndarray]:
    """T = Σ x·w per row and the mask of rows whose mass is positive and finite."""
    total = _weighted_sum(x, w)
    valid = np.isfinite(total) & (total > 0)
    return np.where(valid, total, 1.0), valid


def _signed_power(p: np.ndarray, alpha: float) -> np.ndarray:
    """p**α for integer α (so odd α keeps the sign), sign(p)·|p|**α otherwise."""
    if alpha == 2.0:
        return p * p
    if alpha == 3.0:  # the default: two multiplies instead of a pow per element
        return p * p * p
    if float(alpha).is_integer():
        return p ** alpha
    return np.sign(p) * np.abs(p) ** alpha


def _renyi_rows(x: np.ndarray, alpha: float, w=None) -> np.ndarray:
    # With p = x·w/T: Σ p^α w^{1−α} = Σ w·x^α / T^α, so the image is never rescaled in place.
    total, valid = _unit_sum_rows(x, w)
    if alpha == 1.0:
        # Shannon limit as α → 1 under the same convention: −Σ p·log2|p/w| = −Σ w·x·log2|x|/T
        # + log2 T (0·log 0 = 0).
        a = np.abs(x)
        logs = np.log2(a, out=np.zeros_like(a), where=a > 0)
        h = -_weighted_sum(x * logs, w) / total + np.log2(total)
    else:
        ratio = _weighted_sum(_signed_power(x, alpha), w) / _signed_power(total, alpha)
        positive = ratio > 0
        valid &= positive
        h = np.log2(np.where(positive, ratio, 1.0)) / (1.0 - alpha)
    return _invalid_to_inf(h, valid)


def _concentration_rows(x: np.ndarray, p_exp: float, w=None) -> np.ndarray:
    # M_p = (Σ w·|x/T|^{1/p})^p, the plane's ∫|ρ|^{1/p} for the density ρ = x/T.
    total, valid = _unit_sum_rows(x, w)
    root = np.abs(x) ** (1.0 / p_exp) if p_exp != 2.0 else np.sqrt(np.abs(x))
    s = _weighted_sum(root, w)
    positive = s > 0
    h = p_exp * np.log2(np.where(positive, s, 1.0)) - np.log2(total)
    return _invalid_to_inf(h, valid & positive)


def _gini_rows(x: np.ndarray) -> np.ndarray:
    a = np.sort(np.abs(x), axis=1)
    k = a.shape[1]
    # Hurley & Rickard (2009), eq. for sorted c_(1) ≤ … ≤ c_(K): G = 1 − 2 Σ c_(i)/‖c‖₁·(K−i+½)/K
    weights = (k - np.arange(1, k + 1) + 0.5) / k
    l1 = a.sum(axis=1)
    valid = np.isfinite(l1) & (l1 > 0)
    return np.where(valid, 1.0 - 2.0 * (a @ weights) / np.where(valid, l1, 1.0), np.nan)


def _hoyer_rows(x: np.ndarray, w=None) -> np.ndarray:
    # Cell sizes enter relative to their mean, so equal cells give Hoyer's measure unchanged.
    k = x.shape[1]
    if k < 2:
        raise ValueError(f"Hoyer's measure needs at least 2 values per image, got {k}")
    rel = None if w is None else w / np.mean(w)
    a = np.abs(x)
    l1 = _weighted_sum(a, rel)
    l2 = np.sqrt(_weighted_sum(a * a, rel))
    valid = np.isfinite(l1) & np.isfinite(l2) & (l2 > 0)
    root_k = math.sqrt(k)
    return np.where(valid, (root_k - l1 / np.where(valid, l2, 1.0)) / (root_k - 1.0), np.nan)


def _negative_mass_rows(x: np.ndarray, w=None) -> np.ndarray:
    l1 = _weighted_sum(np.abs(x), w)
    negative = _weighted_sum(np.maximum(-x, 0.0), w)
    valid = np.isfinite(l1) & (l1 > 0)
    return np.where(valid, negative / np.where(valid, l1, 1.0), np.nan)


def _quiet():
    # Invalid images (inf, NaN, overflow) are expected inputs here and are scored +inf/NaN.
    return np.errstate(over="ignore", invalid="ignore", divide="ignore")


def _invalid_to_inf(values: np.ndarray, valid: np.ndarray) -> np.ndarray:
    out = np.where(valid, values, np.inf)
    out[~np.isfinite(out)] = np.inf
    return out


def _as_rows(image, what: str = "image") -> np.ndarray:
    x = np.asarray(image, dtype=np.float64)
    if x.size == 0:
        raise ValueError(f"{what} is empty (shape {x.shape})")
    return x.reshape(1, -1)


def _cell_weights(cell_size, shape: tuple):
    """Cell sizes broadcast to an image of ``shape`` and flattened, (K,); None stays None."""
    if cell_size is None:
        return None
    w = np.asarray(cell_size, dtype=np.float64)
    try:
        w = np.broadcast_to(w, shape)
    except ValueError:
        raise ValueError(f"cell_size of shape {np.shape(cell_size)} does not broadcast to the "
                         f"image shape {shape}") from None
    if not (np.all(np.isfinite(w)) and np.all(w > 0)):
        raise ValueError("cell_size must hold positive finite cell areas (s·Hz)")
    return np.ascontiguousarray(w).reshape(-1)


# --------------------------------------------------------------------------------------------
# Single-image functions (any shape; the image is flattened).


def renyi_entropy(image, alpha: float = 3.0, cell_size=None) -> float:
    """Rényi entropy of order α of a t–f image, in bits (on the plane with ``cell_size``).

    ``p = image / Σ image`` and ``H_α = 1/(1−α) · log2 Σ p^α`` (Baraniuk, Flandrin, Janssen,
    Michel, IEEE Trans. Inf. Theory 47(4), 2001). Signed images are allowed: for integer α,
    ``p^α`` is the ordinary power (odd α keeps the sign of negative cells, which is what lets
    α = 3 count components of a Wigner–Ville distribution); for non-integer α it is the odd
    extension ``sign(p)·|p|^α``, which equals ``p^α`` on non-negative images and is continuous in
    α through the odd integers (on a signed image it jumps at even α, where the ordinary power
    |p|^α is the one Moyal's formula fixes: H_2 of any WVD is 0 on the continuous plane).
    α = 1 is the Shannon limit ``−Σ p·log2|p|`` of that convention.

    Parameters
    ----------
    image : array_like, any shape, real
        The distribution on its sampling grid.
    alpha : float, > 0
        The order.
    cell_size : array_like broadcasting to the image, s·Hz, optional
        Area of each cell (e.g. :func:`cell_sizes` for a (C, N) filterbank image). Then
        ``p = S·ΔA / Σ S·ΔA`` and ``H_α = 1/(1−α)·log2 Σ p^α ΔA^{1−α}``: bits on the continuous
        plane, the same for any grid that samples the image.

    Returns
    -------
    float
        Bits on the grid (or on the plane with ``cell_size``); ``+inf`` if ``Σ image ≤ 0``,
        ``Σ p^α ≤ 0`` or the result is not finite. For equal cells the two differ by
        ``log2(dt_s·df_hz)`` (:func:`continuous_entropy`).
    """
    alpha = _check_alpha(alpha)
    x = _as_rows(image)
    w = _cell_weights(cell_size, np.shape(image))
    with _quiet():
        return float(_renyi_rows(x, alpha, w)[0])


def continuous_entropy(h_grid, dt_s: float, df_hz: float):
    """Grid entropy (bits) → the value on the continuous t–f plane: ``h_grid + log2(dt_s·df_hz)``.

    A density ρ sampled as cells ``p_i = ρ(t_i, f_i)·dt·df`` has ``H_α(p) = H_α(ρ) − log2(dt·df)``
    for every α (Baraniuk et al. 2001), so this undoes the grid's cell size. ``h_grid`` is a float
    or an array (returned with the same shape); ``dt_s`` in seconds, ``df_hz`` in hertz. The same
    shift turns ``log2 M_p`` of :func:`concentration` into its continuous value.
    """
    for name, value in (("dt_s", dt_s), ("df_hz", df_hz)):
        if isinstance(value, bool) or not (
                isinstance(value, (int, float, np.floating, np.integer)) and np.isfinite(value)
                and value > 0):
            raise ValueError(f"{name} must be a positive finite number, got {value!r}")
    shift = math.log2(float(dt_s) * float(df_hz))
    if np.ndim(h_grid) == 0:
        return float(h_grid) + shift
    return np.asarray(h_grid, dtype=np.float64) + shift


def concentration(image, p: float = 2.0, cell_size=None) -> float:
    """Stanković's concentration ``log2 M_p``, ``M_p = (Σ |p_i|^{1/p})^p``, in bits on the grid.

    ``p_i = image / Σ image`` (L. Stanković, Signal Processing 81(3), 2001); lower is sharper.
    For a non-negative image ``log2 M_2 = H_{1/2}`` (the Rényi entropy of order ½). ``+inf`` if
    ``Σ image ≤ 0``. With ``cell_size`` (s·Hz, as in :func:`renyi_entropy`) the cells are
    weighted by their area, ``M_p = (Σ ΔA·|p/ΔA|^{1/p})^p``: the value on the plane.
    """
    p = _check_p(p)
    x = _as_rows(image)
    w = _cell_weights(cell_size, np.shape(image))
    with _quiet():
        return float(_concentration_rows(x, p, w)[0])


def gini_index(values) -> float:
    """Gini index of ``|values|`` (flattened), in [0, 1 − 1/K]; higher is sparser.

    With the magnitudes sorted ascending, ``G = 1 − 2 Σ_i c_(i)/‖c‖₁ · (K − i + ½)/K``
    (Hurley & Rickard, IEEE Trans. Inf. Theory 55(10), 2009): one-hot → 1 − 1/K, constant → 0.
    Scale invariant. NaN (undefined) for an all-zero or non-finite input.
    """
    with _quiet():
        return float(_gini_rows(_as_rows(values, "values"))[0])


def hoyer_sparsity(values) -> float:
    """Hoyer's sparseness of ``|values|`` (flattened), in [0, 1]; higher is sparser.

    ``(√K − ‖c‖₁/‖c‖₂) / (√K − 1)`` (Hoyer, JMLR 5, 2004): one-hot → 1, constant → 0. Needs
    K ≥ 2 values. NaN (undefined) for an all-zero or non-finite input.
    """
    with _quiet():
        return float(_hoyer_rows(_as_rows(values, "values"))[0])


def negative_mass_fraction(image, cell_size=None) -> float:
    """Share of the absolute mass that is negative, ``Σ|p⁻| / Σ|p|`` ∈ [0, 1] (NaN if all zero).

    Zero for any spectrogram-like (a ≥ 1) image; grows as smoothing drops below the Heisenberg
    cell and Wigner–Ville interference shows through (common practice). ``cell_size`` (s·Hz)
    weights each cell by its area, as in :func:`renyi_entropy`.
    """
    x = _as_rows(image)
    w = _cell_weights(cell_size, np.shape(image))
    with _quiet():
        return float(_negative_mass_rows(x, w)[0])


def negative_share(images, cell_size=None) -> np.ndarray:
    """Per-window negative share ``Σ ΔA·S⁻ / Σ ΔA·|S|`` of a stack, shape (M,) (NaN if all zero).

    ``images`` (M, C, N) or (C, N); ``cell_size`` (s·Hz) broadcasting to (C, N), or None. The
    positivity ceiling of a search (``max_negative_share``) bounds the mean of these values.
    """
    x = np.asarray(images)
    if x.ndim == 2:
        x = x[None]
    if x.ndim != 3 or x.size == 0:
        raise ValueError(f"images must have shape (M, C, N) or (C, N), got {np.shape(images)}")
    w = _cell_weights(cell_size, x.shape[1:])
    flat = x.reshape(x.shape[0], -1)
    rows = max(1, _BLOCK_ELEMENTS // flat.shape[1])
    out = np.empty(x.shape[0], dtype=np.float64)
    for start in range(0, x.shape[0], rows):
        with _quiet():
            out[start:start + rows] = _negative_mass_rows(
                flat[start:start + rows].astype(np.float64, copy=False), w)
    return out


# --------------------------------------------------------------------------------------------
# The criterion a search minimises.


def _check_alpha(alpha) -> float:
    if isinstance(alpha, bool) or not isinstance(alpha, (int, float, np.integer, np.floating)):
        raise ValueError(f"alpha must be a number, got {alpha!r}")
    alpha = float(alpha)
    if not (np.isfinite(alpha) and alpha > 0):
        raise ValueError(f"alpha must be a finite number > 0 (1 is the Shannon limit), got {alpha!r}")
    return alpha


def _check_p(p) -> float:
    if isinstance(p, bool) or not isinstance(p, (int, float, np.integer, np.floating)):
        raise ValueError(f"p must be a number, got {p!r}")
    p = float(p)
    if not (np.isfinite(p) and p > 1):
        # p = 1 gives M_1 = Σ|p_i| = 1 for every non-negative image: no information.
        raise ValueError(f"p must be a finite number > 1 (Stanković's M_p), got {p!r}")
    return p


@dataclass(frozen=True)
class Criterion:
    """What a search minimises per window: lower is sharper, ``+inf`` marks an invalid candidate.

    Parameters
    ----------
    name : {"renyi", "concentration", "sparsity"}
        ``renyi``: :func:`renyi_entropy` of order ``alpha`` (bits on the grid).
        ``concentration``: :func:`concentration` ``log2 M_p`` with exponent ``p``.
        ``sparsity``: the negative of :func:`gini_index` or :func:`hoyer_sparsity` (``measure``)
        of ``|p|``, so that minimising it maximises sparsity.
    alpha : float > 0
        Rényi order (3 counts components; 2 cannot, by Moyal's formula).
    p : float > 1
        Stanković exponent.
    measure : {"gini", "hoyer"}
        Sparsity measure.
    negative_mass_penalty : float ≥ 0
        λ; adds ``λ · Σ|p⁻|/Σ|p|`` (:func:`negative_mass_fraction`) to every score.

    :meth:`score` takes ``cell_size`` (s·Hz per cell, e.g. :func:`cell_sizes`): Rényi and
    concentration values are then on the continuous plane, comparable across grids; Hoyer's
    measure weights cells relative to their mean size; the Gini index counts cells as they are
    (a sorted-magnitude measure has no area form here), so it is comparable only on one grid.
    """

    name: str = "renyi"
    alpha: float = 3.0
    p: float = 2.0
    measure: str = "gini"
    negative_mass_penalty: float = 0.0

    def __post_init__(self):
        self.validate()

    def validate(self) -> "Criterion":
        """Raise ``ValueError`` naming the field and the value if any field is out of range."""
        if self.name not in CRITERIA:
            raise ValueError(f"criterion name must be one of {', '.join(CRITERIA)}; got {self.name!r}")
        if self.measure not in SPARSITY_MEASURES:
            raise ValueError(
                f"measure must be one of {', '.join(SPARSITY_MEASURES)}; got {self.measure!r}")
        _check_alpha(self.alpha)
        _check_p(self.p)
        lam = self.negative_mass_penalty
        if isinstance(lam, bool) or not isinstance(lam, (int, float, np.integer, np.floating)) \
                or not (np.isfinite(lam) and lam >= 0):
            raise ValueError(f"negative_mass_penalty must be a finite number >= 0, got {lam!r}")
        return self

    def score(self, images, cell_size=None) -> np.ndarray:
        """Score a stack of images.

        Parameters
        ----------
        images : array_like, shape (M, C, N), or (C, N) for a single image (then M = 1)
            Transform output (any real dtype; summed in float64).
        cell_size : array_like broadcasting to (C, N), s·Hz, optional
            Cell areas (:func:`cell_sizes`); None counts every cell as 1 (bits on the grid).

        Returns
        -------
        ndarray, shape (M,), float64
            One score per window in input order; ``+inf`` where the image is invalid.
        """
        x = np.asarray(images)
        if x.ndim == 2:
            x = x[None]
        if x.ndim != 3 or x.size == 0:
            raise ValueError(f"images must have shape (M, C, N) or (C, N), got {np.shape(images)}")
        m = x.shape[0]
        w = _cell_weights(cell_size, x.shape[1:])
        flat = x.reshape(m, -1)
        rows = max(1, _BLOCK_ELEMENTS // flat.shape[1])
        out = np.empty(m, dtype=np.float64)
        for start in range(0, m, rows):  # blocks of windows, not one window at a time
            block = flat[start:start + rows].astype(np.float64, copy=False)
            with _quiet():
                out[start:start + rows] = self._score_rows(block, w)
        return out

    def _score_rows(self, x: np.ndarray, w=None) -> np.ndarray:
        if self.name == "renyi":
            s = _renyi_rows(x, float(self.alpha), w)
        elif self.name == "concentration":
            s = _concentration_rows(x, float(self.p), w)
        else:
            total = x.sum(axis=1)
            sparse = _gini_rows(x) if self.measure == "gini" else _hoyer_rows(x, w)
            s = _invalid_to_inf(-sparse, np.isfinite(total) & (total > 0))
        if self.negative_mass_penalty:
            s = s + float(self.negative_mass_penalty) * _negative_mass_rows(x, w)
            s[~np.isfinite(s)] = np.inf
        return s

    def to_json(self) -> dict:
        """``{"name", "alpha", "p", "measure", "negative_mass_penalty"}`` (JSON-ready)."""
        d = asdict(self)
        for key in ("alpha", "p", "negative_mass_penalty"):
            d[key] = float(d[key])
        return d

    @classmethod
    def from_json(cls, obj) -> "Criterion":
        """Inverse of :meth:`to_json`; missing keys take the defaults, unknown keys are an error."""
        if not isinstance(obj, dict):
            raise ValueError(f"criterion must be a JSON object, got {type(obj).__name__}")
        unknown = sorted(set(obj) - {"name", "alpha", "p", "measure", "negative_mass_penalty"})
        if unknown:
            raise ValueError(f"unknown criterion field(s): {', '.join(unknown)}")
        return cls(**obj)


def reduce_scores(scores, how: str = "mean") -> float:
    """Reduce per-window scores (in window order) to the corpus objective.

    ``how``: ``mean``, ``median`` or ``trimmed`` (mean after cutting 10 % from each side,
    ``scipy.stats.trim_mean``). Any non-finite score (an invalid window) makes the objective
    ``+inf``. The caller passes the scores in window order, assembled from however the work was
    spread, so the reduction — and its floating-point rounding — is the same every time.
    """
    if how not in REDUCERS:
        raise ValueError(f"how must be one of {', '.join(REDUCERS)}; got {how!r}")
    s = np.asarray(scores, dtype=np.float64)
    if s.ndim != 1 or s.size == 0:
        raise ValueError(f"scores must be a non-empty 1-D array, got shape {s.shape}")
    if not np.all(np.isfinite(s)):
        return math.inf
    if how == "mean":
        return float(np.mean(s))
    if how == "median":
        return float(np.median(s))
    return float(trim_mean(s, TRIM_FRACTION))
