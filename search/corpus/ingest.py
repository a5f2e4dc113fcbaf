"""``read_corpus``: files → traces → preprocessed windows, with every choice recorded.

The function is pure: it reads the files, builds a :class:`Corpus` in memory and returns it, or
raises :class:`CorpusError` having kept nothing. It streams: a scan of every file, then passes over
bounded processed pieces (stream.py) for the data-chosen defaults and the window placements
(placement.py) and for cutting the windows (cutting.py), so its memory does not grow with the
length of the records; only the kept windows are held.
"""
from __future__ import annotations

import hashlib
import os
from collections import Counter
from dataclasses import asdict, dataclass, fields, replace
from functools import partial

import numpy as np

from burstlens.search.corpus import cutting, placement, preprocess, stream
from burstlens.search.corpus.cutting import CLIP_RUN
from burstlens.search.corpus.model import Corpus, CorpusError
from burstlens.search.corpus.readers import detect_format, read_head

WINDOWINGS = ("bursts", "whole", "sliding")
# STA/LTA kinds and the averages each takes; the error for an unknown kind lists both
TRIGGER_KINDS = {
    "boxcar": "equal-weight moving averages",
    "exponential": "recursive exponentially weighted averages",
}
TRIGGERS = tuple(TRIGGER_KINDS)


@dataclass(frozen=True)
class ReadOptions:
    """The options of :func:`read_corpus` with the reader's defaults, defined once (the job
    settings' ``search.settings.CORPUS_OPTIONS`` show these defaults). None: the reader chooses
    the value from the data (recorded in ``Corpus.defaults``). :meth:`checked` makes one from
    ``read_corpus``'s keywords, None meaning the default."""

    windowing: str = "bursts"
    window_s: float | None = None
    max_windows: int = 1000
    seed: int = 0
    sampling_rate_hz: float | None = None
    components: str | None = None
    bandpass_hz: tuple | None = None
    csv_sampling_rate_hz: float | None = None
    sta_s: float | None = None
    lta_s: float | None = None
    # Thresholds after Trnkoczy, "Understanding and parameter setting of STA/LTA trigger
    # algorithm", New Manual of Seismological Observatory Practice 2 (NMSOP-2), IS 8.1, 2012.
    trigger_on: float = 3.5   # common practice for local events (Trnkoczy 2012: 3–4)
    trigger_off: float = 1.5  # common practice (Trnkoczy 2012: 1–1.5)
    pre_trigger: float = 0.25
    trigger: str = "boxcar"
    hop_s: float | None = None

    @classmethod
    def checked(cls, **given) -> ReadOptions:
        """The options of ``given`` (``read_corpus``'s keywords; None or missing: the default),
        checked; ``CorpusError`` naming the option and the value (``window_s=-1: must be a
        positive number``)."""
        o = {f.name: getattr(cls, f.name) for f in fields(cls)}
        unknown = sorted(set(given) - set(o))
        if unknown:
            raise CorpusError(f"unknown option(s) {', '.join(unknown)}; known: {', '.join(o)}")
        o.update({k: v for k, v in given.items() if v is not None})
        for name in ("windowing", "trigger"):  # an empty choice is the default too
            o[name] = o[name] or getattr(cls, name)
        if o["windowing"] not in WINDOWINGS:
            raise CorpusError(f"windowing={o['windowing']!r}: expected one of {', '.join(WINDOWINGS)}")
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
        if (not isinstance(o["max_windows"], (int, np.integer)) or isinstance(o["max_windows"], bool)
                or o["max_windows"] < 1):
            raise CorpusError(f"max_windows={o['max_windows']!r}: must be a positive integer")
        if not isinstance(o["seed"], (int, np.integer)) or isinstance(o["seed"], bool):
            raise CorpusError(f"seed={o['seed']!r}: must be an integer")
        if not (isinstance(o["pre_trigger"], (int, float)) and 0.0 <= o["pre_trigger"] < 1.0):
            raise CorpusError(f"pre_trigger={o['pre_trigger']!r}: must be a share in [0, 1)")
        if o["trigger_off"] > o["trigger_on"]:
            raise CorpusError(f"trigger_off={o['trigger_off']!r}: must not exceed trigger_on={o['trigger_on']!r}")
        if o["sta_s"] is not None and o["lta_s"] is not None and o["sta_s"] >= o["lta_s"]:
            raise CorpusError(f"sta_s={o['sta_s']!r}: must be shorter than lta_s={o['lta_s']!r}")
        if o["components"] is not None:
            comps = list(o["components"])
            if not comps or not all(isinstance(c, str) and len(c) == 1 and c.isalnum() for c in comps):
                raise CorpusError(f"components={o['components']!r}: expected orientation codes, e.g. 'Z' or 'ZNE'")
            o["components"] = "".join(c.upper() for c in comps)
        return cls(**o)


