"""STA/LTA triggers and window placement: pure numpy functions on 1-D float64 arrays.

STA/LTA (Allen, "Automatic earthquake recognition and timing from single traces", BSSA 68(5),
1978; Trnkoczy, "Understanding and parameter setting of STA/LTA trigger algorithm", New Manual of
Seismological Observatory Practice 2 (NMSOP-2), information sheet IS 8.1, 2012): the
characteristic function is the ratio of a short-term to a long-term average of x², either
equal-weight moving averages ('boxcar') or exponentially weighted ones ('exponential'). The
conventions (trailing windows, zeros during the LTA warm-up, the exponential form's initial state)
are those of ``obspy.signal.trigger``, which the tests use as the reference.
"""
from __future__ import annotations

import numpy as np
from scipy import signal

_CHUNK = 1 << 15
_TINY = np.finfo(np.float64).tiny


def moving_sum(x: np.ndarray, n: int) -> np.ndarray:
    """Trailing sum of the last ``n`` samples, ``y[i] = Σ x[max(0, i−n+1) .. i]``, shape of x.

    Cumulative sums per block of some 32 k samples (not over the whole trace), so a quiet stretch
    long after a strong event does not lose precision to cancellation between two huge partial
    sums.
    """
    out = np.empty(x.size, dtype=np.float64)
    block = max(_CHUNK, 4 * n)
    for s in range(0, x.size, block):
        e = min(s + block, x.size)
        lo = max(0, s - n)
        c = np.cumsum(x[lo:e], dtype=np.float64)  # c[j] = Σ x[lo .. lo + j]
        part = out[s:e]
        part[:] = c[s - lo:]
        j0 = s - n - lo  # index in c of the sum to subtract for i = s
        if j0 >= 0:
            part -= c[j0: j0 + (e - s)]
        elif e > n:  # only in the first block: nothing to subtract before sample n
            part[-j0:] -= c[: e - n]
    return out


def boxcar_sta_lta(x: np.ndarray, nsta: int, nlta: int) -> np.ndarray:
    """STA/LTA of ``x`` (shape (n,)) with equal-weight trailing averages, STA and LTA lengths in
    samples; shape (n,).

    ``sta[i] = mean(x²[i−nsta+1..i])``, ``lta[i] = mean(x²[i−nlta+1..i])``, the first nlta−1
    values are 0 (warm-up), and an LTA below the smallest normal float is replaced by it.
    """
    x2 = np.square(x, dtype=np.float64)
    sta = moving_sum(x2, nsta)
    sta /= nsta
    lta = moving_sum(x2, nlta)
    del x2
    lta /= nlta
    sta[: nlta - 1] = 0.0
    np.maximum(lta, _TINY, out=lta)
    sta /= lta
    return sta


def exponential_sta_lta(x: np.ndarray, nsta: int, nlta: int) -> np.ndarray:
    """STA/LTA of ``x`` (shape (n,)) with exponentially weighted averages, the one-pole recursions
    ``s[i] = c·x²[i] + (1−c)·s[i−1]`` with c = 1/nsta (and 1/nlta), started from 0 (LTA from the
    smallest normal float) at i = 0; the first nlta values are 0. Shape (n,)."""
    x2 = np.square(x, dtype=np.float64)
    x2[0] = 0.0  # the recursion starts at i = 1
    csta, clta = 1.0 / nsta, 1.0 / nlta
    sta = signal.lfilter([csta], [1.0, csta - 1.0], x2)
    lta = signal.lfilter([clta], [1.0, clta - 1.0], x2, zi=[_TINY * (1.0 - clta)])[0]
    lta[0] = _TINY
    cf = sta / lta
    cf[:nlta] = 0.0
    return cf


def trigger_intervals(cf: np.ndarray, on: float, off: float) -> np.ndarray:
    """Trigger (on, off) sample pairs, shape (K, 2) int64, for ``off ≤ on``.

    A trigger switches on at the first sample with cf ≥ ``on`` and off at the last sample of the
    run of cf ≥ ``off`` that contains it (inclusive); the same pairs as
    ``obspy.signal.trigger.trigger_onset`` without a maximum length.
    """
    above_on = np.flatnonzero(cf >= on)
    if above_on.size == 0:
        return np.empty((0, 2), dtype=np.int64)
    above_off = cf >= off
    edges = np.diff(np.concatenate(([0], above_off.view(np.int8), [0])))
    run_start = np.flatnonzero(edges == 1)
    run_stop = np.flatnonzero(edges == -1) - 1
    run_of = np.searchsorted(run_start, above_on, side="right") - 1
    runs, first = np.unique(run_of, return_index=True)
    return np.column_stack((above_on[first], run_stop[runs])).astype(np.int64)


def fast_length(n: float, mode: str = "ceil") -> int:
    """A power of two near ``n`` (the fastest FFT size): the smallest ≥ n ('ceil') or the closest
    in log scale ('nearest'); at least 2."""
    n = max(float(n), 2.0)
    k = np.log2(n)
    return int(2 ** (np.ceil(k - 1e-12) if mode == "ceil" else np.round(k)))


