"""Sharpness criteria for time–frequency images (lower is sharper) and corpus reducers.

Every criterion first normalises an image to unit sum, ``p = image / Σ image`` (the signed sum:
for a Wigner–Ville-type distribution it is the signal energy; with cell sizes, Σ image·ΔA). An
image whose sum is not positive and finite is not a distribution and scores ``+inf`` (an invalid
candidate), as does any image whose score comes out non-finite. (The sparsity measures
themselves act on magnitudes and are scale invariant; :class:`Criterion` applies the same
validity rule to them.)

One definition per criterion: a score depends on an image only through four sums over its
cells (:meth:`Criterion.row_stats`: the criterion's own term, the mass, the absolute mass, the
negative mass), reduced to the score by :meth:`Criterion.scores_from_totals`. Sums add, so an
image cut into rows — the search keeps one per (window, channel) and replaces one row per trial
— is scored from its rows' totals, to round-off as :meth:`Criterion.score` scores it whole. The
negative share (:func:`shares_from_totals`) and the positivity ceiling
(:func:`ceiling_objective`) come from the same sums. The Gini index needs the sorted image and
is scored on whole images only.

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

from burstlens.search.criteria_options import CRITERIA, REDUCERS, SPARSITY_MEASURES

# the criteria that score one image (the search's "detection" scores a corpus: search.fit.detect)
IMAGE_CRITERIA = tuple(c for c in CRITERIA if c != "detection")
TRIM_FRACTION = 0.1  # cut from each side by reduce_scores(how="trimmed")

# Rows scored per block: the float64 working copy stays near 2 MB (cache-sized, and bounded
# whatever M is); larger blocks measured 2–4× slower on the 2-core dev machine.
BLOCK_ELEMENTS = 1 << 18


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
# The criterion core: per-row sufficient statistics and their reduction to a score.
#
# A row is a run of cells summed together, the last axis of an array: a whole flattened image
# (Criterion.score) or one channel of one window (the search, whose refinement rescores a trial
# by replacing one row). Sums add, so the statistics of rows that tile an image total the
# image's, and one reduction (Criterion.scores_from_totals) serves both ways of scoring.

Q, TOTAL, L1, NEGATIVE = range(4)   # columns of the statistics (Criterion.row_stats)


def _weighted_sum(values: np.ndarray, w) -> np.ndarray:
    # product then numpy's pairwise sum over the last axis, not BLAS or einsum: the same bits
    # whatever the thread count or the arrays' alignment in memory (a fit must not depend on
    # where it ran)
    return values.sum(axis=-1) if w is None else (values * w).sum(axis=-1)


def _signed_power(p: np.ndarray, alpha: float) -> np.ndarray:
    """p**α for integer α (so odd α keeps the sign), sign(p)·|p|**α otherwise."""
    if alpha == 2.0:
        return p * p
    if alpha == 3.0:  # the default: two multiplies instead of a pow per element
        return p * p * p
    if float(alpha).is_integer():
        return p ** alpha
    return np.sign(p) * np.abs(p) ** alpha


def _row_stats(x: np.ndarray, w, terms, scored=None) -> np.ndarray:
    """The four sums of :meth:`Criterion.row_stats`, (..., 4); column Q is NaN without ``terms``.

    ``scored``: the values the criterion scores when they are not the image itself (the burst
    excess, :func:`burst_excess`); columns Q and TOTAL then sum them, L1 and NEGATIVE still sum
    the image ``x`` (the positivity ceiling judges the representation, not the excess)."""
    scored = x if scored is None else scored
    q = np.full(x.shape[:-1], np.nan) if terms is None else _weighted_sum(terms, w)
    return np.stack([q, _weighted_sum(scored, w), _weighted_sum(np.abs(x), w),
                     _weighted_sum(np.maximum(-x, 0.0), w)], axis=-1)


def burst_excess(images) -> np.ndarray:
    """Each row's excess over its own level over time: ``max(S − median_n S, 0)``, float64.

    ``images`` (..., C, N): rows along the last axis (one channel of one window, N time
    samples). A site's steady sound — a line, a fan, the coloured background — has the same
    level all through a window, so its time median is its floor, and a burst, which fills a
    small part of the window, leaves the median nearly where the noise puts it (a median is
    robust to a minority of outliers; common practice). What remains is the burst's energy
    over the floor. For stationary Gaussian noise the value of a spectrogram at each point is
    exponentially distributed with the smoothed spectrum as its mean whatever the window
    (from memory: the χ² law of periodogram values with 2 degrees of freedom, D. B. Percival,
    A. T. Walden, "Spectral Analysis for Physical Applications", 1993, ch. 6), so the noise's
    share of the excess has the same distribution per unit area of the plane for every
    spectrogram window: its bias does not favour one window over another.
    """
    x = np.asarray(images, dtype=np.float64)
    return np.maximum(x - np.median(x, axis=-1, keepdims=True), 0.0)


def _positive_mass(totals: np.ndarray) -> np.ndarray:
    """Images whose mass T = Σ ΔA·S is positive and finite: the only ones that are distributions."""
    t = totals[..., TOTAL]
    return np.isfinite(t) & (t > 0)


def shares_from_totals(totals, undefined: float = 0.0) -> np.ndarray:
    """Negative share Σ ΔA·S⁻ / Σ ΔA·|S| of statistics totals (..., 4), shape (...,).

    ``undefined`` where the absolute mass is zero or not finite: the search takes 0 (an all-zero
    image has no negative mass, and its score is already invalid), the public functions NaN.
    This is the quantity the positivity ceiling bounds (:func:`ceiling_objective`).
    """
    l1, neg = totals[..., L1], totals[..., NEGATIVE]
    ok = np.isfinite(l1) & (l1 > 0)
    with _quiet():
        return np.where(ok, neg / np.where(ok, l1, 1.0), undefined)


def _gini_rows(x: np.ndarray) -> np.ndarray:
    """Gini index of each row of x (M, K); NaN for a row with no finite positive magnitude."""
    a = np.sort(np.abs(x), axis=1)
    k = a.shape[1]
    # Hurley & Rickard (2009), eq. for sorted c_(1) ≤ … ≤ c_(K): G = 1 − 2 Σ c_(i)/‖c‖₁·(K−i+½)/K
    weights = (k - np.arange(1, k + 1) + 0.5) / k
    l1 = a.sum(axis=1)
    valid = np.isfinite(l1) & (l1 > 0)
    return np.where(valid, 1.0 - 2.0 * (a @ weights) / np.where(valid, l1, 1.0), np.nan)


def _quiet():
    # Invalid images (inf, NaN, overflow) are expected inputs here and are scored +inf/NaN.
    return np.errstate(over="ignore", invalid="ignore", divide="ignore")


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


def _score_one(criterion: Criterion, image, cell_size) -> float:
    """One image of any shape, flattened into one row."""
    x = _as_rows(image)
    w = _cell_weights(cell_size, np.shape(image))
    with _quiet():
        return float(criterion._score_rows(x, w)[0])


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
    return _score_one(Criterion(alpha=alpha), image, cell_size)


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
    return _score_one(Criterion(name="concentration", p=p), image, cell_size)


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
    x = np.abs(_as_rows(values, "values"))
    with _quiet():
        score = float(Criterion(name="sparsity", measure="hoyer")._score_rows(x)[0])
    return -score if math.isfinite(score) else math.nan


def negative_mass_fraction(image, cell_size=None) -> float:
    """Share of the absolute mass that is negative, ``Σ|p⁻| / Σ|p|`` ∈ [0, 1] (NaN if all zero).

    Zero for any spectrogram-like (a ≥ 1) image; grows as smoothing drops below the Heisenberg
    cell and Wigner–Ville interference shows through (common practice). ``cell_size`` (s·Hz)
    weights each cell by its area, as in :func:`renyi_entropy`.
    """
    x = _as_rows(image)
    w = _cell_weights(cell_size, np.shape(image))
    with _quiet():
        return float(shares_from_totals(_row_stats(x, w, None), undefined=math.nan)[0])


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
    rows = max(1, BLOCK_ELEMENTS // flat.shape[1])
    out = np.empty(x.shape[0], dtype=np.float64)
    for start in range(0, x.shape[0], rows):
        with _quiet():
            out[start:start + rows] = shares_from_totals(
                _row_stats(flat[start:start + rows].astype(np.float64, copy=False), w, None),
                undefined=math.nan)
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
    excess : bool
        Score each row's excess over its own level over time (:func:`burst_excess`) instead of
        the image: the bursts, not the site's steady sound. Rows are the last axis of a
        ``(M, C, N)`` stack (one channel of one window). The positivity ceiling and the
        penalty still see the image itself.

    :meth:`score` takes ``cell_size`` (s·Hz per cell, e.g. :func:`cell_sizes`): Rényi and
    concentration values are then on the continuous plane, comparable across grids; Hoyer's
    measure weights cells relative to their mean size; the Gini index counts cells as they are
    (a sorted-magnitude measure has no area form here), so it is comparable only on one grid.

    Each criterion is defined once, as per-row statistics (:meth:`row_stats`) and their
    reduction (:meth:`scores_from_totals`); :meth:`score` applies both to whole images, the
    search to (window, channel) rows totalled over channels. The Gini index needs the sorted
    image, so it is not :attr:`separable` and is scored on whole images only (its validity and
    penalty still come from the row statistics).
    """

    name: str = "renyi"
    alpha: float = 3.0
    p: float = 2.0
    measure: str = "gini"
    negative_mass_penalty: float = 0.0
    excess: bool = False

    def __post_init__(self):
        self.validate()

    def validate(self) -> Criterion:
        """Raise ``ValueError`` naming the field and the value if any field is out of range."""
        if self.name not in IMAGE_CRITERIA:
            raise ValueError(f"criterion name must be one of {', '.join(IMAGE_CRITERIA)}; got "
                             f"{self.name!r}" + (" (the detection criterion scores a corpus, not "
                                                 "an image: a search setting)"
                                                 if self.name == "detection" else ""))
        if self.measure not in SPARSITY_MEASURES:
            raise ValueError(
                f"measure must be one of {', '.join(SPARSITY_MEASURES)}; got {self.measure!r}")
        _check_alpha(self.alpha)
        _check_p(self.p)
        lam = self.negative_mass_penalty
        if isinstance(lam, bool) or not isinstance(lam, (int, float, np.integer, np.floating)) \
                or not (np.isfinite(lam) and lam >= 0):
            raise ValueError(f"negative_mass_penalty must be a finite number >= 0, got {lam!r}")
        if not isinstance(self.excess, (bool, np.bool_)):
            raise ValueError(f"excess must be true or false, got {self.excess!r}")
        return self

    # -- the core: statistics of rows, and their totals reduced to a score ------------------

    @property
    def separable(self) -> bool:
        """True when a score depends on an image only through the totals of its rows'
        statistics (:meth:`row_stats`): every criterion but the Gini index."""
        return not (self.name == "sparsity" and self.measure == "gini")

    def _terms(self, x: np.ndarray):
        """The criterion's own per-cell term q(S), summed into column ``Q`` (None for Gini)."""
        if self.name == "renyi":
            alpha = float(self.alpha)
            if alpha == 1.0:   # Shannon limit: S·log2|S|, with 0·log 0 = 0
                a = np.abs(x)
                return x * np.log2(a, out=np.zeros_like(a), where=a > 0)
            return _signed_power(x, alpha)
        if self.name == "concentration":
            p = float(self.p)
            return np.sqrt(np.abs(x)) if p == 2.0 else np.abs(x) ** (1.0 / p)
        return x * x if self.measure == "hoyer" else None

    def row_stats(self, rows, cell_size=None) -> np.ndarray:
        """Sufficient statistics of each row (the last axis) of ``rows``: shape (..., 4) float64.

        Columns ``Q``, ``TOTAL``, ``L1``, ``NEGATIVE``: Σ w·q(S), Σ w·S, Σ w·|S| and
        Σ w·max(−S, 0) (with :attr:`excess`, Q and TOTAL of the row's burst excess), with
        ``cell_size`` w the cell areas along the row (s·Hz, shape (K,);
        None: every cell counts 1) and q the criterion's own term: S^α for Rényi (odd integer α
        keeps the sign, non-integer α takes sign(S)·|S|^α), S·log2|S| at α = 1, |S|^{1/p} for
        concentration, S² for Hoyer's measure, none (NaN) for the Gini index. The statistics of
        rows that tile an image total the image's: the search keeps them per (window, channel)
        row, each multiplied by its channel's cell area, and sums them over channels.
        """
        x = np.asarray(rows, dtype=np.float64)
        scored = burst_excess(x) if self.excess else x
        return _row_stats(x, cell_size, self._terms(scored), scored)

    def scores_from_totals(self, totals, n_cells: int, mean_cell: float = 1.0) -> np.ndarray:
        """Scores, shape (...,) float64, of images from their statistics totals (..., 4).

        ``n_cells`` K, the number of cells of an image (Hoyer's √K); ``mean_cell`` the mean of
        the cell areas the totals were weighted with (Hoyer's measure sees cells relative to it;
        1 when they were already relative). With T = Σ ΔA·S the image's mass:

        - Rényi: H_α = log2(Σ ΔA·S^α / T^α)/(1−α), which is log2 Σ p^α ΔA^{1−α}/(1−α) for
          p = S·ΔA/T (Baraniuk, Flandrin, Janssen, Michel, IEEE Trans. IT 47(4), 2001); at
          α = 1, −Σ ΔA·S·log2|S|/T + log2 T.
        - concentration: p·log2 Σ ΔA·|S|^{1/p} − log2 T (Stanković, Signal Processing 81(3),
          2001).
        - Hoyer: −(√K − l1/l2)/(√K − 1), l1 and l2 on the relative cell areas (Hoyer, JMLR 5,
          2004).

        plus λ·Σ ΔA·S⁻/Σ ΔA·|S| (``negative_mass_penalty``). ``+inf`` unless T is positive and
        finite, the inner sum is positive and the score finite.
        """
        if not self.separable:
            raise ValueError("the Gini index is not a function of row sums; score whole images")
        q, t = totals[..., Q], totals[..., TOTAL]
        with _quiet():
            valid = _positive_mass(totals)
            tt = np.where(valid, t, 1.0)
            if self.name == "renyi" and float(self.alpha) == 1.0:
                h = -q / tt + np.log2(tt)
            elif self.name == "renyi":
                alpha = float(self.alpha)
                power = q / _signed_power(tt, alpha)
                valid &= power > 0
                h = np.log2(np.where(power > 0, power, 1.0)) / (1.0 - alpha)
            elif self.name == "concentration":
                valid &= q > 0
                h = float(self.p) * np.log2(np.where(q > 0, q, 1.0)) - np.log2(tt)
            else:
                if n_cells < 2:
                    raise ValueError(
                        f"Hoyer's measure needs at least 2 values per image, got {n_cells}")
                root_k = math.sqrt(n_cells)
                l2 = np.sqrt(q)
                valid &= (l2 > 0) & np.isfinite(l2)
                # the excess is non-negative: its L1 norm is its total
                l1 = totals[..., TOTAL] if self.excess else totals[..., L1]
                ratio = l1 / np.where(l2 > 0, l2, 1.0) / math.sqrt(mean_cell)
                h = -(root_k - ratio) / (root_k - 1.0)
            return self._finish(h, totals, valid)

    def _finish(self, h: np.ndarray, totals: np.ndarray, valid: np.ndarray) -> np.ndarray:
        """Add λ times the negative share; +inf where invalid or not finite."""
        lam = float(self.negative_mass_penalty)
        if lam:
            l1 = totals[..., L1]
            h = h + lam * totals[..., NEGATIVE] / np.where(l1 > 0, l1, 1.0)
        return np.where(valid & np.isfinite(h), h, np.inf)

    def _score_rows(self, x: np.ndarray, w=None, scored=None) -> np.ndarray:
        """Scores (M,) of whole images, one per row of x (M, K); w (K,) cell areas or None;
        ``scored`` (M, K) the burst excess of x when :attr:`excess` (else x is scored)."""
        values = x if scored is None else scored
        if not self.separable:
            stats = _row_stats(x, w, None, values)
            return self._finish(-_gini_rows(values), stats, _positive_mass(stats))
        if self.name == "sparsity" and w is not None:
            # Hoyer's measure sees cell areas relative to their mean: dividing them here (mean 1)
            # gives the value of dividing the totals by √mean later
            w = w / np.mean(w)
        return self.scores_from_totals(_row_stats(x, w, self._terms(values), values), x.shape[1])

    # -- scoring images ----------------------------------------------------------------------

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
        rows = max(1, BLOCK_ELEMENTS // flat.shape[1])
        out = np.empty(m, dtype=np.float64)
        for start in range(0, m, rows):  # blocks of windows, not one window at a time
            block = flat[start:start + rows].astype(np.float64, copy=False)
            scored = None
            if self.excess:   # per (window, channel) row, before the image is flattened
                part = x[start:start + rows]
                scored = burst_excess(part).reshape(part.shape[0], -1)
            with _quiet():
                out[start:start + rows] = self._score_rows(block, w, scored)
        return out

    def to_json(self) -> dict:
        """``{"name", "alpha", "p", "measure", "negative_mass_penalty", "excess"}`` (JSON-ready)."""
        d = asdict(self)
        for key in ("alpha", "p", "negative_mass_penalty"):
            d[key] = float(d[key])
        d["excess"] = bool(d["excess"])
        return d

    @classmethod
    def from_json(cls, obj) -> Criterion:
        """Inverse of :meth:`to_json`; missing keys take the defaults, unknown keys are an error."""
        if not isinstance(obj, dict):
            raise ValueError(f"criterion must be a JSON object, got {type(obj).__name__}")
        unknown = sorted(set(obj) - {"name", "alpha", "p", "measure", "negative_mass_penalty",
                                     "excess"})
        if unknown:
            raise ValueError(f"unknown criterion field(s): {', '.join(unknown)}")
        return cls(**obj)


# --------------------------------------------------------------------------------------------
# From per-window scores to the corpus objective.


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


def ceiling_objective(scores, shares, how: str, max_negative_share: float):
    """The corpus objective under the positivity ceiling: the reduced scores
    (:func:`reduce_scores`), or ``+inf`` when the mean negative share of the windows
    (:func:`shares_from_totals`) exceeds ``max_negative_share``, whatever the criterion.

    ``scores`` and ``shares`` (M,) give a float; (M, n), one candidate per column, give (n,).
    """
    scores = np.asarray(scores, dtype=np.float64)
    if scores.ndim == 1:
        if float(np.mean(shares)) > max_negative_share:
            return math.inf
        return reduce_scores(scores, how)
    if how == "mean" and np.all(np.isfinite(scores)):
        out = scores.mean(axis=0)
    else:
        out = np.array([reduce_scores(scores[:, i], how) for i in range(scores.shape[1])])
    return np.where(np.mean(shares, axis=0) > max_negative_share, np.inf, out)