DEFAULT_TRIGGER = ReadOptions.trigger  # search.corpus exports it
# Largest |sample| read, raw and after preprocessing. A sum of squares of up to 2^64 samples of
# |x| ≤ 2^464 stays below 2^992 < 2^1024 (the float64 range), so every energy the passes form
# (survey frames, STA/LTA sums, windows) is finite; raw 2^448 leaves 2^16 for the gain of detrend,
# resampling and band-pass, far above theirs. Only float64 files reach it (float32 < 2^128).
MAX_ABS_SAMPLE = 2.0 ** 448
MAX_ABS_PROCESSED = 2.0 ** 464
READ_STAGES = ("reading", "preprocessing", "triggering", "cutting")


@dataclass(frozen=True)
class ReadProgress:
    """Where :func:`read_corpus` is: what its ``progress`` callback receives after each step.

    ``stage`` is one of ``READ_STAGES``, in that order: "reading" after each file
    (``files_read`` of ``files_total``), then after each segment (a trace, or a run of it between
    gaps; ``segments_done`` of ``segments_total``) "preprocessing" (detrend, resample,
    band-pass, taper), "triggering" (the STA/LTA pass; 'bursts' windowing only) and "cutting"
    (its windows placed and checked); each later stage is one pass over the processed pieces,
    "preprocessing" being the spectrum survey ('bursts', 'sliding') or the energy-peak pass
    ('whole'). ``hours_read`` sums samples / rate / 3600 over the traces
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
    mapper=None,
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
        Cap; a seeded uniform sample of this size is kept, in window order (default 1000): the
        windows with the smallest hashed (seed, trace, start) keys, the same whatever the order
        or split of the files.
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
    mapper : callable, optional
        ``mapper(fn, items) -> results`` in the order of ``items``, e.g. a Dask client's
        ``map`` then ``gather``: the files are then read, and the passes run, as tasks (one per
        file for the first look, one per group of files joined by their traces after), and only
        descriptions, trigger lists and the kept windows come back. The files must be readable
        at the same paths where the tasks run. Not a reading choice: the result is identical.

    Returns
    -------
    Corpus
        ``windows`` (M, N) float64 and everything the reader chose in ``defaults``. Each
        ``window_meta`` entry carries ``trigger_offset_s``: seconds from the window's first sample
        to the first trigger onset inside it (None for 'whole' and 'sliding' windows).
        ``noise_windows`` (K, N) float64, K ≤ ``placement.NOISE_WINDOWS``: the site's noise
        sample from the quiet stretches between triggers ('bursts'; (0, N) otherwise), with
        ``noise_meta`` and ``defaults["noise"]``.

    Raises
    ------
    CorpusError
        Naming the file (or files) and the cause, for any input it cannot read; among them
        samples beyond ±``MAX_ABS_SAMPLE`` (2^448 ≈ 7.3e134), so large that their energy
        overflows float64 (the message gives the trace and the largest |x|).

    Examples
    --------
    Two decaying 8 Hz bursts in a minute of noise, saved as a NumPy file (which carries no
    rate, so it is declared), cut into 5.12 s windows around their STA/LTA triggers:

    >>> import os, tempfile
    >>> import numpy as np
    >>> fs = 100.0
    >>> t = np.arange(6000) / fs
    >>> x = 0.1 * np.random.default_rng(0).standard_normal(t.size)
    >>> for onset in (15.0, 35.0):
    ...     u = t - onset
    ...     x += np.where(u >= 0, np.exp(-u / 0.5), 0.0) * np.sin(2 * np.pi * 8.0 * u)
    >>> with tempfile.TemporaryDirectory() as folder:
    ...     path = os.path.join(folder, "trace.npy")
    ...     np.save(path, x)
    ...     corpus = read_corpus(path, csv_sampling_rate_hz=fs, window_s=5.12)
    >>> corpus.windows.shape  # (M, N)
    (2, 512)
    >>> [round(m["offset_s"] + m["trigger_offset_s"], 1) for m in corpus.window_meta]  # onsets, s
    [15.0, 35.0]
    """
    opts = asdict(ReadOptions.checked(
        windowing=windowing, window_s=window_s, max_windows=max_windows, seed=seed,
        sampling_rate_hz=sampling_rate_hz, components=components, bandpass_hz=bandpass_hz,
        csv_sampling_rate_hz=csv_sampling_rate_hz, sta_s=sta_s, lta_s=lta_s,
        trigger_on=trigger_on, trigger_off=trigger_off, pre_trigger=pre_trigger, trigger=trigger,
        hop_s=hop_s,
    ))
    files, skipped = expand_paths(paths)
    report = _Reporter(progress, len(files))
    whole = opts["windowing"] == "whole"
    csv_rate = opts["csv_sampling_rate_hz"]
    digest = hashlib.sha256()
    seconds = 0.0
    summaries = []
    work = [partial(stream.summarize_file, path, fmt, csv_rate) for path, fmt in files]
    for done, summary in enumerate(map(_call, work) if mapper is None else mapper(_call, work), 1):
        _hash_file(files[done - 1][0], digest)
        seconds += sum(bt.n / bt.sampling_rate_hz for block in summary for bt in block)
        summaries.append(summary)
        report(files_read=done, hours_read=seconds / 3600.0)
    found = stream.join(files, summaries, components=opts["components"], whole=whole)
    del summaries
    if opts["components"] is not None and not found.segments and not found.rejections:
        raise CorpusError(
            f"components={opts['components']!r}: no trace has orientation code(s) "
            f"{''.join(sorted(opts['components']))} (codes found: {', '.join(sorted(found.orientations))})")
    segments = found.segments
    if not segments:
        raise CorpusError(f"{stream.describe(files)}: zero usable windows: every trace is non-finite")
    rate, rate_how = preprocess.choose_rate([s.native_rate_hz for s in segments], opts["sampling_rate_hz"])
    preprocess.check_rates(segments, rate, rate_how)
    sos = preprocess.bandpass_sos(opts["bandpass_hz"], rate) if opts["bandpass_hz"] is not None else None
    layouts = {s.index: stream.Layout.of(s, rate) for s in segments}
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
    passes = _Passes(files, found, rate, sos, csv_rate, _StageCounter(report, len(segments)), mapper)
    if whole:
        plans = placement.whole_windows(segments, layouts, passes, opts, defaults)
    else:
        plans = placement.scan_windows(segments, layouts, passes, files, opts, defaults)
    cut = passes.cut(plans, opts)
    rejected = cut.rejected + cutting.duplicate_rejections(cut.windows, segments, rate)
    return _assemble(cut, segments, files, skipped, digest.hexdigest(), rate, defaults,
                     found.rejections + [r for _, r in sorted(rejected, key=lambda item: item[0])])


