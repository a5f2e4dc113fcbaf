"""Preprocessing of raw traces: joining contiguous pieces, gap splitting, demean, linear detrend,
cosine taper, zero-phase band-pass and polyphase resampling to one common rate. Pure functions on
1-D float64 arrays."""
from __future__ import annotations

from collections import Counter
from fractions import Fraction

import numpy as np
from scipy import signal

from burstlens.search.corpus.model import CorpusError, RawTrace

# Two rates closer than this (relative) are the same rate written by different clocks.
SAME_RATE_TOLERANCE = 1e-5
MAX_POLYPHASE_FACTOR = 1000
# Default upsampling limit when the common rate was not asked for: beyond ×2 the traces are
# from instruments too different to share one filterbank.
MAX_DEFAULT_UPSAMPLING = 2.0
TAPER_FRACTION = 0.05
TAPER_MAX_S = 1.0
BANDPASS_ORDER = 4


def select_components(traces: list[RawTrace], components) -> list[RawTrace]:
    """Keep traces whose SEED orientation code (last letter of the channel) is in ``components``."""
    if components is None:
        return traces
    wanted = {c.upper() for c in (components if not isinstance(components, str) else list(components))}
    kept = [tr for tr in traces if tr.orientation in wanted]
    if not kept:
        found = sorted({tr.orientation or "none" for tr in traces})
        raise CorpusError(
            f"components={components!r}: no trace has orientation code(s) {''.join(sorted(wanted))} "
            f"among {len(traces)} traces (codes found: {', '.join(found)})"
        )
    return kept


def join_contiguous(traces: list[RawTrace]) -> list[RawTrace]:
    """Join traces of the same SEED id and rate that continue one another (the next starts within
    half a sample of where the previous ends), e.g. hourly files of one channel. Order is kept."""
    out: list[RawTrace] = []
    open_ends: dict[tuple, RawTrace] = {}
    for tr in traces:
        key = (tr.trace_id, tr.sampling_rate_hz)
        prev = open_ends.get(key)
        if (prev is not None and prev.start is not None and tr.start is not None
                and prev.data.dtype.kind == tr.data.dtype.kind
                and abs(tr.start - (prev.start + prev.data.size / prev.sampling_rate_hz)) < 0.5 / tr.sampling_rate_hz):
            if not prev.parts:
                prev.parts = [(0, prev.file)]
            prev.parts.append((prev.data.size, tr.file))
            prev.data = np.concatenate((prev.data, tr.data))
            continue
        out.append(tr)
        open_ends[key] = tr
    return out


def finite_runs(data: np.ndarray) -> list[tuple[int, int]]:
    """Half-open index ranges [start, stop) of the runs of finite samples in ``data``."""
    finite = np.isfinite(data) if data.dtype.kind == "f" else np.ones(data.shape, bool)
    if finite.all():
        return [(0, data.size)]
    edges = np.diff(np.concatenate(([0], finite.view(np.int8), [0])))
    starts = np.flatnonzero(edges == 1)
    stops = np.flatnonzero(edges == -1)
    return list(zip(starts.tolist(), stops.tolist(), strict=True))


def choose_rate(rates: list[float], requested: float | None) -> tuple[float, str]:
    """The common rate: the requested one, else the most common native rate (ties: the highest)."""
    if requested is not None:
        return float(requested), "requested"
    counts = Counter(rates)
    best = max(counts.items(), key=lambda kv: (kv[1], kv[0]))[0]
    return float(best), "most common native rate" if len(counts) > 1 else "native rate"


def resampling_factors(native_hz: float, target_hz: float) -> tuple[int, int]:
    """Integers (up, down) with native·up/down = target; (1, 1) for the same rate.

    Raises ValueError when no ratio with both factors ≤ 1000 reproduces the rate to 1e-6.
    """
    ratio = target_hz / native_hz
    if abs(ratio - 1.0) < SAME_RATE_TOLERANCE:
        return 1, 1
    frac = Fraction(ratio).limit_denominator(MAX_POLYPHASE_FACTOR)
    if frac.numerator > MAX_POLYPHASE_FACTOR or abs(float(frac) - ratio) > 1e-6 * ratio:
        raise ValueError(f"no polyphase ratio up/down ≤ {MAX_POLYPHASE_FACTOR} maps {native_hz} Hz to {target_hz} Hz")
    return frac.numerator, frac.denominator


