"""``read_corpus``: files → traces → preprocessed windows, with every choice recorded.

The function is pure: it reads the files, builds a :class:`Corpus` in memory and returns it, or
raises :class:`CorpusError` having kept nothing.
"""
from __future__ import annotations

import hashlib
import os
from dataclasses import dataclass, replace
from datetime import datetime, UTC

import numpy as np

from burstlens.search.corpus import preprocess, windowing
from burstlens.search.corpus.model import Corpus, CorpusError, RawTrace
from burstlens.search.corpus.preprocess import Segment
from burstlens.search.corpus.readers import detect_format, read_head, read_waveform_file

WINDOWINGS = ("bursts", "whole", "sliding")
# STA/LTA kinds and the averages each takes; the error for an unknown kind lists both
TRIGGER_KINDS = {
    "boxcar": "equal-weight moving averages",
    "exponential": "recursive exponentially weighted averages",
}
TRIGGERS = tuple(TRIGGER_KINDS)

DEFAULT_TRIGGER = "boxcar"
# Thresholds and STA/LTA lengths after Trnkoczy, "Understanding and parameter setting of STA/LTA
# trigger algorithm", New Manual of Seismological Observatory Practice 2 (NMSOP-2), IS 8.1, 2012.
DEFAULT_TRIGGER_ON = 3.5   # common practice for local events (Trnkoczy 2012: 3–4)
DEFAULT_TRIGGER_OFF = 1.5  # common practice (Trnkoczy 2012: 1–1.5)
DEFAULT_PRE_TRIGGER = 0.25
DEFAULT_MAX_WINDOWS = 1000
DEFAULT_SEED = 0
STA_PERIODS = 4.0          # STA ≈ a few dominant periods (Trnkoczy 2012)
LTA_PER_STA = 20.0         # LTA ≈ 10–20 × STA (Trnkoczy 2012)
FALLBACK_FRACTION_OF_FS = 1.0 / 8.0   # dominant frequency when no transient stands out
SLIDING_PERIODS = 128.0    # default sliding window: this many dominant periods
DURATION_QUANTILE = 0.9    # window length covers this quantile of the burst durations
MIN_WINDOW = 64
MAX_WINDOW = 1 << 16
CLIP_RUN = 3
TRIGGER_BAND_FACTOR = 4.0  # trigger on [f_dom / 4, 4 f_dom]
READ_STAGES = ("reading", "preprocessing", "triggering", "cutting")


@dataclass(frozen=True)
class ReadProgress:
    """Where :func:`read_corpus` is: what its ``progress`` callback receives after each step.

    ``stage`` is one of ``READ_STAGES``, in that order: "reading" after each file
    (``files_read`` of ``files_total``), then after each segment (a trace, or a run of it between
    gaps; ``segments_done`` of ``segments_total``) "preprocessing" (detrend, resample,
    band-pass, taper), "triggering" (the STA/LTA pass; 'bursts' windowing only) and "cutting"
    (its windows placed and checked). ``hours_read`` sums samples / rate / 3600 over the traces
    read so far (every trace, before ``components`` selects). ``windows_found`` counts the windows
    cut and not rejected so far, before the ``max_windows`` cap: after the last segment it is
    ``Corpus.defaults["windows_found"]``, of which ``windows_kept`` are in ``Corpus.windows``.
    Counts of a stage not yet begun are 0.
    """

    stage: str
    files_read: int
    files_total: int
    hours_read: float = 0.0
    segments_done: int = 0
    segments_total: int = 0
    windows_found: int = 0


class _Reporter:
    """Passes the reader's state, updated by each call's keywords, to ``progress`` (if any)."""

    def __init__(self, progress, files_total: int):
        self.progress = progress
        self.state = ReadProgress("reading", 0, files_total)

    def __call__(self, **changes) -> None:
        if self.progress is not None:
            self.state = replace(self.state, **changes)
            self.progress(self.state)