def _call(task):
    return task()


class _StageCounter:
    """Counts the segments done in the current stage and reports each."""

    def __init__(self, report, total: int):
        self.report, self.total, self.stage, self.count = report, total, None, 0

    def begin(self, stage: str) -> None:
        self.stage, self.count = stage, 0

    def done(self, segments: int = 1, **more) -> None:
        self.count += segments
        self.report(stage=self.stage, segments_done=self.count, segments_total=self.total, **more)


class _Passes:
    """Runs the passes over the processed pieces: here as one stream over every file (progress
    after each segment), or with a ``mapper`` one task per :func:`stream.groups` group, whose
    results are merged (progress after each group)."""

    def __init__(self, files, scan, rate, sos, csv_rate, stage: _StageCounter, mapper):
        self.files, self.scan, self.stage, self.mapper = files, scan, stage, mapper
        self.reading = {"rate_hz": rate, "sos": sos, "csv_rate": csv_rate, "assignment": scan.assignment}
        self.groups = stream.groups(files, scan) if mapper is not None else None

    def run(self, stage: str | None, fn, merge, **options):
        """``fn(pieces, **options, on_segment=…)`` over the corpus, results merged by ``merge``."""
        if stage is not None:
            self.stage.begin(stage)
        if self.mapper is None:
            pieces = checked_pieces(self.files, self.scan.segments, **self.reading)
            return fn(pieces, **options, on_segment=self.stage.done if stage is not None else None)
        task = partial(_group_pass, fn, self.reading, options)
        results = []
        for group, result in zip(self.groups, self.mapper(task, self.groups), strict=True):
            results.append(result)
            if stage is not None:
                self.stage.done(len(group.segments))
        return merge(results)

    def cut(self, plans: dict, opts: dict) -> cutting.Cut:
        """The cutting pass: a ``cutting.Cut`` whose ``windows`` and ``noise`` are the
        ``cutting.WindowSample`` s of the kept windows and noise windows. On a cluster in two
        rounds: every accepted window's record comes back and the samples are drawn here, then
        only the kept windows' samples are cut and sent."""
        sample = cutting.WindowSample(opts["max_windows"], opts["seed"])
        noise = cutting.WindowSample(placement.NOISE_WINDOWS, opts["seed"])
        common = {"mode": opts["windowing"], "seed": opts["seed"]}
        if self.mapper is None:
            self.stage.begin("cutting")
            return cutting.cut_windows(checked_pieces(self.files, self.scan.segments, **self.reading), plans=plans,
                                       collector=sample, noise=noise, **common,
                                       on_segment=lambda: self.stage.done(windows_found=sample.found))
        cut = cutting.Cut(sample, noise)
        for part in self.run("cutting", cutting.cut_windows, list, plans=plans, collector=cutting.Candidates(False),
                             noise=cutting.Candidates(False), **common):
            for found in part.windows.items:
                sample.offer(*found)
            for found in part.noise.items:
                noise.offer(*found)
            cut.rejected += part.rejected
            cut.noise_rejected += part.noise_rejected
        kept = {f.order: f for f in sample.kept() + noise.kept()}
        wanted = {index: [p for p in plan if (index, p.start) in kept] for index, plan in plans.items()}
        for part in self.run(None, cutting.cut_windows, list, plans=wanted, collector=cutting.Candidates(True),
                             noise=cutting.Candidates(True), **common):
            for found, _ in part.windows.items + part.noise.items:
                kept[found.order].window = found.window
        return cut