def check_rates(segments, target_hz: float, how: str) -> None:
    """Raise CorpusError if some segment's rate cannot be brought to ``target_hz``."""
    for seg in segments:
        try:
            resampling_factors(seg.native_rate_hz, target_hz)
        except ValueError as exc:
            raise CorpusError(f"{seg.file}: mixed sampling rates cannot be reconciled: {exc}") from None
        if how != "requested" and target_hz > MAX_DEFAULT_UPSAMPLING * seg.native_rate_hz * (1 + SAME_RATE_TOLERANCE):
            raise CorpusError(
                f"{seg.file}: mixed sampling rates cannot be reconciled: trace {seg.trace_id} at "
                f"{seg.native_rate_hz:g} Hz would need upsampling ×{target_hz / seg.native_rate_hz:g} to the "
                f"{how} {target_hz:g} Hz; pass sampling_rate_hz to choose the common rate, or read these files apart"
            )


def _dot(a: np.ndarray, b: np.ndarray, block: int = 1 << 16) -> float:
    """Σ a·b by numpy's pairwise sums over fixed blocks, not BLAS dot: the same bits whatever
    the thread count (a corpus read by a worker with other thread settings gives the same
    windows), and no temporary longer than one block."""
    return float(sum((a[i:i + block] * b[i:i + block]).sum() for i in range(0, a.size, block)))


def demean_detrend(x: np.ndarray) -> np.ndarray:
    """Remove the least-squares line a + b·n from ``x`` (float64, in place, returned)."""
    n = x.size
    mean = x.mean()
    x -= mean
    if n > 1:
        t = np.arange(n, dtype=np.float64)
        t -= (n - 1) / 2.0
        slope = _dot(t, x) / _dot(t, t)
        t *= slope
        x -= t
    return x


def taper_length(n: int, fs: float, fraction: float = TAPER_FRACTION, max_s: float = TAPER_MAX_S) -> int:
    """Samples per side of the cosine taper: ``fraction`` of the segment, at most ``max_s``."""
    return int(min(fraction * n, max_s * fs))


def cosine_taper(x: np.ndarray, m: int) -> np.ndarray:
    """Multiply the first and last ``m`` samples by a half-cosine (Hann) ramp, in place."""
    return taper_ends(x, 0, x.size, m)


def taper_ends(x: np.ndarray, first: int, n: int, m: int) -> np.ndarray:
    """:func:`cosine_taper` of a segment of ``n`` samples applied to the part of it that ``x``
    holds, ``segment[first : first + x.size]``, in place: the same factors on the same samples as
    tapering the whole segment, so a segment processed in pieces is tapered as one."""
    if m > 0:
        ramp = 0.5 * (1.0 - np.cos(np.pi * np.arange(m) / m))
        head = min(m, first + x.size) - first
        if head > 0:
            x[:head] *= ramp[first: first + head]
        lo = max(first, n - m)
        if lo < first + x.size:
            x[lo - first:] *= ramp[::-1][lo - (n - m):first + x.size - (n - m)]
    return x


def bandpass_sos(band_hz, fs: float) -> np.ndarray:
    """Butterworth SOS (order 4 per pass) for ``band_hz`` = (low, high) Hz; low 0 is a low-pass.

    Raises CorpusError naming ``bandpass_hz`` when the band does not fit 0 ≤ low < high < fs/2.
    """
    try:
        low, high = (float(v) for v in band_hz)
    except (TypeError, ValueError):
        raise CorpusError(f"bandpass_hz={band_hz!r}: expected two numbers (low, high) in Hz") from None
    nyquist = fs / 2.0
    if not (0.0 <= low < high < nyquist):
        raise CorpusError(f"bandpass_hz={band_hz!r}: need 0 ≤ low < high < Nyquist {nyquist:g} Hz")
    if low == 0.0:
        return signal.butter(BANDPASS_ORDER, high, btype="lowpass", fs=fs, output="sos")
    return signal.butter(BANDPASS_ORDER, [low, high], btype="bandpass", fs=fs, output="sos")


def zero_phase(sos: np.ndarray, x: np.ndarray) -> np.ndarray:
    """Forward-backward (zero-phase) SOS filtering, ``scipy.signal.sosfiltfilt``; short inputs
    get a shorter edge padding."""
    padlen = min(3 * (2 * len(sos) + 1), x.size - 1)
    return signal.sosfiltfilt(sos, x, padlen=max(padlen, 0))
