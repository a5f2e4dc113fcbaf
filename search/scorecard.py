"""The scorecard: should a monitoring group change its detector's input to another representation?

Held-out burst windows and the site's own noise-only windows judge several representations
(:class:`search.representation.Representation`, by name) against a reference one, on three
rows, each a difference *reference − representation* (positive: the representation is better):

- **sharpness** (bits): the mean per-window criterion score of the bursts' images (lower is
  sharper; :meth:`search.criteria.Criterion.score` on the representation's cells);
- **onset** (ms): the median of |image onset − envelope onset| over the bursts, where an onset
  is Maeda's AIC change point (Maeda, "A method for reading and checking phase times in
  autoprocessing system of seismic wave data", Zisin 38, 1985) of a series from its start to its
  peak: the image's channel-summed energy (:func:`search.onset.image_onsets`) against that of
  the raw waveform's envelope |hilbert(x)|², the sharpest time reference the data has;
- **detection** (dB): the burst gain at which a fixed energy detector on the image tells
  injected windows from noise-only ones with ROC AUC ≥ the target (0.9): lower is better.

Every interval is a paired percentile bootstrap (Efron & Tibshirani, "An Introduction to the
Bootstrap", 1993, ch. 13): each resample draws bursts (and, for detection, noise windows,
independently) with replacement, and every representation is reduced over the same draws.

Detection in detail. Burst i is injected into noise window i mod K at amplitude gain g
(20·log10 g dB). The detector's envelope is the channel-summed energy
``e(t) = Σ_c S_c(t)·ΔA_c`` (cell areas ΔA_c, s·Hz) clipped at 0, its statistic
``max_t e / median_t e`` (scale-free, like an STA/LTA ratio on the image; common practice). At
each gain the AUC is the Mann–Whitney U of the injected windows' statistics against the noise
windows' over n1·n2, ties counting ½ (Mann & Whitney 1947; Hanley & McNeil, "The meaning and use
of the area under a receiver operating characteristic (ROC) curve", Radiology 143, 1982). Every
representation here is a quadratic (Wigner–Ville-class) energy density, so with S(x) its image,
``S(n + g·b) = S(n) + g²·S(b) + g·[S(n + b) − S(n) − S(b)]`` exactly; the channel sums obey the
same identity (:class:`Injection`), so three images per (burst, noise) pair serve every gain.

Shapes: windows (M, N) bursts and (K, N) noise, float64 samples at the corpus rate; images
(M, C, T); envelopes (M, T); injected statistics (G, M) for G gains. Work runs in chunks of
:data:`CHUNK_WINDOWS` windows, so memory stays bounded whatever M and K are.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from burstlens.search.criteria import Criterion, cell_sizes
from burstlens.search.diagnostics import INTERVAL_LEVEL, bootstrap_indices, percentile_interval
from burstlens.search.filterbank import Filterbank
from burstlens.search.onset import image_onsets
from burstlens.search.representation import ROWS, Representation
from burstlens.search.tfd import transform
from burstlens.search.wvd import analytic_signal

GAINS_DB = np.arange(-60.0, 21.0, 1.0)  # default burst gains, amplitude dB
TARGET_AUC = 0.9
RESAMPLES = 2000  # ≥ 1000 for percentile intervals (Efron & Tibshirani 1993, ch. 19)
CHUNK_WINDOWS = 16  # windows per image batch: (16, 96, 2048) float64 images are 25 MB
# Elements of one block of the resampled-AUC gather ((resamples, gains, bursts) float64, 8 MB).
_BLOCK_ELEMENTS = 1 << 20
# Elements of one block of injected envelopes ((windows, gains, time) float64, 16 MB).
_ENVELOPE_ELEMENTS = 1 << 21
_BURST_TAG, _NOISE_TAG = 1, 2  # SeedSequence([seed, tag]) streams of the two bootstrap draws


# --------------------------------------------------------------------------------------------
# Representations the scorecard adds to the caller's


def envelope_representation(sampling_rate_hz: float) -> Representation:
    """The raw waveform's energy envelope as a representation: images |hilbert(x)|², (M, 1, N).

    One channel and no frequency axis, so it takes part in the detection row only; one column
    per sample (time step 1/fs), cell 1/fs s × 1 Hz.
    """
    fs = _positive_rate(sampling_rate_hz)

    def images(windows):
        return _envelope(windows)[:, None, :]

    return Representation(name="envelope", images=images, time_step_s=1.0 / fs,
                          cell_size=np.array([[1.0 / fs]]), rows=("detection",),
                          description={"kind": "envelope", "definition": "|hilbert(x)|^2",
                                       "sampling_rate_hz": fs})


def filterbank_representation(name: str, filterbank: Filterbank, eps: float = 1e-6) -> Representation:
    """A filterbank as a representation: :func:`search.tfd.transform` in float64.

    One column per sample (time step 1/fs, first column at 0 s); cells ΔA_c = Δf_c/fs s·Hz
    (:func:`search.criteria.cell_sizes` of the channel centres); ``eps`` the transform's
    truncation level. Takes part in every row.
    """
    if not isinstance(filterbank, Filterbank):
        raise ValueError(f"filterbank must be a Filterbank, got {type(filterbank).__name__}")
    fs = filterbank.sampling_rate_hz

    def images(windows):
        return transform(windows, filterbank, eps=eps, dtype=np.float64)

    description = {"kind": "filterbank", "channels": len(filterbank), "sampling_rate_hz": fs,
                   "center_hz": _span(filterbank.center_hz),
                   "time_spread_s": _span(filterbank.time_spread_s),
                   "cell_area": _span(filterbank.cell_area),
                   "chirp_hz_per_s": _span(filterbank.chirp_hz_per_s), "eps": float(eps)}
    return Representation(name=str(name), images=images, time_step_s=1.0 / fs,
                          cell_size=cell_sizes(filterbank.center_hz, fs), description=description)


def envelope_onsets_s(windows, sampling_rate_hz: float) -> np.ndarray:
    """AIC onset of each window's energy envelope |hilbert(x)|², s from its first sample, (M,).

    ``windows`` (M, N) real samples at ``sampling_rate_hz`` Hz, N ≥ 3. The onset is Maeda's AIC
    change point (Zisin 38, 1985) of the envelope from its start to its peak
    (:func:`search.onset.image_onsets` on the one-channel image), k/fs for onset sample k.
    """
    fs = _positive_rate(sampling_rate_hz)
    return image_onsets(_envelope(windows)[:, None, :], fs)


# --------------------------------------------------------------------------------------------
# The detector


def channel_envelope(images, cell_size) -> np.ndarray:
    """Channel-summed energy ``e(t) = Σ_c S_c(t)·ΔA_c`` of images (M, C, T), shape (M, T) float64.

    ``cell_size`` broadcasts to (C, T): the cell areas ΔA_c (s·Hz), so the sum is energy per
    time column whatever the channel spacing (Σ_c S_c·Δf_c is the time marginal of a
    Wigner–Ville-class image; L. Cohen, "Time-Frequency Analysis", 1995).
    """
    x = np.asarray(images, dtype=np.float64)
    if x.ndim != 3:
        raise ValueError(f"images must be (M, C, T), got shape {x.shape}")
    try:
        w = np.broadcast_to(np.asarray(cell_size, dtype=np.float64), x.shape[1:])
    except ValueError:
        raise ValueError(f"cell_size of shape {np.shape(cell_size)} does not broadcast to the "
                         f"image shape {x.shape[1:]}") from None
    return (x * w).sum(axis=1)


def detection_statistic(envelopes) -> np.ndarray:
    """``max_t e / median_t e`` of each envelope (last axis), after clipping e at 0; shape (...,).

    Scale-free: the peak over the window's own level, like an STA/LTA ratio (common practice).
    Negative values of a smoothed Wigner image are not energy, hence the clip. A zero median
    gives +inf when the envelope has energy, 1 (no contrast) when it is all zero.
    """
    e = np.clip(np.asarray(envelopes, dtype=np.float64), 0.0, None)
    peak = e.max(axis=-1)
    level = np.median(e, axis=-1)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(level > 0, peak / np.where(level > 0, level, 1.0),
                        np.where(peak > 0, np.inf, 1.0))


@dataclass(frozen=True)
class Injection:
    """Channel-summed envelopes of bursts injected into noise, as their quadratic parts.

    For burst b_i in noise window n_k (k = i mod K) and a quadratic image S,
    ``e(n + g·b) = e(n) + g²·e(b) + g·[e(n + b) − e(n) − e(b)]`` exactly (the cross term is
    linear in each signal). All (M, T) float64.

    Attributes
    ----------
    noise : e(n_k) of the noise window each burst goes into.
    burst : e(b_i).
    cross : e(n_k + b_i) − e(n_k) − e(b_i).
    """

    noise: np.ndarray
    burst: np.ndarray
    cross: np.ndarray

    @classmethod
    def from_envelopes(cls, noise, burst, mixed) -> Injection:
        """From e(n_k), e(b_i) and e(n_k + b_i), each (M, T)."""
        return cls(noise, burst, mixed - noise - burst)

    def at(self, gains) -> np.ndarray:
        """Envelopes of the injected windows at amplitude gains g (G,), shape (M, G, T)."""
        g = np.asarray(gains, dtype=np.float64)[None, :, None]
        return self.noise[:, None, :] + g * g * self.burst[:, None, :] + g * self.cross[:, None, :]


def injection(representation: Representation, bursts, noise) -> Injection:
    """The :class:`Injection` of bursts (M, N) into noise windows (K ≥ 1, N), burst i into
    noise window i mod K, on ``representation``'s images (computed in chunks)."""
    b = _windows("bursts", bursts)
    n = _windows("noise", noise, b.shape[1])
    if n.shape[0] == 0:
        raise ValueError("noise: no noise windows to inject the bursts into")
    noise_env = _chunked_envelopes(representation, n)
    pair = np.arange(b.shape[0]) % n.shape[0]
    burst_env = _chunked_envelopes(representation, b)
    sum_env = _chunked_envelopes(representation, n[pair] + b)
    return Injection.from_envelopes(noise_env[pair], burst_env, sum_env)