def read_corpus(
    paths,
    *,
    windowing: str | None = None,
    window_s: float | None = None,
    max_windows: int | None = None,
    seed: int | None = None,
    sampling_rate_hz: float | None = None,
    components=None,
    bandpass_hz=None,
    csv_sampling_rate_hz: float | None = None,
    sta_s: float | None = None,
    lta_s: float | None = None,
    trigger_on: float | None = None,
    trigger_off: float | None = None,
    pre_trigger: float | None = None,
    trigger: str | None = None,
    hop_s: float | None = None,
    progress=None,
) -> Corpus:
    """Read waveform files and cut them into preprocessed windows of one length and one rate.

    Parameters
    ----------
    paths : str, path or list of them
        Files or folders (folders are walked, sorted; non-waveform files in them are skipped and
        listed in ``Corpus.skipped``). The format is recognised from the content: miniSEED, SAC,
        SEG-Y, WAV, NumPy ``.npy``/``.npz`` (never unpickled) or numeric CSV (columns are traces).
    windowing : 'bursts' (default) | 'whole' | 'sliding'
        'bursts': STA/LTA triggers, a window of ``window_s`` around each, ``pre_trigger`` of it
        before the trigger, overlapping triggers merged. 'whole': each trace is one window (event
        files). 'sliding': windows every ``hop_s``.
    window_s : float, s
        Window length; by default from the trigger durations found, rounded up to a power of two samples.
    max_windows : int
        Cap; a seeded random subset of this size is kept, in window order (default 1000).
    seed : int
        Seed of that subset (default 0).
    sampling_rate_hz : float, Hz
        Common rate; by default the most common native rate. Others are resampled (polyphase).
    components : str or list, e.g. 'Z'
        Keep traces whose SEED orientation code (last letter of the channel) is listed.
    bandpass_hz : (low, high), Hz
        Zero-phase Butterworth band-pass (order 4, applied forward and backward); low 0: low-pass.
    csv_sampling_rate_hz : float, Hz
        The declared rate of files that carry none (CSV, ``.npy``, ``.npz`` without a rate).
    sta_s, lta_s : float, s
        STA and LTA lengths; by default 4 dominant periods and 20 × STA.
    trigger_on, trigger_off : float
        Thresholds on STA/LTA (default 3.5 and 1.5).
    pre_trigger : float in [0, 1)
        Share of the window before the trigger (default 0.25).
    trigger : 'boxcar' (default) | 'exponential'
        STA/LTA from equal-weight moving averages, or from recursive exponentially weighted ones.
    hop_s : float, s
        Hop of 'sliding' windows (default half a window).
    progress : callable, optional
        Called with a :class:`ReadProgress` (a frozen dataclass) after each file read and after
        each segment preprocessed, triggered and cut. Not a reading choice: the result is the
        same with or without it, and it is not recorded in ``defaults``. What it raises
        propagates, so a caller can stop the reading (nothing is kept).

    Returns
    -------
    Corpus
        ``windows`` (M, N) float64 and everything the reader chose in ``defaults``. Each
        ``window_meta`` entry carries ``trigger_offset_s``: seconds from the window's first sample
        to the first trigger onset inside it (None for 'whole' and 'sliding' windows).
    """
    opts = _validate_options(
        windowing=windowing, window_s=window_s, max_windows=max_windows, seed=seed,
        sampling_rate_hz=sampling_rate_hz, components=components, bandpass_hz=bandpass_hz,
        csv_sampling_rate_hz=csv_sampling_rate_hz, sta_s=sta_s, lta_s=lta_s,
        trigger_on=trigger_on, trigger_off=trigger_off, pre_trigger=pre_trigger, trigger=trigger,
        hop_s=hop_s,
    )
    files, skipped = expand_paths(paths)
    report = _Reporter(progress, len(files))
    raw: list[RawTrace] = []
    digest = hashlib.sha256()
    seconds = 0.0
    for done, (path, fmt) in enumerate(files, 1):
        _hash_file(path, digest)
        traces = read_waveform_file(path, fmt, csv_sampling_rate_hz=opts["csv_sampling_rate_hz"])
        raw.extend(traces)
        seconds += sum(tr.data.size / tr.sampling_rate_hz for tr in traces)
        report(files_read=done, hours_read=seconds / 3600.0)
    raw = preprocess.join_contiguous(preprocess.select_components(raw, opts["components"]))

    rejections: list[dict] = []
    segments = _segments(raw, opts["windowing"], rejections)
    if not segments:
        raise CorpusError(f"{_describe(files)}: zero usable windows: every trace is non-finite")
    rate, rate_how = preprocess.choose_rate([s.native_rate_hz for s in segments], opts["sampling_rate_hz"])
    preprocess.check_rates(segments, rate, rate_how)
    sos = preprocess.bandpass_sos(opts["bandpass_hz"], rate) if opts["bandpass_hz"] is not None else None
    whole = opts["windowing"] == "whole"
    for done, seg in enumerate(segments, 1):
        preprocess.process_segment(seg, rate, sos, taper=True)
        report(stage="preprocessing", segments_done=done, segments_total=len(segments))

    defaults = {
        "windowing": opts["windowing"],
        "sampling_rate_hz": rate,
        "sampling_rate_source": rate_how,
        "native_rates_hz": sorted({s.native_rate_hz for s in segments}),
        "components": opts["components"],
        "bandpass_hz": list(opts["bandpass_hz"]) if opts["bandpass_hz"] is not None else None,
        "bandpass_order": preprocess.BANDPASS_ORDER if sos is not None else None,
        "detrend": "linear",
        "taper": f"cosine, {preprocess.TAPER_FRACTION:g} of each segment per side, "
                 f"at most {preprocess.TAPER_MAX_S:g} s",
        "resampling": "polyphase (scipy.signal.resample_poly)",
        "clip_run_samples": CLIP_RUN,
        "max_windows": opts["max_windows"],
        "seed": opts["seed"],
    }
    if whole:
        placed = _whole_windows(segments, opts, defaults)
    else:
        placed = _scan_windows(segments, files, opts, defaults, rejections, report)
    return _assemble(placed, segments, files, skipped, digest.hexdigest(), rate, opts, defaults, rejections,
                     report)


