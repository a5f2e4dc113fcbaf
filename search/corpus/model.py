"""Data model of a corpus: the error type, raw traces as read, and the ``Corpus`` result."""
from __future__ import annotations

from collections import Counter
from dataclasses import dataclass, field

import numpy as np

# The rejection reasons a window can get; part of the result, so keep the words stable.
REJECTION_REASONS = ("flat", "non-finite", "clipped", "too short", "duplicate")


class CorpusError(ValueError):
    """A corpus could not be read; the message names the file (or option) and the cause."""


@dataclass
class RawTrace:
    """One trace as a reader returned it, before any processing.

    ``data`` is 1-D in the recorder's units and dtype (counts for miniSEED/SAC integers), shape
    ``(npts,)``. ``start`` is POSIX seconds (UTC) or ``None`` when the format carries no time.
    ``trace_id`` is the SEED id ``NET.STA.LOC.CHA``.
    """

    file: str
    trace_id: str
    sampling_rate_hz: float
    start: float | None
    data: np.ndarray
    # (first sample, file) of each piece when contiguous traces from several files were joined
    parts: list = field(default_factory=list)

    def file_at(self, sample: int) -> str:
        """The file that holds sample ``sample`` of this trace."""
        name = self.file
        for first, f in self.parts:
            if first <= sample:
                name = f
        return name

    @property
    def orientation(self) -> str:
        """SEED orientation code: the last letter of the channel code ('' if there is none)."""
        channel = self.trace_id.split(".")[-1]
        return channel[-1].upper() if channel else ""


@dataclass
class Corpus:
    """Preprocessed burst windows of one site, with everything the reader decided.

    Attributes
    ----------
    windows : ndarray, shape (M, N), float64
        M windows of N samples at ``sampling_rate_hz``, demeaned, detrended, tapered at the trace
        ends, optionally band-passed, resampled to one rate. Units of the recorder (counts).
    sampling_rate_hz : float
        The common sampling rate of every window, Hz.
    window_meta : list of dict, length M
        Per window: ``file``, ``trace_id`` (SEED id), ``start`` (ISO 8601 UTC of the first sample,
        or None when the format has no time), ``offset_s`` (from the start of the trace), for
        burst windows ``triggers`` (how many STA/LTA triggers were merged into it), and
        ``trigger_offset_s`` (s from the window's first sample to its first trigger onset; None
        for ``whole`` and ``sliding`` windows).
    traces : list of dict
        Per contiguous segment read: ``file``, ``trace_id``, ``sampling_rate_hz`` (native),
        ``start``, ``duration_s``, ``windows`` (how many windows it gave).
    rejections : list of dict
        Per rejected window or span: ``file``, ``trace_id``, ``offset_s``, ``reason`` (one of
        ``REJECTION_REASONS``) and ``detail``.
    defaults : dict
        Every choice the reader made (given or derived): rates, STA/LTA kind (``trigger``:
        'boxcar' or 'exponential'), lengths and thresholds, window length, taper, band-pass, cap
        and seed.
    source_hash : str
        sha256 (hex) of the bytes of every file read, concatenated in sorted path order.
    files : list of str
        The files read, in that order.
    skipped : list of dict
        Files met while expanding a folder that are not waveform files (``file``, ``reason``).
    noise_windows : ndarray, shape (K, N), float64, or None
        The site's noise sample: K ≤ 64 noise-only windows of the burst windows' length N,
        processed as they are, in window order; cut from the quiet stretches between triggers
        ('bursts' windowing: at least one window length from every trigger interval, outside the
        taper and the STA/LTA warm-up) and kept as a seeded bottom-k sample of hashed keys salted
        apart from the burst windows'. (0, N) for 'whole' and 'sliding' windowing, or when no
        stretch is free; None when built without a reader. Their rejections are counted in
        ``defaults["noise"]``, not listed in ``rejections``.
    noise_meta : list of dict, length K
        Per noise window: ``file``, ``trace_id``, ``start`` (ISO 8601 UTC or None), ``offset_s``.

    ``defaults["noise"]`` records the noise sample: ``source`` ("quiet stretches between
    triggers", or None with a ``reason``), ``rule`` (in words), ``windows_found`` (noise windows
    placed), ``windows_checked`` (those cut and checked: the ones with the smallest keys),
    ``windows_kept``, ``duration_s`` (kept × window length), ``max_windows`` (the cap) and
    ``rejected_by_reason`` (of the checked ones).
    """

    windows: np.ndarray
    sampling_rate_hz: float
    window_meta: list[dict]
    traces: list[dict]
    rejections: list[dict]
    defaults: dict
    source_hash: str
    files: list[str] = field(default_factory=list)
    skipped: list[dict] = field(default_factory=list)
    noise_windows: np.ndarray | None = None
    noise_meta: list[dict] = field(default_factory=list)

    @property
    def n_windows(self) -> int:
        return int(self.windows.shape[0])

    @property
    def window_samples(self) -> int:
        return int(self.windows.shape[1])

    @property
    def window_s(self) -> float:
        return self.window_samples / self.sampling_rate_hz

    def rejected_by_reason(self) -> dict[str, int]:
        """Count of rejections per reason (only reasons that occurred)."""
        return dict(sorted(Counter(r["reason"] for r in self.rejections).items()))

    def to_json(self) -> dict:
        """JSON-ready summary for diagnostics and provenance (no samples)."""
        return {
            "n_windows": self.n_windows,
            "window_samples": self.window_samples,
            "window_s": self.window_s,
            "sampling_rate_hz": self.sampling_rate_hz,
            "source_hash": self.source_hash,
            "files": list(self.files),
            "skipped": [dict(s) for s in self.skipped],
            "traces": [dict(t) for t in self.traces],
            "window_meta": [dict(w) for w in self.window_meta],
            "rejections": [dict(r) for r in self.rejections],
            "rejected_by_reason": self.rejected_by_reason(),
            "defaults": dict(self.defaults),
            "noise_meta": [dict(w) for w in self.noise_meta],
        }
