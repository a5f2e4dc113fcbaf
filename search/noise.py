"""The site's steady sound: the lines that are in every window, found and removed before scoring.

Steady lines — mains hum and its harmonics, pumps, fans, rotating machinery — have the same
frequency all through a record and carry most of the energy at many sites. Scored whole, a
window is then judged by how sharply it draws the lines, not the bursts (a long window draws a
line sharply and smears a burst). So the search removes them from every window first, the way
powerline harmonics are subtracted from geophysical records: a least-squares fit of a sinusoid
at each line frequency, with a linear change of amplitude and phase across the window, is
subtracted in the time domain (D. E. Butler, R. D. Russell, "Subtraction of powerline harmonics
from geophysical records", Geophysics 58(6), 1993; from memory). The linear terms absorb a
small error in the line's frequency or a slow drift of its amplitude. What the fit takes from a
burst is a notch about 2/T wide (T the window length) at each line.

Lines are found in the median over windows of periodograms tapered by the 4-term
Blackman–Harris window (sidelobes 92 dB down, so a strong line's sidelobes are not taken for
lines of their own; F. J. Harris, "On the use of windows for harmonic analysis with the
discrete Fourier transform", Proc. IEEE 66(1), 1978), zero-padded ``ZERO_PAD`` times. A line is
a local maximum at least ``LINE_RATIO`` above the running median of the spectrum around it
(common practice for narrow-band interference), no wider than ``MAX_WIDTH_BINS`` resolution
bins at half its height, and, when found in burst windows, steady through them
(:func:`steadiness`: a long narrow-band burst repeated in many windows is as narrow). Its frequency is refined by a
parabola through the logarithms of the three highest points (exact for a Gaussian peak, close
to it for the main lobe). The median over windows keeps a line that is in most windows and
ignores a burst, which is in one window at a time.

What is left — the coloured background — is handled by the criterion: each channel's level
over time in each window is its floor (``search.criteria.burst_excess``).

Units: s, Hz, samples; windows are (M, N) real arrays at ``fs`` Hz.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

LINE_RATIO = 10.0          # a line stands 10 dB above the spectrum around it
BACKGROUND_BINS = 48       # the running median spans this many resolution bins (fs/N each),
                           # several times the taper's main lobe (8 bins)
MAX_WIDTH_BINS = 3.0       # a steady line is no wider than this at half height (taper: 1.9)
ZERO_PAD = 8               # spectrum points per resolution bin
MAX_LINES = 48             # the strongest this many lines are removed
MIN_WINDOWS = 4            # windows of one trace needed to look for its lines
MERGE_BINS = 2.0           # lines closer than this (resolution bins) are one line
RANK_TOL = 1e-8            # singular values below this share of the largest span nothing new
ENVELOPE_DIVISOR = 32      # the robust fit's energy envelope averages N/32 samples
QUARTERS = 4               # a line's steadiness compares its amplitude in this many parts
MIN_STEADINESS = 0.35      # in a window a line's quietest part is over a third of its loudest


@dataclass(frozen=True)
class SteadyLines:
    """Steady lines of a site and how they were found.

    ``lines_hz`` (L,) frequencies, Hz, ascending; ``levels_db`` (L,) each line's height over
    the spectrum around it (dB of power); ``source`` the windows they were found in (words);
    ``windows`` how many. :meth:`remove` subtracts them from windows.
    """

    lines_hz: tuple
    levels_db: tuple
    source: str
    windows: int

    def remove(self, windows, sampling_rate_hz: float) -> np.ndarray:
        """:func:`remove_lines` with these lines."""
        return remove_lines(windows, sampling_rate_hz, self.lines_hz)

    def to_json(self) -> dict:
        return {"lines_hz": [round(float(f), 6) for f in self.lines_hz],
                "levels_db": [round(float(v), 2) for v in self.levels_db],
                "found_in": self.source, "windows": int(self.windows),
                "rule": f"local maxima {10 * math.log10(LINE_RATIO):g} dB above the running "
                        f"median ({BACKGROUND_BINS} bins) of the median Blackman–Harris "
                        f"periodogram, at "
                        f"most {MAX_WIDTH_BINS:g} bins wide at half height; removed by a "
                        "least-squares sinusoid with linear amplitude change per window"}


def median_spectrum(windows, sampling_rate_hz: float) -> tuple[np.ndarray, np.ndarray]:
    """(frequencies (F,) Hz, power (F,)) : the median over windows of their Blackman–Harris
    periodograms, zero-padded to ``ZERO_PAD`` × N points (one-sided, 0 … fs/2, arbitrary units)."""
    from scipy.signal.windows import blackmanharris

    x = np.atleast_2d(np.asarray(windows, dtype=np.float64))
    n = x.shape[1]
    taper = blackmanharris(n, sym=False)
    nfft = ZERO_PAD * n
    power = np.median(np.abs(np.fft.rfft(x * taper, n=nfft, axis=1)) ** 2, axis=0)
    return np.fft.rfftfreq(nfft, 1.0 / float(sampling_rate_hz)), power


def find_lines(windows, sampling_rate_hz: float, source: str = "the windows",
               quiet: bool = False) -> SteadyLines:
    """Steady lines of (M, N) ``windows`` at ``sampling_rate_hz`` (module docstring's rule).
    ``quiet``: the windows are noise windows (no bursts), so a narrow peak needs no test of
    steadiness (in a few short windows the background makes a line's parts unequal).

    Returns at most ``MAX_LINES`` lines, the highest first kept; frequencies at least four
    resolution bins from 0 and fs/2. No window: no lines.
    """
    from scipy.ndimage import median_filter

    x = np.atleast_2d(np.asarray(windows, dtype=np.float64))
    if x.shape[0] == 0 or x.shape[1] < 16:
        return SteadyLines((), (), source, int(x.shape[0]))
    fs = float(sampling_rate_hz)
    freqs, power = median_spectrum(x, fs)
    floor = np.maximum(median_filter(power, size=BACKGROUND_BINS * ZERO_PAD + 1, mode="nearest"),
                       np.finfo(float).tiny)
    ratio = power / floor
    edge = 4 * ZERO_PAD
    k = np.arange(edge, power.size - edge)
    peaks = k[(ratio[k] >= LINE_RATIO) & (power[k] >= power[k - 1]) & (power[k] > power[k + 1])]
    found = []
    for p in peaks:
        half = power[p] / 2.0
        lo = p
        while lo > 0 and power[lo - 1] >= half:
            lo -= 1
        hi = p
        while hi < power.size - 1 and power[hi + 1] >= half:
            hi += 1
        if (hi - lo + 1) / ZERO_PAD > MAX_WIDTH_BINS:
            continue            # broad: a resonance of the bursts or the background, not a line
        y0, y1, y2 = np.log(power[p - 1:p + 2])
        denom = y0 - 2.0 * y1 + y2
        shift = 0.5 * (y0 - y2) / denom if denom < 0 else 0.0
        found.append((float(ratio[p]), float(freqs[p] + shift * (freqs[1] - freqs[0]))))
    kept: list[tuple[float, float]] = []
    resolution = fs / x.shape[1]
    if not quiet:
        found = [(level, f) for level, f in found if steadiness(x, fs, f) >= MIN_STEADINESS]
    for level, f in sorted(found, reverse=True):
        if len(kept) < MAX_LINES and all(abs(f - g) >= MERGE_BINS * resolution for _, g in kept):
            kept.append((level, f))
    kept.sort(key=lambda item: item[1])
    return SteadyLines(tuple(f for _, f in kept), tuple(10 * math.log10(v) for v, _ in kept),
                       source, int(x.shape[0]))


def steadiness(windows, sampling_rate_hz: float, frequency_hz: float) -> float:
    """How steady a component at ``frequency_hz`` is through the windows, in [0, 1].

    Each window is cut in ``QUARTERS`` equal parts; in each, the amplitude at the frequency is
    the modulus of the Blackman–Harris-tapered Fourier sum there. A window's value is its
    smallest part's amplitude over its largest; the result is the median over windows. A line
    that sounds all through a window gives about 1; a burst, loud in one part, far less. What
    this separates is a long narrow-band burst that repeats in many windows (as loud in the
    median spectrum as a line, and as narrow) from sound that never stops.
    """
    from scipy.signal.windows import blackmanharris

    x = np.atleast_2d(np.asarray(windows, dtype=np.float64))
    part = x.shape[1] // QUARTERS
    t = np.arange(part * QUARTERS) / float(sampling_rate_hz)
    carrier = np.exp(-2j * np.pi * frequency_hz * t).reshape(QUARTERS, part)
    parts = x[:, :part * QUARTERS].reshape(len(x), QUARTERS, part)
    amp = np.abs(np.sum(parts * (carrier * blackmanharris(part, sym=False)), axis=2))
    top = amp.max(axis=1)
    ratio = np.where(top > 0, amp.min(axis=1) / np.where(top > 0, top, 1.0), 0.0)
    return float(np.median(ratio))


def line_basis(n_samples: int, sampling_rate_hz: float, lines_hz) -> np.ndarray:
    """(N, 4L) float64: cos, sin, τ·cos and τ·sin at each line, τ ∈ [−½, ½) across the window
    (the linear terms let amplitude and phase change linearly through the window)."""
    t = np.arange(n_samples) / float(sampling_rate_hz)
    tau = (np.arange(n_samples) - n_samples / 2.0) / n_samples
    cols = []
    for f in lines_hz:
        c, s = np.cos(2 * np.pi * f * t), np.sin(2 * np.pi * f * t)
        cols += [c, s, tau * c, tau * s]
    return np.stack(cols, axis=1) if cols else np.zeros((n_samples, 0))


def remove_lines(windows, sampling_rate_hz: float, lines_hz) -> np.ndarray:
    """Windows less a robust least-squares fit on :func:`line_basis` (Butler & Russell 1993).

    ``windows`` (M, N) or (N,) real; returns float64 of the same shape (a copy; the input when
    there are no lines). A plain fit would take a burst's own energy at a line's frequency with
    the line; so the fit is weighted, in two passes (iteratively reweighted least squares,
    P. W. Holland, R. E. Welsch, "Robust regression using iteratively reweighted
    least-squares", Commun. Stat. 6(9), 1977): after a plain fit, each sample's weight is
    ``min(1, (median e / e)²)`` with ``e`` the residual's energy in a moving window of
    ``N / ENVELOPE_DIVISOR`` samples, so the line is fitted where the window is quiet and
    subtracted everywhere, and the burst keeps its energy at the line's frequency.
    """
    from scipy.ndimage import uniform_filter1d

    x = np.asarray(windows, dtype=np.float64)
    if len(lines_hz) == 0 or x.size == 0:
        return x
    flat = np.atleast_2d(x)
    basis = line_basis(flat.shape[1], sampling_rate_hz, lines_hz)
    u, sv, _ = np.linalg.svd(basis, full_matrices=False)
    u = u[:, sv > RANK_TOL * sv[0]]          # an orthonormal basis of the same span
    plain = flat - (flat @ u) @ u.T
    width = max(1, flat.shape[1] // ENVELOPE_DIVISOR)
    energy = uniform_filter1d(plain * plain, width, axis=1, mode="nearest")
    typical = np.median(energy, axis=1, keepdims=True)
    with np.errstate(divide="ignore", invalid="ignore"):
        weight = np.where(energy > typical, (typical / energy) ** 2, 1.0)
    weight = np.nan_to_num(weight, nan=1.0)
    gram = np.einsum("nk,mn,nl->mkl", u, weight, u)           # (M, K, K) = Uᵀ W U per window
    rhs = np.einsum("nk,mn->mk", u, weight * flat)
    coef = np.linalg.solve(gram + RANK_TOL * np.eye(u.shape[1]), rhs[..., None])[..., 0]
    cleaned = flat - coef @ u.T
    return cleaned.reshape(x.shape)


def _grouped(windows, meta) -> list[np.ndarray]:
    """``windows`` split by the SEED id of their ``meta`` entries (one group when unknown)."""
    ids = [m.get("trace_id") if isinstance(m, dict) else None for m in (meta or [])]
    if len(ids) != len(windows) or not any(ids):
        return [windows]
    groups: dict = {}
    for i, trace in enumerate(ids):
        groups.setdefault(trace, []).append(i)
    return [windows[np.asarray(groups[k])] for k in sorted(groups, key=str)]


def union(found: list[SteadyLines], source: str, merge_hz: float) -> SteadyLines:
    """The lines of several traces as one set: lines closer than ``merge_hz`` are one (the
    highest level kept), at most ``MAX_LINES`` of the
    highest, ascending. Removing a line from a trace that lacks it costs only its notch (and
    the robust fit keeps a burst's energy there), so every window loses the union."""
    items = sorted(((lv, f) for s in found for f, lv in zip(s.lines_hz, s.levels_db, strict=True)),
                   reverse=True)
    windows = sum(s.windows for s in found)
    kept: list[tuple[float, float]] = []
    for level, f in items:
        if len(kept) < MAX_LINES and all(abs(f - g) >= merge_hz for _, g in kept):
            kept.append((level, f))
    kept.sort(key=lambda item: item[1])
    return SteadyLines(tuple(f for _, f in kept), tuple(lv for lv, _ in kept), source, windows)


def site_lines(corpus) -> SteadyLines:
    """The steady lines of a corpus, found trace by trace (each station and component has its
    own fans and pickup) and united (:func:`union`): in its noise windows when it has at least
    ``MIN_WINDOWS`` of them (quiet stretches between triggers, ``Corpus.noise_windows``), else
    in its burst windows."""
    noise = getattr(corpus, "noise_windows", None)
    fs = float(corpus.sampling_rate_hz)
    if noise is not None and len(noise) >= MIN_WINDOWS:
        windows, meta = noise, getattr(corpus, "noise_meta", None)
        source = "noise windows (quiet stretches between triggers), trace by trace"
    else:
        windows, meta = np.asarray(corpus.windows), getattr(corpus, "window_meta", None)
        source = "the burst windows (median over windows), trace by trace"
    groups = [g for g in _grouped(np.asarray(windows, dtype=np.float64), meta)
              if len(g) >= MIN_WINDOWS] or [np.asarray(windows, dtype=np.float64)]
    quiet = windows is noise
    return union([find_lines(g, fs, source, quiet) for g in groups], source,
                 MERGE_BINS * fs / np.asarray(windows).shape[1])