# --- options and files --------------------------------------------------------------------------

def _validate_options(**o) -> dict:
    o["windowing"] = o["windowing"] or "bursts"
    if o["windowing"] not in WINDOWINGS:
        raise CorpusError(f"windowing={o['windowing']!r}: expected one of {', '.join(WINDOWINGS)}")
    o["trigger"] = o["trigger"] or DEFAULT_TRIGGER
    if o["trigger"] not in TRIGGERS:
        kinds = ", ".join(f"{k} ({what})" for k, what in TRIGGER_KINDS.items())
        raise CorpusError(f"trigger={o['trigger']!r}: expected one of {kinds}")
    for name in ("window_s", "sampling_rate_hz", "csv_sampling_rate_hz", "sta_s", "lta_s",
                 "trigger_on", "trigger_off", "hop_s"):
        value = o[name]
        if value is not None:
            try:
                ok = float(value) > 0 and np.isfinite(float(value))
            except (TypeError, ValueError):
                ok = False
            if not ok:
                raise CorpusError(f"{name}={value!r}: must be a positive number")
            o[name] = float(value)
    o["max_windows"] = DEFAULT_MAX_WINDOWS if o["max_windows"] is None else o["max_windows"]
    if (not isinstance(o["max_windows"], (int, np.integer)) or isinstance(o["max_windows"], bool)
            or o["max_windows"] < 1):
        raise CorpusError(f"max_windows={o['max_windows']!r}: must be a positive integer")
    o["seed"] = DEFAULT_SEED if o["seed"] is None else o["seed"]
    if not isinstance(o["seed"], (int, np.integer)) or isinstance(o["seed"], bool):
        raise CorpusError(f"seed={o['seed']!r}: must be an integer")
    o["pre_trigger"] = DEFAULT_PRE_TRIGGER if o["pre_trigger"] is None else o["pre_trigger"]
    if not (isinstance(o["pre_trigger"], (int, float)) and 0.0 <= o["pre_trigger"] < 1.0):
        raise CorpusError(f"pre_trigger={o['pre_trigger']!r}: must be a share in [0, 1)")
    o["trigger_on"] = DEFAULT_TRIGGER_ON if o["trigger_on"] is None else o["trigger_on"]
    o["trigger_off"] = DEFAULT_TRIGGER_OFF if o["trigger_off"] is None else o["trigger_off"]
    if o["trigger_off"] > o["trigger_on"]:
        raise CorpusError(f"trigger_off={o['trigger_off']!r}: must not exceed trigger_on={o['trigger_on']!r}")
    if o["sta_s"] is not None and o["lta_s"] is not None and o["sta_s"] >= o["lta_s"]:
        raise CorpusError(f"sta_s={o['sta_s']!r}: must be shorter than lta_s={o['lta_s']!r}")
    if o["components"] is not None:
        comps = o["components"]
        comps = list(comps) if isinstance(comps, str) else list(comps)
        if not comps or not all(isinstance(c, str) and len(c) == 1 and c.isalnum() for c in comps):
            raise CorpusError(f"components={o['components']!r}: expected orientation codes, e.g. 'Z' or 'ZNE'")
        o["components"] = "".join(c.upper() for c in comps)
    return o


