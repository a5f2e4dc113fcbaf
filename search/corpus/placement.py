"""Where the windows go: the data-chosen defaults (dominant frequency, STA/LTA lengths, window
length) and each segment's window placements, from passes over the processed pieces.

'bursts': a survey pass gives the dominant frequency of the transients (hence STA/LTA lengths and
the trigger band), a triggering pass the STA/LTA trigger intervals of every segment (state carried
from piece to piece), and from their durations the window length. 'sliding': the survey pass, then
windows every hop. 'whole': a pass finds each long segment's energy peak.

Noise windows ('bursts' only): windows of the burst windows' length tiling the quiet stretches
between triggers (:func:`noise_starts`); of those, the ``NOISE_CANDIDATES`` with the smallest
sampling keys are placed for the cutting pass (:func:`noise_candidates`), which keeps
``NOISE_WINDOWS`` of them.
"""
from __future__ import annotations

import hashlib

import numpy as np

from burstlens.search.corpus import preprocess, windowing
from burstlens.search.corpus.cutting import NOISE_SALT, Placement, window_keys
from burstlens.search.corpus.model import CorpusError
from burstlens.search.corpus.stream import FRAME, describe
from burstlens.search.corpus.survey import SpectrumSurvey

STA_PERIODS = 4.0          # STA ≈ a few dominant periods (Trnkoczy 2012)
LTA_PER_STA = 20.0         # LTA ≈ 10–20 × STA (Trnkoczy 2012)
FALLBACK_FRACTION_OF_FS = 1.0 / 8.0   # dominant frequency when no transient stands out
SLIDING_PERIODS = 128.0    # default sliding window: this many dominant periods
DURATION_QUANTILE = 0.9    # window length covers this quantile of the burst durations
MIN_WINDOW = 64
MAX_WINDOW = 1 << 16
TRIGGER_BAND_FACTOR = 4.0  # trigger on [f_dom / 4, 4 f_dom]
NOISE_WINDOWS = 64         # cap of the noise sample
# noise windows cut and checked: those with the smallest keys, so that the kept ones are the
# bottom-k sample of every acceptable noise window unless more than 15/16 of these are rejected
NOISE_CANDIDATES = 16 * NOISE_WINDOWS
NOISE_BLOCK = 1 << 16      # noise window starts made and hashed at a time
NOISE_SOURCE = "quiet stretches between triggers"
NOISE_RULE = ("windows of the burst windows' length, non-overlapping, at a stride of one window from "
              "the start of each stretch free of every trigger interval widened by one window on each "
              "side ([on − window, off + window]), of the taper at the segment ends and of the STA/LTA "
              "warm-up (the first LTA of each segment, where nothing can trigger)")
NO_NOISE = {
    "whole": "'whole' windows are event files: no quiet stretches between triggers; the search takes "
             "each window's own level over time as its noise floor",
    "sliding": "'sliding' windows tile the records without triggers: no quiet stretches between "
               "triggers are known; the search takes each window's own level over time as its noise floor",
}


def given_window(window_s: float, fs: float) -> int:
    n = int(round(window_s * fs))
    if n < 2:
        raise CorpusError(f"window_s={window_s!r}: shorter than 2 samples at {fs:g} Hz")
    return n


def _stream_key(seg) -> int:
    """A stable integer naming a segment for the spectrum survey's noise sample (from
    ``SegmentInfo.place``: the same however its trace was split into files)."""
    return int.from_bytes(hashlib.sha256(seg.place.encode()).digest()[:8], "little")