def dominant_frequency(segments: list[np.ndarray], fs: float, nfft: int = 256) -> tuple[float | None, dict]:
    """Frequency of the transients, Hz: centroid of the loud frames' excess power.

    Frames of ``nfft`` samples (Hann, no overlap) are Fourier transformed; the noise spectrum is the
    median over frames, the transient spectrum the mean of the frames with more than 8 × the median
    frame energy (at most the loudest 5 %), and the dominant frequency the centroid of their
    positive difference, each loud frame normalised to unit excess power. Stationary lines (fans, power-line
    hum) sit in the median and cancel. Returns (None, info) when no frame stands out.
    """
    frames = [x[: (x.size // nfft) * nfft].reshape(-1, nfft) for x in segments if x.size >= nfft]
    if not frames:
        return None, {"frames": 0}
    energies = [np.einsum("ij,ij->i", f, f) for f in frames]
    energy = np.concatenate(energies)
    loud_cut = max(8.0 * np.median(energy), np.quantile(energy, 0.95))
    if not np.any(energy > loud_cut):
        return None, {"frames": int(energy.size)}
    # gather the loud frames, and a spread-out subset for the noise, without copying whole traces
    total = energy.size
    step = max(1, total // 4096)
    loud_frames, quiet_frames, offset = [], [], 0
    for f, e in zip(frames, energies, strict=True):
        loud_frames.append(f[e > loud_cut])
        first = (-offset) % step
        quiet_frames.append(f[first::step])
        offset += f.shape[0]
    win = np.hanning(nfft)
    loud = np.abs(np.fft.rfft(np.concatenate(loud_frames) * win, axis=1)) ** 2
    noise = np.median(np.abs(np.fft.rfft(np.concatenate(quiet_frames) * win, axis=1)) ** 2, axis=0)
    # each loud frame counts once, whatever its energy: normalise its excess to unit sum
    excess = np.clip(loud - noise, 0.0, None)
    totals = excess.sum(axis=1, keepdims=True)
    excess = (excess[totals[:, 0] > 0] / totals[totals[:, 0] > 0]).mean(axis=0) if np.any(totals > 0) else np.zeros(1)
    freqs = np.fft.rfftfreq(nfft, 1.0 / fs)
    if not excess.sum() > 0:
        return None, {"frames": int(total)}
    return float(np.sum(freqs * excess) / excess.sum()), {"frames": int(total), "loud_frames": int(loud.shape[0])}


def burst_durations(onsets: np.ndarray, gap: int) -> np.ndarray:
    """Durations in samples of bursts: triggers less than ``gap`` samples apart (off to next on,
    e.g. the P and S triggers of one event) form one burst, from its first on to its last off."""
    if len(onsets) == 0:
        return np.empty(0, dtype=np.int64)
    new = np.concatenate(([True], onsets[1:, 0] - onsets[:-1, 1] > gap))
    first = np.flatnonzero(new)
    last = np.concatenate((first[1:] - 1, [len(onsets) - 1]))
    return onsets[last, 1] - onsets[first, 0] + 1


def place_burst_windows(onsets: np.ndarray, n: int, window: int, pre: int, guard: int):
    """Start samples of fixed windows around trigger onsets, merging triggers that overlap.

    Each window starts ``pre`` samples before its first trigger; a trigger that falls inside the
    current window is merged into it. Windows are moved inward to keep ``guard`` samples (the taper)
    from the segment ends (onsets inside the guards are the caller's to drop). Returns (starts,
    merged_counts, too_short_onsets).
    """
    starts, counts, short = [], [], []
    lo, hi = guard, n - guard - window
    for on in onsets:
        if starts and on < starts[-1] + window:
            counts[-1] += 1
            continue
        if hi < lo:
            short.append(int(on))
            continue
        start = int(min(max(on - pre, lo), hi))
        if starts and start < starts[-1] + window:
            # moved inward onto its predecessor: the same burst
            counts[-1] += 1
            continue
        starts.append(start)
        counts.append(1)
    return starts, counts, short


def sliding_starts(n: int, window: int, hop: int, guard: int) -> list[int]:
    """Start samples of windows of ``window`` samples every ``hop`` samples inside the guards."""
    last = n - guard - window
    return list(range(guard, last + 1, hop)) if last >= guard else []


def rejection_reason(raw: np.ndarray, processed: np.ndarray, clip_run: int = 3) -> str | None:
    """Why a window is unusable, or None. ``raw``: native samples of its span; ``processed``: the
    window as it would enter the corpus.

    'non-finite' (NaN/Inf after processing), 'flat' (raw peak-to-peak 0), 'clipped' (the raw peak
    absolute value held for ≥ ``clip_run`` consecutive samples: the flat top of a saturated
    digitiser, common practice).
    """
    if not np.all(np.isfinite(processed)) or (raw.dtype.kind == "f" and not np.all(np.isfinite(raw))):
        return "non-finite"
    if raw.size == 0 or raw.max() == raw.min() or not np.any(processed):
        return "flat"
    a = np.abs(raw.astype(np.float64))
    at_peak = (a == a.max()).view(np.int8)
    if clip_run > 1 and at_peak.sum() >= clip_run:
        run = np.convolve(at_peak, np.ones(clip_run, dtype=np.int8), mode="valid")
        if run.max() >= clip_run:
            return "clipped"
    return None