def expand_paths(paths) -> tuple[list[tuple[str, str]], list[dict]]:
    """(path, format) of every waveform file, sorted by absolute path, and the skipped files.

    A file named directly must be a waveform file; inside a folder (walked recursively, hidden
    entries ignored) files of no known format are skipped and listed.
    """
    if isinstance(paths, (str, os.PathLike)):
        paths = [paths]
    paths = [os.fspath(p) for p in paths]
    if not paths:
        raise CorpusError("no input: pass at least one file or folder")
    found: dict[str, tuple[str, bool]] = {}
    for p in paths:
        if os.path.isdir(p):
            for full in folder_files(p):
                found.setdefault(os.path.abspath(full), (full, False))
        elif os.path.isfile(p):
            found[os.path.abspath(p)] = (p, True)
        else:
            raise CorpusError(f"{p}: no such file or folder")
    files, skipped = [], []
    for key in sorted(found):
        path, explicit = found[key]
        try:
            head, size = read_head(path)
        except OSError as exc:
            raise CorpusError(f"{path}: cannot be read ({exc.strerror or exc})") from None
        fmt = detect_format(head, size) if explicit else _folder_format(head, size)
        if fmt is None:
            if explicit:
                if head[:3] == b"MS\x03":
                    raise CorpusError(f"{path}: miniSEED 3 is not read; convert it to miniSEED 2")
                what = "an empty file" if size == 0 else "unknown format"
                raise CorpusError(f"{path}: {what} (not miniSEED, SAC, SEG-Y, WAV, NPY/NPZ or numeric CSV)")
            skipped.append({"file": path, "reason": "empty file" if size == 0 else "not a waveform file"})
            continue
        files.append((path, fmt))
    if not files:
        raise CorpusError(f"{', '.join(paths)}: no waveform files found")
    return files, skipped


def folder_files(folder) -> list[str]:
    """Every file under ``folder`` the reader looks at: sub-folders walked recursively, names in
    sorted order, hidden files and folders (names starting with ".") ignored."""
    files = []
    for root, dirs, names in os.walk(folder):
        dirs[:] = sorted(d for d in dirs if not d.startswith("."))
        files += [os.path.join(root, name) for name in sorted(names) if not name.startswith(".")]
    return files


def is_waveform_file(path) -> bool:
    """Whether the reader reads ``path`` when it meets it inside a folder: its first bytes carry
    a known waveform format (the name plays no part), and text only if it holds numbers. A
    README, JSON metadata or an empty file gives False; ``OSError`` if it cannot be read."""
    head, size = read_head(os.fspath(path))
    return _folder_format(head, size) is not None


def _folder_format(head: bytes, size: int) -> str | None:
    """The format of a file met inside a folder, where text counts as CSV only if numeric."""
    fmt = detect_format(head, size)
    return None if fmt == "CSV" and not _looks_numeric(head) else fmt