def _group_pass(fn, reading: dict, options: dict, group: stream.Group):
    """One cluster task: ``fn`` over the pieces of one group's files."""
    return fn(checked_pieces(group.files, group.segments, **reading), **options)


def checked_pieces(files, segments, **reading):
    """``stream.pieces`` (same arguments), each piece checked by :func:`check_magnitude` before a
    pass sees it. The check reads only the piece's own samples, whose layout does not depend on
    how the files split the traces, so any split fails alike."""
    for piece in stream.pieces(files, segments, **reading):
        check_magnitude(piece)
        yield piece


def check_magnitude(piece: stream.Piece) -> None:
    """Raise :class:`CorpusError` when the piece's samples are too large for their energy to fit
    in float64: a raw sample of its core above ``MAX_ABS_SAMPLE`` in magnitude (the message names
    the file holding it, the trace, where and |x|), or a processed sample of its core non-finite or
    above ``MAX_ABS_PROCESSED``, which only a raw sample beyond the limit in the piece's overlap
    with the next core can cause (the message names the files of the piece's extended range)."""
    seg, raw = piece.segment, piece.raw
    limit = f"the reader takes |x| ≤ 2^448 ≈ {MAX_ABS_SAMPLE:.2g}"
    # max and −min: no temporary the size of the piece; NaN cannot occur (segments are finite);
    # compared as Python floats, since the limit does not fit a float32 or float16
    if raw.dtype.kind == "f" and raw.size and float(max(raw.max(), -raw.min())) > MAX_ABS_SAMPLE:
        i = int(np.argmax(np.abs(raw)))
        where = seg.first_sample + piece.raw_start + i
        raise CorpusError(
            f"{seg.file_at(piece.raw_start + i)}: trace {seg.trace_id}: samples so large that their energy "
            f"overflows float64 (largest |x| = {abs(float(raw[i])):.4g} at {where / seg.native_rate_hz:.6g} s "
            f"into the trace; {limit})")
    x = piece.samples
    top = np.maximum(x.max(), -x.min()) if x.size else 0.0  # np.maximum: a NaN stays NaN
    if not top <= MAX_ABS_PROCESSED:  # NaN too
        e0, e1 = piece.layout.extended(piece.k)
        inside = {f for first, f in seg.trace.parts if seg.first_sample + e0 <= first < seg.first_sample + e1}
        files = sorted({seg.file_at(e0), seg.file_at(e1 - 1)} | inside)
        fs = seg.native_rate_hz
        raise CorpusError(
            f"{', '.join(files)}: trace {seg.trace_id}: samples so large that their energy overflows float64 "
            f"(after preprocessing |x| reaches {float(top):.4g} from samples between "
            f"{(seg.first_sample + e0) / fs:.6g} and {(seg.first_sample + e1) / fs:.6g} s into the trace; {limit})")


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