def injected_statistics(inj: Injection, gains) -> np.ndarray:
    """:func:`detection_statistic` of every injected window at every gain, shape (G, M)."""
    g = np.asarray(gains, dtype=np.float64)
    m, t = inj.burst.shape
    out = np.empty((g.size, m))
    rows = max(1, _ENVELOPE_ELEMENTS // max(1, g.size * t))
    for start in range(0, m, rows):
        part = Injection(inj.noise[start:start + rows], inj.burst[start:start + rows],
                         inj.cross[start:start + rows])
        out[:, start:start + rows] = detection_statistic(part.at(g)).T
    return out


# --------------------------------------------------------------------------------------------
# ROC AUC and thresholds


def roc_auc(positive, negative) -> float:
    """ROC AUC of scores ``positive`` (n1,) against ``negative`` (n2,): U/(n1·n2).

    U counts the pairs with positive > negative, ties ½ (Mann & Whitney 1947; the AUC reading:
    Hanley & McNeil, Radiology 143, 1982). Both non-empty, no NaN.
    """
    p = np.asarray(positive, dtype=np.float64).ravel()
    q = np.asarray(negative, dtype=np.float64).ravel()
    if p.size == 0 or q.size == 0:
        raise ValueError(f"roc_auc needs positive and negative scores, got {p.size} and {q.size}")
    return float(resampled_auc(p[None], q, np.ones((1, p.size)), np.ones((1, q.size)))[0, 0])


def resampled_auc(positive, negative, positive_counts, negative_counts) -> np.ndarray:
    """ROC AUC of weighted samples, for G score sets and B resamples at once: shape (B, G).

    ``positive`` (G, M): the positive scores at each of G settings (here gains); ``negative``
    (K,): the negative scores, the same at every setting; ``positive_counts`` (B, M) and
    ``negative_counts`` (B, K): how many times each sample is drawn in each resample (a bootstrap
    resample as counts). Resample b's AUC is that of the samples repeated by their counts:
    ``Σ_i Σ_k u_bi·v_bk·[1(p_i > q_k) + ½·1(p_i = q_k)] / (Σu_b·Σv_b)`` (Mann–Whitney U/(n1·n2),
    Mann & Whitney 1947). The negatives are sorted once and each positive's weighted count of
    negatives below it read from a cumulative sum, O(B·G·M) in blocks, never a (B, G, M, K) array.
    """
    p = np.atleast_2d(np.asarray(positive, dtype=np.float64))
    q = np.asarray(negative, dtype=np.float64).ravel()
    u = np.atleast_2d(np.asarray(positive_counts, dtype=np.float64))
    v = np.atleast_2d(np.asarray(negative_counts, dtype=np.float64))
    if np.isnan(p).any() or np.isnan(q).any():
        raise ValueError("positive and negative scores must not hold NaN")
    if u.shape[1] != p.shape[1] or v.shape[1] != q.size or u.shape[0] != v.shape[0]:
        raise ValueError(f"counts {u.shape} and {v.shape} do not fit {p.shape[1]} positive and "
                         f"{q.size} negative scores with one row per resample")
    order = np.argsort(q, kind="stable")
    q_sorted = q[order]
    below = np.zeros((v.shape[0], q.size + 1))
    np.cumsum(v[:, order], axis=1, out=below[:, 1:])
    lo = np.searchsorted(q_sorted, p, side="left")   # negatives < p
    hi = np.searchsorted(q_sorted, p, side="right")  # negatives ≤ p
    pairs = u.sum(axis=1) * v.sum(axis=1)
    out = np.empty((u.shape[0], p.shape[0]))
    rows = max(1, _BLOCK_ELEMENTS // max(1, p.size))
    for start in range(0, u.shape[0], rows):
        cum = below[start:start + rows]
        wins = 0.5 * (cum[:, lo] + cum[:, hi])  # (b, G, M): below + ½ ties
        out[start:start + rows] = (wins * u[start:start + rows, None, :]).sum(axis=2)
    with np.errstate(divide="ignore", invalid="ignore"):
        return out / pairs[:, None]


def threshold_gain_db(gains_db, auc, target: float = TARGET_AUC) -> float | None:
    """Smallest gain (dB) at which the AUC curve reaches ``target``, or None if it never does.

    ``gains_db`` (G,) increasing; ``auc`` (G,) the AUC at each gain. At the first grid point j
    with AUC ≥ target the gain is interpolated linearly in dB between points j − 1 and j; a
    curve already at the target on the first point gives that point (the threshold is at or
    below it).
    """
    g = _gain_grid(gains_db)
    a = np.asarray(auc, dtype=np.float64)
    if a.shape != g.shape:
        raise ValueError(f"auc has shape {a.shape} for {g.size} gains")
    value = float(_thresholds_db(g, a[None], float(target))[0])
    return value if math.isfinite(value) else None


def _thresholds_db(gains_db: np.ndarray, auc: np.ndarray, target: float) -> np.ndarray:
    """:func:`threshold_gain_db` of each row of ``auc`` (B, G), shape (B,); NaN: never reached."""
    reached = auc >= target
    j = np.argmax(reached, axis=1)
    ever = reached[np.arange(auc.shape[0]), j]
    prev = np.maximum(j - 1, 0)
    rows = np.arange(auc.shape[0])
    y0, y1 = auc[rows, prev], auc[rows, j]
    x0, x1 = gains_db[prev], gains_db[j]
    with np.errstate(divide="ignore", invalid="ignore"):  # j = 0 divides 0 by 0, and is replaced
        out = np.where(j == 0, gains_db[0], x0 + (target - y0) / (y1 - y0) * (x1 - x0))
    return np.where(ever, out, np.nan)


# --------------------------------------------------------------------------------------------
# The scorecard


@dataclass(frozen=True)
class Measurements:
    """What one representation gives on the held-out windows (None: not in that row).

    Attributes
    ----------
    sharpness_bits : (M,) per-burst criterion scores, bits.
    onsets_s : (M,) image onsets, s from the window's first sample.
    injected_statistic : (G, M) detector statistic of each injected window at each gain.
    noise_statistic : (K,) detector statistic of each noise window.
    """

    sharpness_bits: np.ndarray | None
    onsets_s: np.ndarray | None
    injected_statistic: np.ndarray | None
    noise_statistic: np.ndarray | None


def measure(representation: Representation, bursts, noise, criterion: Criterion,
            gains_db) -> Measurements:
    """:class:`Measurements` of one representation: bursts (M, N), noise (K, N) with K ≥ 0,
    amplitude gains in dB (G,); each image batch is computed once and serves every row."""
    rep = representation
    b = _windows("bursts", bursts)
    n = _windows("noise", noise, b.shape[1])
    m, k = b.shape[0], n.shape[0]
    sharp = "sharpness" in rep.rows
    onset = "onset" in rep.rows
    detect = "detection" in rep.rows and k > 0
    if not (sharp or onset or detect):
        return Measurements(None, None, None, None)
    scores, onsets, burst_env, sum_env = [], [], [], []
    pair = np.arange(m) % max(k, 1)
    for start in range(0, m, CHUNK_WINDOWS):
        part = slice(start, start + CHUNK_WINDOWS)
        images = _images(rep, b[part])
        if sharp:
            scores.append(criterion.score(images, rep.cell_size))
        if onset:
            onsets.append(image_onsets(images, time_step_s=rep.time_step_s,
                                       first_time_s=rep.first_time_s))
        if detect:
            burst_env.append(channel_envelope(images, rep.cell_size))
            sum_env.append(channel_envelope(_images(rep, n[pair[part]] + b[part]), rep.cell_size))
    injected = noise_statistic = None
    if detect:
        noise_env = _chunked_envelopes(rep, n)
        inj = Injection.from_envelopes(noise_env[pair], np.concatenate(burst_env), np.concatenate(sum_env))
        injected = injected_statistics(inj, 10.0 ** (_gain_grid(gains_db) / 20.0))
        noise_statistic = detection_statistic(noise_env)
    return Measurements(np.concatenate(scores) if sharp else None,
                        np.concatenate(onsets) if onset else None, injected, noise_statistic)


def scorecard(representations: dict, bursts, noise, sampling_rate_hz: float, criterion: Criterion, *,
              reference: str = "spectrogram", resamples: int = RESAMPLES, seed: int = 0,
              gains_db=None, target_auc: float = TARGET_AUC) -> dict:
    """Judge representations against ``reference`` on held-out bursts and the site's noise.

    Parameters
    ----------
    representations : dict name -> Representation
        Must hold ``reference``; each takes part in the rows its ``rows`` name.
    bursts : (M, N) float, M ≥ 1, N ≥ 3
        Held-out burst windows at ``sampling_rate_hz``.
    noise : (K, N) float, K ≥ 0, or None
        The site's noise-only windows (same length); K = 0 leaves the detection row out.
    sampling_rate_hz : float, Hz
    criterion : search.criteria.Criterion
        The sharpness criterion (bits; lower is sharper).
    resamples : int ≥ 0
        Bootstrap resamples B (0: no intervals).
    seed : int ≥ 0
        Draws come from ``SeedSequence([seed, 1])`` (bursts) and ``[seed, 2]`` (noise).
    gains_db : (G,) increasing, G ≥ 2, optional
        Burst amplitude gains, dB (default −60..+20 in 1 dB steps).
    target_auc : float in (0.5, 1]
        The detection AUC a threshold gain must reach.

    Returns
    -------
    dict, JSON-ready
        ``reference``, ``bursts`` M, ``noise_windows`` K, ``target_auc``, ``resamples``,
        ``level``; ``representations``: per name ``sharpness_bits`` (mean), ``onset_median_ms``,
        ``onset_p90_ms`` (median and 90th percentile of |image − envelope onset|,
        ``numpy.percentile`` linear), ``detection_threshold_db``, ``description`` (None where
        the representation is not in that row or the threshold is never reached); ``rows``:
        ``sharpness_bits``, ``onset_ms``, ``detection_db``, each ``{name: {"estimate", "low",
        "high"}}`` of reference − representation (positive: the representation is better; the
        reference itself is left out; detection entries add ``unreached_resamples``), or None
        with the reason in ``method``; ``method``: the words for each row.
    """
    reps = _check_representations(representations, reference)
    b = _windows("bursts", bursts)
    n = _windows("noise", noise, b.shape[1])
    fs = _positive_rate(sampling_rate_hz)
    if not isinstance(criterion, Criterion):
        raise ValueError(f"criterion must be a Criterion, got {type(criterion).__name__}")
    gains = GAINS_DB.copy() if gains_db is None else _gain_grid(gains_db)
    target = _check_target(target_auc)
    resamples = _count("resamples", resamples)
    seed = _count("seed", seed)
    m, k = b.shape[0], n.shape[0]
    bootstrap = resamples > 0 and m >= 2
    burst_draws = bootstrap_indices(m, resamples if bootstrap else 0,
                                    np.random.default_rng(np.random.SeedSequence([seed, _BURST_TAG])))
    noise_draws = bootstrap_indices(k, resamples if bootstrap and k > 0 else 0,
                                    np.random.default_rng(np.random.SeedSequence([seed, _NOISE_TAG])))
    reference_onsets = envelope_onsets_s(b, fs)
    measured = {name: measure(rep, b, n, criterion, gains) for name, rep in reps.items()}

    errors_ms = {name: 1e3 * np.abs(x.onsets_s - reference_onsets)
                 for name, x in measured.items() if x.onsets_s is not None}
    thresholds = {}
    if k > 0:
        full = (np.ones((1, m)), np.ones((1, k)))
        drawn = (_counts(burst_draws, m), _counts(noise_draws, k))
        for name, x in measured.items():
            if x.injected_statistic is not None:
                thresholds[name] = tuple(
                    _thresholds_db(gains, resampled_auc(x.injected_statistic, x.noise_statistic,
                                                        *counts), target)
                    for counts in (full, drawn))

    summary = {}
    for name, rep in reps.items():
        x = measured[name]
        err = errors_ms.get(name)
        summary[name] = {
            "sharpness_bits": None if x.sharpness_bits is None else _json(np.mean(x.sharpness_bits)),
            "onset_median_ms": None if err is None else _json(np.median(err)),
            "onset_p90_ms": None if err is None else _json(np.percentile(err, 90)),
            "detection_threshold_db": _json(thresholds[name][0][0]) if name in thresholds else None,
            "description": dict(rep.description)}  # as the caller gave it

    method = _method_words(criterion, gains, target, resamples if bootstrap else 0, m, k)
    rows = {}
    sharp = {name: x.sharpness_bits for name, x in measured.items() if x.sharpness_bits is not None}
    rows["sharpness_bits"] = _row(sharp, reference, burst_draws, np.mean)
    rows["onset_ms"] = _row(errors_ms, reference, burst_draws, np.median)
    rows["detection_db"] = _detection_row(thresholds, reference) if reference in thresholds else None
    for part, have in (("sharpness", sharp), ("onset", errors_ms)):
        if reference not in have:
            method[part] += f" Not computed: the reference {reference!r} has no {part} row."
    if k == 0:
        method["detection"] += " Not computed: there are no noise windows to inject the bursts into."
    elif reference not in thresholds:
        method["detection"] += f" Not computed: the reference {reference!r} has no detection row."
    return {"reference": reference, "bursts": int(m), "noise_windows": int(k),
            "target_auc": target, "resamples": int(resamples), "level": float(INTERVAL_LEVEL),
            "representations": summary, "rows": rows, "method": method}


# --------------------------------------------------------------------------------------------
# Rows


def _row(per_window: dict, reference: str, draws: np.ndarray, reduce) -> dict | None:
    """``{name: {"estimate", "low", "high"}}``: reduce(reference) − reduce(name) on all bursts,
    interval over the shared resamples ``draws`` (B, M); None without the reference."""
    if reference not in per_window:
        return None
    ref = per_window[reference]
    out = {}
    for name, values in per_window.items():
        if name == reference:
            continue
        entry = {"estimate": None, "low": None, "high": None}
        if np.all(np.isfinite(ref)) and np.all(np.isfinite(values)):
            entry["estimate"] = _json(reduce(ref) - reduce(values))
            if len(draws):
                diffs = reduce(ref[draws], axis=1) - reduce(values[draws], axis=1)
                entry["low"], entry["high"] = map(_json, percentile_interval(diffs, INTERVAL_LEVEL))
        out[name] = entry
    return out


def _detection_row(thresholds: dict, reference: str) -> dict:
    """Reference − representation threshold (dB). In a resample where a curve never reaches
    the target its threshold is +∞ (no gain on the grid makes those bursts detectable), so the
    difference is ±∞ there (0 when neither reaches it); the interval's ends are order
    statistics of the differences (no interpolation across an infinity), and an end that is
    infinite is None. ``unreached_resamples`` counts the resamples where some curve never
    reached the target."""
    (ref_full,), ref_drawn = thresholds[reference]
    out = {}
    tail = 50.0 * (1.0 - INTERVAL_LEVEL)
    for name, ((full,), drawn) in thresholds.items():
        if name == reference:
            continue
        unreached = int(np.count_nonzero(np.isnan(ref_drawn) | np.isnan(drawn)))
        with np.errstate(invalid="ignore"):
            diffs = np.nan_to_num(ref_drawn, nan=np.inf) - np.nan_to_num(drawn, nan=np.inf)
        diffs = np.where(np.isnan(diffs), 0.0, diffs)      # ∞ − ∞: neither finds those bursts
        entry = {"estimate": _json(ref_full - full), "low": None, "high": None,
                 "unreached_resamples": unreached}
        if diffs.size:
            low, high = np.percentile(diffs, [tail, 100.0 - tail], method="inverted_cdf")
            entry["low"], entry["high"] = (_json(v) if np.isfinite(v) else None
                                           for v in (low, high))
        out[name] = entry
    return out


def _method_words(criterion: Criterion, gains: np.ndarray, target: float, resamples: int, m: int,
                  k: int) -> dict:
    spec = criterion.to_json()
    interval = (f"paired percentile bootstrap over the bursts ({resamples} resamples, central "
                f"{INTERVAL_LEVEL:.0%}; every representation on the same draws)" if resamples
                else "no interval (fewer than 2 bursts, or no resamples)")
    return {
        "sharpness": (
            f"Mean per-burst {spec['name']} score of each representation's images on its own cells "
            f"(bits on the time-frequency plane; lower is sharper; criterion {spec}). Row: "
            f"reference minus representation (positive: sharper than the reference); {interval}."),
        "onset": (
            "Onset of each burst: Maeda's AIC change point (Zisin 38, 1985) of the image's "
            "channel-summed energy (negatives clipped at 0) from its start to its peak, in s from "
            "the representation's time grid; compared with the same pick on the waveform's energy "
            "envelope |hilbert(x)|^2. Error = |image onset - envelope onset| in ms; median and 90th "
            "percentile per representation. Row: reference median error minus representation "
            f"median error (positive: closer onsets); {interval}."),
        "detection": (
            f"Each of the {m} bursts injected into noise window i mod {k} at amplitude gains "
            f"{gains[0]:g} to {gains[-1]:g} dB ({gains.size} points). Detector: envelope "
            "e(t) = sum_c S_c(t)*dA_c clipped at 0, statistic max_t e / median_t e. ROC AUC of the "
            "injected windows' statistics against the noise windows' (Mann-Whitney U/(n1*n2), "
            f"ties 1/2) at each gain; threshold = smallest gain with AUC >= {target:g}, linear in dB "
            "between grid points (None: never reached on the grid; the lowest grid gain: at or "
            "below it). Row: reference threshold minus representation threshold (positive: finds "
            "bursts that much weaker); paired percentile bootstrap drawing bursts and noise "
            "windows independently, the same draws for every representation; a resample whose "
            "curve never reaches the target counts as an infinite threshold, and an interval end "
            "that is infinite is None (unreached_resamples counts those resamples)."),
    }


# --------------------------------------------------------------------------------------------
# Helpers


def _envelope(windows) -> np.ndarray:
    """|hilbert(x)|² of windows (M, N), float64."""
    z = analytic_signal(np.atleast_2d(np.asarray(windows)))
    return z.real ** 2 + z.imag ** 2


def _images(rep: Representation, windows: np.ndarray) -> np.ndarray:
    images = np.asarray(rep.images(windows), dtype=np.float64)
    if images.ndim != 3 or images.shape[0] != windows.shape[0]:
        raise ValueError(f"representation {rep.name!r}: images must be (M, C, T) with M = "
                         f"{windows.shape[0]}, got shape {images.shape}")
    return images


def _chunked_envelopes(rep: Representation, windows: np.ndarray) -> np.ndarray:
    """:func:`channel_envelope` of ``rep``'s images of windows (M, N), (M, T), in chunks."""
    return np.concatenate([channel_envelope(_images(rep, windows[s:s + CHUNK_WINDOWS]), rep.cell_size)
                           for s in range(0, windows.shape[0], CHUNK_WINDOWS)])


def _counts(draws: np.ndarray, n: int) -> np.ndarray:
    """(B, n) float: how many times each of n samples is drawn in each row of ``draws`` (B, n)."""
    b = draws.shape[0]
    flat = (draws + n * np.arange(b)[:, None]).ravel()
    return np.bincount(flat, minlength=b * n).reshape(b, n).astype(np.float64)


def _windows(name: str, windows, n_samples: int | None = None) -> np.ndarray:
    """Windows as (M, N) float64, checked; ``noise`` may be None or empty (K = 0)."""
    if windows is None and n_samples is not None:
        return np.zeros((0, n_samples))
    x = np.asarray(windows)
    if n_samples is not None and x.size == 0:
        return np.zeros((0, n_samples))
    if x.ndim != 2 or x.shape[0] == 0:
        raise ValueError(f"{name} must be a non-empty (M, N) array of windows, got shape {x.shape}")
    if np.iscomplexobj(x) or not np.issubdtype(x.dtype, np.number):
        raise ValueError(f"{name} must hold real samples, got dtype {x.dtype}")
    x = x.astype(np.float64)
    if x.shape[1] < 3:
        raise ValueError(f"{name}: windows of {x.shape[1]} samples; an onset needs at least 3")
    if n_samples is not None and x.shape[1] != n_samples:
        raise ValueError(f"{name}: windows of {x.shape[1]} samples, the bursts have {n_samples}")
    if not np.all(np.isfinite(x)):
        raise ValueError(f"{name} holds NaN or Inf")
    return x


def _check_representations(representations, reference) -> dict:
    if not isinstance(representations, dict) or not representations:
        raise ValueError("representations must be a non-empty dict of name -> Representation")
    for name, rep in representations.items():
        if not isinstance(rep, Representation):
            raise ValueError(f"representations[{name!r}] must be a Representation, got "
                             f"{type(rep).__name__}")
        unknown = sorted(set(rep.rows) - set(ROWS))
        if unknown:
            raise ValueError(f"representations[{name!r}].rows holds unknown row(s) {unknown}; "
                             f"rows are {', '.join(ROWS)}")
        step = float(rep.time_step_s)
        if not (math.isfinite(step) and step > 0):
            raise ValueError(f"representations[{name!r}].time_step_s={rep.time_step_s!r} must be a "
                             "positive number of seconds")
    if reference not in representations:
        raise ValueError(f"reference={reference!r} is not one of the representations "
                         f"({', '.join(map(repr, representations))})")
    return dict(representations)


def _gain_grid(gains_db) -> np.ndarray:
    g = np.asarray(gains_db, dtype=np.float64)
    if g.ndim != 1 or g.size < 2 or not np.all(np.isfinite(g)) or np.any(np.diff(g) <= 0):
        raise ValueError(f"gains_db must be at least 2 finite, increasing gains in dB, got {gains_db!r}")
    return g


def _check_target(target_auc) -> float:
    try:
        t = float(target_auc)
    except (TypeError, ValueError):
        t = math.nan
    if not 0.5 < t <= 1.0:
        raise ValueError(f"target_auc={target_auc!r} must be in (0.5, 1]: 0.5 is chance")
    return t


def _count(name: str, value) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 0:
        raise ValueError(f"{name}={value!r} must be a whole number ≥ 0")
    return int(value)


def _positive_rate(sampling_rate_hz) -> float:
    try:
        fs = float(sampling_rate_hz)
    except (TypeError, ValueError):
        fs = math.nan
    if not (math.isfinite(fs) and fs > 0):
        raise ValueError(f"sampling_rate_hz={sampling_rate_hz!r} must be a positive number (Hz)")
    return fs


def _span(values) -> list[float]:
    v = np.asarray(values, dtype=np.float64)
    return [float(v.min()), float(v.max())]


def _json(x):
    """float for JSON: finite values as they are, NaN and inf as None."""
    x = float(x)
    return x if math.isfinite(x) else None


def detection_threshold_db(representation: Representation, bursts, noise, *, gains_db=None,
                           target_auc: float = TARGET_AUC) -> float:
    """The threshold gain (amplitude dB) at which the energy detector on ``representation``
    separates ``bursts`` (M, N) injected into ``noise`` (K ≥ 1, N) from the noise windows at
    ROC AUC ``target_auc`` (the scorecard's detection row for one representation, no
    bootstrap); +inf when no gain on the grid reaches it. Lower is better: the objective of
    the search's detection criterion."""
    from dataclasses import replace

    gains = GAINS_DB.copy() if gains_db is None else _gain_grid(gains_db)
    b = _windows("bursts", bursts)
    n = _windows("noise", noise, b.shape[1])
    if n.shape[0] == 0:
        raise ValueError("noise: a detection threshold needs at least one noise window")
    x = measure(replace(representation, rows=("detection",)), b, n, Criterion(), gains)
    auc = resampled_auc(x.injected_statistic, x.noise_statistic, np.ones((1, b.shape[0])),
                        np.ones((1, n.shape[0])))[0]
    found = threshold_gain_db(gains, auc, _check_target(target_auc))
    return math.inf if found is None else float(found)