def _looks_numeric(head: bytes) -> bool:
    """Inside a folder, text counts as CSV only if its second non-comment line is numbers."""
    lines = [ln.strip() for ln in head.decode("utf-8", "ignore").splitlines()]
    lines = [ln for ln in lines if ln and not ln.startswith("#")]
    for ln in lines[1:2] or lines[:1]:
        cells = ln.replace(",", " ").replace(";", " ").split()
        try:
            [float(c) for c in cells]
            return bool(cells)
        except ValueError:
            return False
    return False


def _hash_file(path: str, digest) -> None:
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            digest.update(block)


def _describe(files) -> str:
    if len(files) == 1:
        return files[0][0]
    return f"{len(files)} files ({files[0][0]}, …)"


# --- segments -----------------------------------------------------------------------------------

def _segments(raw: list[RawTrace], mode: str, rejections: list[dict]) -> list[Segment]:
    """Split traces at runs of non-finite samples (gaps); in 'whole' mode reject such traces.

    ``offset_s`` counts from the start of the (possibly joined) trace."""
    out = []
    for tr in raw:
        runs = preprocess.finite_runs(tr.data)
        fs = tr.sampling_rate_hz
        if mode == "whole" and runs != [(0, tr.data.size)]:
            bad = tr.data.size - sum(b - a for a, b in runs)
            rejections.append(_rejection(tr.file, tr.trace_id, 0.0, "non-finite", f"{bad} NaN/Inf samples"))
            continue
        prev = 0
        for a, b in runs:
            if a > prev:
                rejections.append(_rejection(tr.file_at(prev), tr.trace_id, prev / fs, "non-finite",
                                             f"{a - prev} NaN/Inf samples; trace split there"))
            start = None if tr.start is None else tr.start + a / fs
            out.append(Segment(tr.file_at(a), tr.trace_id, fs, start, a / fs, tr.data[a:b], source=tr, first_sample=a))
            prev = b
        if prev < tr.data.size:
            rejections.append(_rejection(tr.file_at(prev), tr.trace_id, prev / fs, "non-finite",
                                         f"{tr.data.size - prev} NaN/Inf samples; trace split there"))
    return out


def _rejection(file, trace_id, offset_s, reason, detail) -> dict:
    return {"file": file, "trace_id": trace_id, "offset_s": round(float(offset_s), 6), "reason": reason,
            "detail": detail}


# --- window placement ---------------------------------------------------------------------------