def _assemble(cut, segments, files, skipped, source_hash, fs, defaults, rejections) -> Corpus:
    kept = cut.windows.kept()
    if not kept:
        counts = {}
        for r in rejections:
            counts[r["reason"]] = counts.get(r["reason"], 0) + 1
        why = ", ".join(f"{k} {v}" for k, v in sorted(counts.items())) or "none placed"
        raise CorpusError(f"{stream.describe(files)}: zero usable windows: every window was rejected ({why})")
    per_segment = dict.fromkeys(range(len(segments)), 0)
    for f in kept:
        per_segment[f.order[0]] += 1
    defaults.update(windows_found=cut.windows.found, windows_kept=len(kept))
    traces = []
    for s in segments:
        entry = {"file": s.file, "trace_id": s.trace_id, "sampling_rate_hz": s.native_rate_hz,
                 "start": cutting.iso(s.start), "duration_s": round(s.n_raw / s.native_rate_hz, 6),
                 "windows": per_segment[s.index]}
        spanned = s.files()
        if len(spanned) > 1:
            entry["files"] = spanned  # contiguous pieces from several files, joined
        traces.append(entry)
    windows = np.ascontiguousarray(np.stack([f.window for f in kept]).astype(np.float64, copy=False))
    noise = cut.noise.kept()
    noise_windows = np.zeros((len(noise), windows.shape[1]))
    for row, f in zip(noise_windows, noise, strict=True):
        row[:] = f.window
    if defaults["noise"]["source"] is not None:
        defaults["noise"].update(_noise_record(cut, len(noise), defaults["window_s"]))
    return Corpus(windows=windows, sampling_rate_hz=fs, window_meta=[f.entry for f in kept], traces=traces,
                  rejections=rejections, defaults=defaults, source_hash=source_hash,
                  files=[p for p, _ in files], skipped=skipped,
                  noise_windows=noise_windows, noise_meta=[f.entry for f in noise])


def _noise_record(cut, kept: int, window_s: float) -> dict:
    """The noise sample's counts: candidates cut and checked, kept, their duration (s), the cap,
    and the checked windows rejected, by reason (duplicates among them included)."""
    reasons = [r["reason"] for _, r in cut.noise_rejected] + ["duplicate"] * len(cut.noise.duplicates)
    return {"windows_checked": cut.noise.accepted + len(cut.noise_rejected), "windows_kept": kept,
            "duration_s": kept * window_s, "max_windows": placement.NOISE_WINDOWS,
            "rejected_by_reason": dict(sorted(Counter(reasons).items()))}
