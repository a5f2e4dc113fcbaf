"""Onset timing of time-frequency images: where the image energy of a burst window begins, and how
far that falls from the window's STA/LTA trigger onset. Pure numpy functions.

The onset is the AIC change point of Maeda ("A method for reading and checking phase times in
autoprocessing system of seismic wave data", Zisin 38, 1985), applied directly to a series (no
autoregressive model fit).
"""
from __future__ import annotations

import numpy as np

_REL_VAR_FLOOR = 1e-12


def _aic(x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Maeda's AIC of a 1-D float64 series of length N ≥ 3 at every valid split k in [2, N − 1].

    ``AIC(k) = k·log(var(x[0:k])) + (N−k−1)·log(var(x[k:N]))`` (population variances). Returns
    (k, AIC(k)). A single-sample first segment (k = 1) has no variance and is left out; variances
    are floored at 1e-12 of the whole series' (the smallest normal float for a constant series),
    so a flat segment counts as very quiet instead of giving log 0.
    """
    n = x.size
    k = np.arange(2, n)
    # shifted sums (by the first and the last sample) keep a flat stretch at either end exactly 0
    a = x - x[0]
    b = (x - x[-1])[::-1]
    s1, s2 = np.cumsum(a), np.cumsum(a * a)
    r1, r2 = np.cumsum(b)[::-1], np.cumsum(b * b)[::-1]  # r[j] = Σ over x[j:]
    m = n - k
    v_pre = s2[k - 1] / k - (s1[k - 1] / k) ** 2
    v_post = r2[k] / m - (r1[k] / m) ** 2
    floor = max(_REL_VAR_FLOOR * float(np.var(x)), np.finfo(np.float64).tiny)
    aic = k * np.log(np.maximum(v_pre, floor)) + (m - 1) * np.log(np.maximum(v_post, floor))
    return k, aic


def aic_onset(energy) -> int:
    """Sample index of the change point of a 1-D series, by Maeda's AIC (Zisin 38, 1985).

    ``AIC(k) = k·log(var(x[0:k])) + (N−k−1)·log(var(x[k:N]))``; the onset is the k in [2, N − 1]
    that minimises it: the first sample of the second segment (time k / fs from the series'
    start). ``obspy.signal.trigger.aic_simple`` holds AIC(k) at index k − 1. A constant series
    has no change point and gives 0. Flat segments raise no warnings.

    Parameters
    ----------
    energy : array_like, shape (N,), N ≥ 3
        Any real series (samples); here an image's energy against time.

    Returns
    -------
    int
        Onset sample index.
    """
    x = np.asarray(energy, dtype=np.float64)
    if x.ndim != 1 or x.size < 3:
        raise ValueError(f"energy must be a 1-D series of at least 3 samples, got shape {x.shape}")
    if not np.all(np.isfinite(x)):
        raise ValueError("energy holds NaN or Inf")
    if x.max() == x.min():
        return 0
    k, aic = _aic(x)
    return int(k[np.argmin(aic)])


def image_onsets(images, sampling_rate_hz: float | None = None, *, time_step_s: float | None = None,
                 first_time_s: float = 0.0) -> np.ndarray:
    """Energy onset of each image, s from the window's first sample, shape (M,) float64.

    ``images``: (M, C, T) energy densities, C channels and T time columns, column n at
    ``first_time_s + n·time_step_s`` s; give the column spacing either as ``sampling_rate_hz``
    (Hz: one column per sample, ``time_step_s = 1/fs``) or as ``time_step_s`` (s: an image on a
    coarser time grid), not both. The channel sum, clipped at 0 (small negative values of a
    smoothed Wigner image are not energy), is each window's energy against time; its onset is
    :func:`aic_onset` on the columns from the start to the energy peak, inclusive (column 0 when
    the peak is at column 0 or 1).
    """
    images = np.asarray(images)
    if images.ndim != 3:
        raise ValueError(f"images must be (M, C, N), got shape {images.shape}")
    step = _time_step_s(sampling_rate_hz, time_step_s)
    start = float(first_time_s)
    if not np.isfinite(start):
        raise ValueError(f"first_time_s={first_time_s!r}: must be a finite number")
    energy = np.clip(images.sum(axis=1, dtype=np.float64), 0.0, None)
    columns = np.zeros(energy.shape[0], dtype=np.int64)
    for i, e in enumerate(energy):
        # AIC on the energy itself, up to its peak: the two-segment variance model then sees noise
        # then rise, whereas over the whole window the burst's end (back to noise) competes as the
        # change point; a log or square root would lift the noise floor's fluctuations against the
        # rise and give outliers at low SNR.
        peak = int(np.argmax(e))
        if peak >= 2:
            columns[i] = aic_onset(e[: peak + 1])
    if time_step_s is None:  # k / fs, as before the time step was a parameter (same bits)
        return start + columns / float(sampling_rate_hz)
    return start + columns * step


def _time_step_s(sampling_rate_hz, time_step_s) -> float:
    """Seconds between image columns from exactly one of ``sampling_rate_hz`` and ``time_step_s``."""
    if (sampling_rate_hz is None) == (time_step_s is None):
        raise ValueError("give exactly one of sampling_rate_hz and time_step_s for the image's time "
                         f"grid, got sampling_rate_hz={sampling_rate_hz!r}, time_step_s={time_step_s!r}")
    name, value = (("sampling_rate_hz", sampling_rate_hz) if time_step_s is None
                   else ("time_step_s", time_step_s))
    try:
        number = float(value)
    except (TypeError, ValueError):
        number = float("nan")
    if not (np.isfinite(number) and number > 0):
        raise ValueError(f"{name}={value!r}: must be a positive number")
    return 1.0 / number if time_step_s is None else number


def onset_errors_ms(images, trigger_offset_s, sampling_rate_hz: float) -> dict:
    """How far each image's energy onset falls from its window's trigger onset, ms.

    Parameters
    ----------
    images : (M, C, N) energy densities at ``sampling_rate_hz`` Hz.
    trigger_offset_s : sequence of M floats (s from the window's first sample) or None
        ``Corpus.window_meta[i]["trigger_offset_s"]``; None (or NaN): no trigger in that window.
    sampling_rate_hz : float, Hz

    Returns
    -------
    dict
        ``median_ms`` and ``p90_ms``: median and 90th percentile (``numpy.percentile``, linear) of
        |image onset − trigger onset| over the windows with a trigger, ms; ``windows``: how many
        had one; ``per_window_ms``: the signed difference image onset − trigger onset per window
        (negative: the image's energy starts before the trigger), None where there is no trigger.
        Medians are None when no window has a trigger.
    """
    images = np.asarray(images)
    if images.ndim != 3:
        raise ValueError(f"images must be (M, C, N), got shape {images.shape}")
    offsets = list(trigger_offset_s)
    if len(offsets) != images.shape[0]:
        raise ValueError(f"trigger_offset_s has {len(offsets)} entries for {images.shape[0]} images")
    has = [i for i, t in enumerate(offsets) if t is not None and np.isfinite(float(t))]
    per_window: list[float | None] = [None] * len(offsets)
    if not has:
        return {"median_ms": None, "p90_ms": None, "windows": 0, "per_window_ms": per_window}
    found = image_onsets(images[has], sampling_rate_hz)
    signed = 1e3 * (found - np.array([float(offsets[i]) for i in has]))
    for i, d in zip(has, signed, strict=True):
        per_window[i] = float(d)
    return {**error_summary_ms(found, [float(offsets[i]) for i in has]),
            "per_window_ms": per_window}


def error_summary_ms(onsets_s, trigger_s) -> dict:
    """``median_ms``, ``p90_ms`` (``numpy.percentile``, linear) and ``windows`` of |onset −
    trigger| for paired onsets and trigger onsets (s, equal lengths ≥ 1); the summary that
    :func:`onset_errors_ms` and the search's judgement report."""
    error = 1e3 * np.abs(np.asarray(onsets_s, dtype=np.float64)
                         - np.asarray(trigger_s, dtype=np.float64))
    return {"median_ms": float(np.median(error)), "p90_ms": float(np.percentile(error, 90)),
            "windows": int(error.size)}