def _whole_windows(segments: list[Segment], opts: dict, defaults: dict) -> list[tuple]:
    """Each segment is one window; longer ones are cut around their energy peak.

    Placed windows here and in :func:`_scan_windows` are tuples (segment, start sample or −1 for
    too short, length, triggers merged, first trigger onset from the start in samples or None),
    in segment order.
    """
    fs = defaults["sampling_rate_hz"]
    lengths = [s.data.size for s in segments]
    if opts["window_s"] is not None:
        n, how = _given_window(opts["window_s"], fs), "given"
    elif len(set(lengths)) == 1:
        n, how = lengths[0], "trace length"
    else:
        n, how = int(np.median(lengths)), "median trace length"
    defaults.update(window_samples=n, window_s=n / fs, window_source=how, pre_trigger=opts["pre_trigger"])
    placed = []
    for seg in segments:
        if seg.data.size < n:
            placed.append((seg, -1, n, 0, None))
            continue
        start = 0
        if seg.data.size > n:
            smooth = windowing.moving_sum(np.square(seg.data), max(1, n // 16))
            peak = int(np.argmax(smooth)) - n // 32
            start = int(min(max(peak - opts["pre_trigger"] * n, 0), seg.data.size - n))
        placed.append((seg, start, n, 1, None))
    return placed


def _scan_windows(segments, files, opts, defaults, rejections, report):
    """Burst or sliding windows; defaults for STA/LTA and window length come from the data."""
    fs = defaults["sampling_rate_hz"]
    f_dom, info = windowing.dominant_frequency([s.data for s in segments], fs)
    source = "transient excess spectrum"
    if f_dom is None:
        f_dom, source = fs * FALLBACK_FRACTION_OF_FS, "fallback fs/8 (no transient stands out)"
    f_dom = float(min(max(f_dom, fs / 100.0), fs / 4.0))
    defaults.update(dominant_frequency_hz=round(f_dom, 3), dominant_frequency_source=source,
                    dominant_frequency_loud_frames=info.get("loud_frames", 0))
    mode = opts["windowing"]
    pre = opts["pre_trigger"]
    if mode == "sliding":
        if opts["window_s"] is not None:
            n, how = _given_window(opts["window_s"], fs), "given"
        else:
            n = int(np.clip(windowing.fast_length(SLIDING_PERIODS * fs / f_dom, "nearest"), MIN_WINDOW, MAX_WINDOW))
            how = f"{SLIDING_PERIODS:g} dominant periods, rounded to a power of two samples"
        hop = int(round(opts["hop_s"] * fs)) if opts["hop_s"] is not None else max(1, n // 2)
        defaults.update(window_samples=n, window_s=n / fs, window_source=how, hop_samples=hop, hop_s=hop / fs)
        placed = []
        for seg in segments:
            starts = windowing.sliding_starts(seg.data.size, n, hop, seg.taper_samples)
            if not starts:
                placed.append((seg, -1, n, 0, None))
            placed.extend((seg, s, n, 0, None) for s in starts)
        return placed

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
    sta_lta = windowing.boxcar_sta_lta if opts["trigger"] == "boxcar" else windowing.exponential_sta_lta
    onsets = []
    for done, seg in enumerate(segments, 1):
        if seg.data.size <= nlta:
            onsets.append(np.empty((0, 2), dtype=np.int64))
        else:
            x = seg.data if trigger_sos is None else preprocess.zero_phase(trigger_sos, seg.data)
            o = windowing.trigger_intervals(sta_lta(x, nsta, nlta), opts["trigger_on"], opts["trigger_off"])
            # a trigger inside the taper is the ramp itself, not a burst
            g = seg.taper_samples
            onsets.append(o[(o[:, 0] >= g) & (o[:, 0] < seg.data.size - g)])
        report(stage="triggering", segments_done=done)
    n_triggers = int(sum(len(o) for o in onsets))
    defaults["triggers"] = n_triggers
    if n_triggers == 0:
        raise CorpusError(
            f"{_describe(files)}: zero usable windows: no triggers above {opts['trigger_on']:g} in "
            f"{len(segments)} traces (STA {nsta / fs:g} s, LTA {nlta / fs:g} s); "
            "try windowing='whole' or 'sliding', or a lower trigger_on"
        )
    durations = np.concatenate([windowing.burst_durations(o, nlta) for o in onsets if len(o)]) / fs
    if opts["window_s"] is not None:
        n, how = _given_window(opts["window_s"], fs), "given"
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
    placed = []
    for seg, o in zip(segments, onsets, strict=True):
        starts, counts, short = windowing.place_burst_windows(o[:, 0], seg.data.size, n, int(round(pre * n)),
                                                              seg.taper_samples)
        if short:
            placed.append((seg, -1, n, len(short), None))
        # the first onset at or after the start: a window clipped at a segment end does not hold
        # its trigger at pre·n, and an earlier trigger merged into the previous window may fall in it
        first = o[np.searchsorted(o[:, 0], starts), 0] if starts else []
        placed.extend((seg, s, n, c, int(f) - s) for s, c, f in zip(starts, counts, first, strict=True))
    return placed


def _given_window(window_s: float, fs: float) -> int:
    n = int(round(window_s * fs))
    if n < 2:
        raise CorpusError(f"window_s={window_s!r}: shorter than 2 samples at {fs:g} Hz")
    return n


# --- assembling the result ----------------------------------------------------------------------

def _iso(ts: float | None) -> str | None:
    if ts is None:
        return None
    return datetime.fromtimestamp(ts, tz=UTC).isoformat(timespec="microseconds").replace("+00:00", "Z")


def _assemble(placed, segments, files, skipped, source_hash, fs, opts, defaults, rejections, report) -> Corpus:
    kept_rows, meta, owners, seen = [], [], [], set()
    per_segment = {id(s): 0 for s in segments}
    position = {id(s): i for i, s in enumerate(segments)}
    cut = 0  # segments whose windows are all checked: those before the one being placed

    def segments_cut(upto: int) -> None:
        nonlocal cut
        while cut < upto:
            cut += 1
            report(stage="cutting", segments_done=cut, windows_found=len(kept_rows))

    for seg, start, length, count, trigger in placed:
        segments_cut(position[id(seg)])
        if start < 0:
            rejections.append(_rejection(
                seg.file, seg.trace_id, seg.offset_s, "too short",
                f"trace of {seg.data.size / fs:g} s is shorter than the window of {length / fs:g} s"
                + (f" ({count} triggers)" if count and defaults["windowing"] == "bursts" else "")))
            continue
        offset = seg.offset_s + start / fs
        ratio = seg.native_rate_hz / fs
        r0 = int(round(start * ratio))
        raw = seg.raw[r0: r0 + max(1, int(round(length * ratio)))]
        window = seg.data[start: start + length]
        file = seg.file_at(r0)
        reason = windowing.rejection_reason(raw, window, CLIP_RUN)
        if reason is None:
            key = hashlib.sha1(raw.dtype.str.encode() + raw.tobytes()).digest()
            reason = "duplicate" if key in seen else None
            seen.add(key)
        if reason is not None:
            rejections.append(_rejection(file, seg.trace_id, offset, reason, _detail(reason)))
            continue
        kept_rows.append(window)
        entry = {"file": file, "trace_id": seg.trace_id,
                 "start": _iso(None if seg.start is None else seg.start + start / fs),
                 "offset_s": round(offset, 6)}
        if defaults["windowing"] == "bursts":
            entry["triggers"] = count
        entry["trigger_offset_s"] = None if trigger is None else trigger / fs
        meta.append(entry)
        owners.append(id(seg))
    segments_cut(len(segments))
    if not kept_rows:
        counts = {}
        for r in rejections:
            counts[r["reason"]] = counts.get(r["reason"], 0) + 1
        why = ", ".join(f"{k} {v}" for k, v in sorted(counts.items())) or "none placed"
        raise CorpusError(f"{_describe(files)}: zero usable windows: every window was rejected ({why})")
    found = len(kept_rows)
    if found > opts["max_windows"]:
        rng = np.random.default_rng(opts["seed"])
        keep = np.sort(rng.choice(found, size=opts["max_windows"], replace=False))
        kept_rows = [kept_rows[i] for i in keep]
        meta = [meta[i] for i in keep]
        owners = [owners[i] for i in keep]
    for owner in owners:
        per_segment[owner] += 1
    defaults.update(windows_found=found, windows_kept=len(kept_rows))
    traces = []
    for s in segments:
        entry = {"file": s.file, "trace_id": s.trace_id, "sampling_rate_hz": s.native_rate_hz,
                 "start": _iso(s.start), "duration_s": round(s.raw.size / s.native_rate_hz, 6),
                 "windows": per_segment[id(s)]}
        spanned = sorted({s.file_at(0), s.file_at(s.raw.size - 1)} | {
            f for first, f in (s.source.parts if s.source else [])
            if s.first_sample <= first < s.first_sample + s.raw.size})
        if len(spanned) > 1:
            entry["files"] = spanned  # contiguous pieces from several files, joined
        traces.append(entry)
    windows = np.ascontiguousarray(np.stack(kept_rows).astype(np.float64, copy=False))
    return Corpus(windows=windows, sampling_rate_hz=fs, window_meta=meta, traces=traces,
                  rejections=rejections, defaults=defaults, source_hash=source_hash,
                  files=[p for p, _ in files], skipped=skipped)


def _detail(reason: str) -> str:
    return {
        "flat": "no variation in the raw samples",
        "non-finite": "NaN/Inf after processing",
        "clipped": f"peak value held for ≥ {CLIP_RUN} samples (saturated recorder)",
        "duplicate": "same raw samples as an earlier window",
    }[reason]