def whole_windows(segments, layouts, passes, opts, defaults) -> dict:
    """Each segment is one window; longer ones are cut around their energy peak."""
    fs = defaults["sampling_rate_hz"]
    lengths = [layouts[s.index].n for s in segments]
    if opts["window_s"] is not None:
        n, how = given_window(opts["window_s"], fs), "given"
    elif len(set(lengths)) == 1:
        n, how = lengths[0], "trace length"
    else:
        n, how = int(np.median(lengths)), "median trace length"
    defaults.update(window_samples=n, window_s=n / fs, window_source=how, pre_trigger=opts["pre_trigger"],
                    noise={"source": None, "reason": NO_NOISE["whole"]})
    longer = frozenset(s.index for s in segments if layouts[s.index].n > n)
    peaks = passes.run("preprocessing", energy_peaks, _union, width=max(1, n // 16), indices=longer)
    plans = {}
    for seg in segments:
        size = layouts[seg.index].n
        if size < n:
            plans[seg.index] = [Placement(-1, n)]
            continue
        start = 0
        if size > n:
            top = peaks[seg.index] - n // 32
            start = int(min(max(top - opts["pre_trigger"] * n, 0), size - n))
        plans[seg.index] = [Placement(start, n, 1)]
    return plans


def scan_windows(segments, layouts, passes, files, opts, defaults) -> dict:
    """Burst or sliding windows; defaults for STA/LTA and window length come from the data."""
    fs = defaults["sampling_rate_hz"]
    f_dom, info = passes.run("preprocessing", spectrum_survey, _merged, fs=fs).result()
    source = "transient excess spectrum"
    if f_dom is None:
        f_dom, source = fs * FALLBACK_FRACTION_OF_FS, "fallback fs/8 (no transient stands out)"
    f_dom = float(min(max(f_dom, fs / 100.0), fs / 4.0))
    defaults.update(dominant_frequency_hz=round(f_dom, 3), dominant_frequency_source=source,
                    dominant_frequency_loud_frames=info.get("loud_frames", 0))
    pre = opts["pre_trigger"]
    if opts["windowing"] == "sliding":
        if opts["window_s"] is not None:
            n, how = given_window(opts["window_s"], fs), "given"
        else:
            n = int(np.clip(windowing.fast_length(SLIDING_PERIODS * fs / f_dom, "nearest"), MIN_WINDOW, MAX_WINDOW))
            how = f"{SLIDING_PERIODS:g} dominant periods, rounded to a power of two samples"
        hop = int(round(opts["hop_s"] * fs)) if opts["hop_s"] is not None else max(1, n // 2)
        defaults.update(window_samples=n, window_s=n / fs, window_source=how, hop_samples=hop, hop_s=hop / fs,
                        noise={"source": None, "reason": NO_NOISE["sliding"]})
        plans = {}
        for seg in segments:
            layout = layouts[seg.index]
            starts = windowing.sliding_starts(layout.n, n, hop, layout.taper)
            plans[seg.index] = [Placement(s, n) for s in starts] or [Placement(-1, n)]
        return plans

    sta = opts["sta_s"] if opts["sta_s"] is not None else STA_PERIODS / f_dom
    nsta = max(2, int(round(sta * fs)))
    nlta = int(round(opts["lta_s"] * fs)) if opts["lta_s"] is not None else int(round(LTA_PER_STA * nsta))
    nlta = max(nsta + 1, nlta)
    defaults.update(
        trigger=opts["trigger"], sta_s=nsta / fs, lta_s=nlta / fs, sta_samples=nsta, lta_samples=nlta,
        sta_source="given" if opts["sta_s"] is not None else f"{STA_PERIODS:g} dominant periods",
        lta_source="given" if opts["lta_s"] is not None else f"{LTA_PER_STA:g} × STA",
        trigger_on=opts["trigger_on"], trigger_off=opts["trigger_off"], pre_trigger=pre,
    )
    # The characteristic function sees the transients' band only (common practice: filter before
    # triggering, Trnkoczy 2012), so red background noise and low tonal lines cannot trigger.
    trigger_band = None
    if opts["bandpass_hz"] is None and source == "transient excess spectrum":
        trigger_band = [round(f_dom / TRIGGER_BAND_FACTOR, 3), round(min(f_dom * TRIGGER_BAND_FACTOR, 0.4 * fs), 3)]
    defaults["trigger_band_hz"] = trigger_band
    trigger_sos = preprocess.bandpass_sos(trigger_band, fs) if trigger_band else None
    found = passes.run("triggering", trigger_intervals, _union, sos=trigger_sos, kind=opts["trigger"],
                       nsta=nsta, nlta=nlta, on=opts["trigger_on"], off=opts["trigger_off"],
                       indices=frozenset(s.index for s in segments if layouts[s.index].n > nlta))
    onsets = {}
    for seg in segments:
        o = found.get(seg.index, np.empty((0, 2), dtype=np.int64))
        g, size = layouts[seg.index].taper, layouts[seg.index].n
        onsets[seg.index] = o[(o[:, 0] >= g) & (o[:, 0] < size - g)]  # in the taper: the ramp, not a burst
    n_triggers = int(sum(len(o) for o in onsets.values()))
    defaults["triggers"] = n_triggers
    if n_triggers == 0:
        raise CorpusError(
            f"{describe(files)}: zero usable windows: no triggers above {opts['trigger_on']:g} in "
            f"{len(segments)} traces (STA {nsta / fs:g} s, LTA {nlta / fs:g} s); "
            "try windowing='whole' or 'sliding', or a lower trigger_on"
        )
    durations = np.concatenate([windowing.burst_durations(o, nlta) for o in onsets.values() if len(o)]) / fs
    if opts["window_s"] is not None:
        n, how = given_window(opts["window_s"], fs), "given"
    else:
        target = np.quantile(durations, DURATION_QUANTILE) * fs / (1.0 - pre)
        n = int(np.clip(windowing.fast_length(target, "ceil"), MIN_WINDOW, MAX_WINDOW))
        how = (f"{DURATION_QUANTILE:.0%} quantile of burst durations (triggers within one LTA merged) "
               "/ (1 − pre_trigger), rounded up to a power of two samples")
    defaults.update(
        window_samples=n, window_s=n / fs, window_source=how,
        burst_duration_s={"median": float(np.median(durations)),
                          "q75": float(np.quantile(durations, 0.75)), "max": float(durations.max())},
    )
    plans = {}
    for seg in segments:
        layout, o = layouts[seg.index], onsets[seg.index]
        starts, counts, short = windowing.place_burst_windows(o[:, 0], layout.n, n, int(round(pre * n)),
                                                              layout.taper)
        plan = [Placement(-1, n, len(short))] if short else []
        # the first onset at or after the start: a window clipped at a segment end does not hold
        # its trigger at pre·n, and an earlier trigger merged into the previous window may fall in it
        first = o[np.searchsorted(o[:, 0], starts), 0] if starts else []
        plan += [Placement(s, n, c, int(f) - s) for s, c, f in zip(starts, counts, first, strict=True)]
        plans[seg.index] = plan
    noise, placed = noise_candidates(segments, layouts, found, n, nlta, opts["seed"])
    defaults["noise"] = {"source": NOISE_SOURCE, "rule": NOISE_RULE, "windows_found": placed}
    for index, extra in noise.items():
        plans[index] = sorted(plans[index] + extra, key=lambda p: p.start)
    return plans


def noise_starts(intervals: np.ndarray, window: int, lo: int, hi: int) -> np.ndarray:
    """Start samples of the noise windows of one segment, shape (K,) int64, increasing.

    ``intervals``: the segment's trigger (on, off) pairs, output samples, both inclusive, shape
    (T, 2), sorted and disjoint (``trigger_intervals``). The free stretches are ``[lo, hi)`` less
    every interval widened by ``window`` samples on each side, ``[on − window, off + window]``;
    each free stretch ``[a, b)`` holds the windows starting at a, a + window, … that end by b
    (non-overlapping, a stride of one window). So a noise window keeps at least one window
    length from every trigger, hence never overlaps a burst window placed around it.
    """
    tiling = _NoiseTiling(intervals, window, lo, hi)
    return tiling.starts(np.arange(tiling.count))


class _NoiseTiling:
    """The noise windows of one segment (:func:`noise_starts`) numbered 0 … count − 1 in start
    order, so that a long quiet trace's starts can be made a block at a time: per free stretch
    its first start and the number of the first window in it, shape (T + 1,) each."""

    def __init__(self, intervals: np.ndarray, window: int, lo: int, hi: int):
        self.window = window
        self.first = np.maximum.accumulate(np.concatenate(([lo], intervals[:, 1] + window + 1)))
        free_to = np.minimum(np.concatenate((intervals[:, 0] - window, [hi])), hi)
        counts = np.maximum(free_to - self.first, 0) // window
        self.through = np.cumsum(counts)
        self.before = self.through - counts
        self.count = int(self.through[-1])

    def starts(self, k: np.ndarray) -> np.ndarray:
        """Start samples of the windows numbered ``k`` (shape (K,), each in [0, count)), int64."""
        j = np.searchsorted(self.through, k, side="right")
        return (self.first[j] + (k - self.before[j]) * self.window).astype(np.int64)


def noise_candidates(segments, layouts, intervals: dict, n: int, warmup: int, seed: int) -> tuple[dict, int]:
    """(segment index → noise :class:`Placement` s in start order, noise windows placed).

    Every segment's noise windows (:func:`noise_starts` between the taper guards, after the
    first ``warmup`` samples, with its trigger intervals from ``intervals``) are placed, and of
    them the ``NOISE_CANDIDATES`` with the smallest keys (``window_keys`` salted ``NOISE_SALT``;
    ties by corpus order) are returned for cutting: the same whatever the order or split of the
    files. Memory: the trigger intervals and ``NOISE_BLOCK`` starts at a time, whatever the
    length of the records.
    """
    none = np.empty((0, 2), dtype=np.int64)
    best: list[tuple] = []
    placed = 0
    for seg in segments:
        layout = layouts[seg.index]
        tiling = _NoiseTiling(intervals.get(seg.index, none), n, max(layout.taper, warmup), layout.n - layout.taper)
        placed += tiling.count
        for k0 in range(0, tiling.count, NOISE_BLOCK):
            starts = tiling.starts(np.arange(k0, min(k0 + NOISE_BLOCK, tiling.count)))
            keys = window_keys(seed, seg, starts, NOISE_SALT)
            take = np.argsort(keys, kind="stable")[:NOISE_CANDIDATES]
            best = sorted(best + [(int(keys[i]), seg.index, int(starts[i])) for i in take])[:NOISE_CANDIDATES]
    plans: dict[int, list] = {}
    for _, index, start in sorted(best, key=lambda c: c[1:]):
        plans.setdefault(index, []).append(Placement(start, n, noise=True))
    return plans, placed


# --- passes: each takes the pieces (of the whole corpus, or of one group on a cluster worker) ---

def spectrum_survey(pieces, *, fs: float, on_segment=None) -> SpectrumSurvey:
    """The spectrum survey of the pieces' processed samples (mergeable)."""
    survey = SpectrumSurvey(fs)
    for piece in pieces:
        survey.add(piece.samples, _stream_key(piece.segment), piece.start // FRAME)
        if piece.last and on_segment is not None:
            on_segment()
    return survey


def energy_peaks(pieces, *, width: int, indices: frozenset, on_segment=None) -> dict:
    """Segment index → output sample of the first maximum of the trailing ``width``-sample energy
    (``windowing.EnergyPeak``), for the segments in ``indices``."""
    peaks = {}
    for piece in pieces:
        index = piece.segment.index
        if index in indices:
            peaks.setdefault(index, windowing.EnergyPeak(width)).feed(piece.samples)
        if piece.last and on_segment is not None:
            on_segment()
    return {index: peak.argmax for index, peak in peaks.items()}


def trigger_intervals(pieces, *, sos, kind: str, nsta: int, nlta: int, on: float, off: float,
                      indices: frozenset, on_segment=None) -> dict:
    """Segment index → trigger (on, off) intervals, output samples, shape (K, 2), for the segments
    in ``indices``: STA/LTA and the trigger state run on from piece to piece, so they equal one pass
    over the segment; the trigger band's zero-phase filter runs over each piece's extended range."""
    running, onsets = {}, {}
    for piece in pieces:
        index = piece.segment.index
        if index in indices:
            if index not in running:
                running[index] = (windowing.StreamingStaLta(kind, nsta, nlta), windowing.TriggerTracker(on, off))
                onsets[index] = []
            sta_lta, tracker = running[index]
            x = piece.samples if sos is None else preprocess.zero_phase(sos, piece.extended)[piece.core]
            onsets[index].append(tracker.feed(sta_lta(x)))
            if piece.last:
                onsets[index].append(tracker.close())
        if piece.last and on_segment is not None:
            on_segment()
    return {index: np.concatenate(parts) for index, parts in onsets.items()}


def _union(results) -> dict:
    out = {}
    for r in results:
        out.update(r)
    return out


def _merged(surveys) -> SpectrumSurvey:
    first, *rest = surveys
    for other in rest:
        first.merge(other)
    return first
