"""The reader's streams: files → joined traces → finite segments → processed pieces, a bounded
number of samples at a time.

A corpus is read in passes. :func:`summarize_file` reads a file once and describes its blocks'
traces without keeping samples; :func:`join` joins those descriptions into traces and returns the
segment table (each contiguous, finite run of a trace: where it lies, its rate and length) and
where each block's samples go. :func:`groups` splits the corpus into sets of files that can be read
apart (one cluster task each). :func:`pieces` reads the files again and yields each segment's processed samples as
:class:`Piece` objects of at most about ``PIECE_SAMPLES`` native samples (the core) processed with
``MARGIN_SAMPLES`` of the neighbouring samples on each side (the overlap that the detrend, the
polyphase resampler and the zero-phase filters need), so memory stays flat whatever the length of
the traces. The layout of the pieces depends only on the position of the samples in their segment,
never on how the samples were split into files or read blocks, so the result of a read is the same
for one day file, 24 hourly files or any block size. A segment shorter than one piece is one piece
processed exactly as a whole segment.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy import signal

from burstlens.search.corpus import preprocess
from burstlens.search.corpus.model import CorpusError
from burstlens.search.corpus.readers import iter_waveform_chunks

PIECE_SAMPLES = 1 << 21   # native samples per piece core (rounded to the resampling grid and frames)
MARGIN_SAMPLES = 1 << 17  # native samples of overlap on each side of a core
FRAME = 256               # cores hold whole frames of this many output samples (the spectrum survey's)


@dataclass
class TraceInfo:
    """One trace as joined from the files' pieces: SEED id, native rate, start (POSIX s or None),
    samples so far, and ``parts`` = (first sample, file) wherever the file changes."""

    serial: int
    trace_id: str
    sampling_rate_hz: float
    start: float | None
    kind: str
    n: int = 0
    parts: list = field(default_factory=list)

    @property
    def file(self) -> str:
        return self.parts[0][1]

    def file_at(self, sample: int) -> str:
        """The file that holds sample ``sample`` of this trace."""
        name = self.parts[0][1]
        for first, f in self.parts:
            if first > sample:
                break
            name = f
        return name

    @property
    def order(self) -> tuple:
        """Place in the corpus: timed traces by SEED id, rate and start (however files and read
        blocks split them), then untimed ones (plain arrays) in the order read."""
        if self.start is None:
            return (1, "", 0.0, 0.0, self.serial)
        return (0, self.trace_id, self.sampling_rate_hz, self.start, self.serial)

    def continues(self, trace_id: str, fs: float, start: float | None, kind: str) -> bool:
        """Whether a piece starting at ``start`` continues this trace (the next sample within half a
        sample of where it ends, the same id, rate and sample kind)."""
        return (trace_id == self.trace_id and fs == self.sampling_rate_hz and kind == self.kind
                and self.start is not None and start is not None
                and abs(start - (self.start + self.n / fs)) < 0.5 / fs)


@dataclass
class SegmentInfo:
    """A contiguous, finite run of samples ``[first_sample, first_sample + n_raw)`` of a trace.

    ``offset_s`` is the time of its first sample from the start of the trace, ``start`` its POSIX
    time (None when the format carries none). ``index`` is its place in the corpus: traces in
    :attr:`TraceInfo.order`, then runs in time order.
    """

    trace: TraceInfo
    first_sample: int
    n_raw: int
    index: int = -1

    @property
    def trace_id(self) -> str:
        return self.trace.trace_id

    @property
    def native_rate_hz(self) -> float:
        return self.trace.sampling_rate_hz

    @property
    def offset_s(self) -> float:
        return self.first_sample / self.native_rate_hz

    @property
    def start(self) -> float | None:
        return None if self.trace.start is None else self.trace.start + self.offset_s

    @property
    def file(self) -> str:
        return self.file_at(0)

    @property
    def place(self) -> str:
        """Where the segment lies, the same however its trace was split into files or read
        blocks: SEED id, rate, the trace's start time (for untimed traces, its file) and the
        segment's first sample. Seeds the sampling keys (never the order things arrive)."""
        trace = self.trace
        return (f"{trace.trace_id}|{trace.sampling_rate_hz!r}|{trace.start!r}|"
                f"{trace.file if trace.start is None else ''}|{self.first_sample}")

    def file_at(self, raw_index: int) -> str:
        """The file holding native sample ``raw_index`` of this segment."""
        return self.trace.file_at(self.first_sample + raw_index)

    def files(self) -> list[str]:
        """Every file that holds a sample of this segment, sorted."""
        end = self.first_sample + self.n_raw
        inside = {f for first, f in self.trace.parts if self.first_sample <= first < end}
        return sorted({self.file_at(0), self.file_at(self.n_raw - 1)} | inside)


@dataclass(frozen=True)
class BlockTrace:
    """One trace of one read block of a file as the scan sees it: no samples, only its SEED id,
    native rate, start (POSIX s or None), sample kind, length, runs of finite samples (half-open,
    block indices) and orientation code."""

    trace_id: str
    sampling_rate_hz: float
    start: float | None
    kind: str
    n: int
    runs: tuple
    orientation: str


def summarize_file(path: str, fmt: str, csv_rate) -> list[list[BlockTrace]]:
    """The :class:`BlockTrace` of every trace of every read block of one file (a cluster task:
    the samples stay where the file is read)."""
    return [[BlockTrace(raw.trace_id, raw.sampling_rate_hz, raw.start, raw.data.dtype.kind, raw.data.size,
                        tuple(preprocess.finite_runs(raw.data)), raw.orientation) for raw in block]
            for block in iter_waveform_chunks(path, fmt, csv_sampling_rate_hz=csv_rate)]


@dataclass
class Scan:
    """What :func:`join` found: the segments in corpus order, the non-finite spans as rejections
    (traces in order, then time; with ``windowing='whole'`` a trace holding any is rejected
    whole), the orientation codes met (for the error when ``components`` matches none), and
    ``assignment``: (file, block, trace in block) → (trace serial, first sample in the trace,
    samples), how later passes route what they read."""

    segments: list[SegmentInfo]
    rejections: list[dict]
    orientations: set
    assignment: dict


def join(files, summaries, *, components, whole: bool) -> Scan:
    """Join the files' block traces into traces and list the segments: runs of finite samples.

    ``summaries[i]`` is :func:`summarize_file` of ``files[i]``. A block trace continues the open
    trace of its SEED id and rate when it starts within half a sample of its end (hourly files,
    read blocks). A run of NaN/Inf samples splits its trace and is a rejection ('non-finite',
    "trace split there"); with ``whole`` a trace holding any is rejected entire.
    """
    traces: list[TraceInfo] = []
    open_ends: dict[tuple, TraceInfo] = {}
    runs: dict[int, list] = {}       # trace serial -> [(first, n)] finite runs
    nan_runs: dict[int, list] = {}   # trace serial -> [(first, n)]
    state: dict[int, list] = {}      # trace serial -> [run start or None, NaN start or None]
    assignment, orientations = {}, set()

    def close(serial, stop):
        seg_start, nan_start = state[serial]
        if seg_start is not None:
            runs[serial].append((seg_start, stop - seg_start))
        if nan_start is not None:
            nan_runs[serial].append((nan_start, stop - nan_start))
        state[serial] = [None, None]

    for (path, _), blocks in zip(files, summaries, strict=True):
        for b, block in enumerate(blocks):
            for i, bt in enumerate(block):
                orientations.add(bt.orientation or "none")
                if components is not None and bt.orientation not in components:
                    continue
                key = (bt.trace_id, bt.sampling_rate_hz)
                trace = open_ends.get(key)
                if trace is None or not trace.continues(bt.trace_id, bt.sampling_rate_hz, bt.start, bt.kind):
                    if trace is not None:
                        close(trace.serial, trace.n)
                    trace = TraceInfo(len(traces), bt.trace_id, bt.sampling_rate_hz, bt.start, bt.kind)
                    traces.append(trace)
                    open_ends[key] = trace
                    runs[trace.serial], nan_runs[trace.serial], state[trace.serial] = [], [], [None, None]
                if not trace.parts or trace.parts[-1][1] != path:
                    trace.parts.append((trace.n, path))
                first = trace.n
                trace.n += bt.n
                assignment[(path, b, i)] = (trace.serial, first, bt.n)
                _follow_runs(state[trace.serial], runs[trace.serial], nan_runs[trace.serial], first, bt)
    for trace in open_ends.values():
        close(trace.serial, trace.n)

    segments, rejections = [], []
    for trace in sorted(traces, key=lambda t: t.order):
        fs = trace.sampling_rate_hz
        if whole and nan_runs[trace.serial]:
            bad = sum(n for _, n in nan_runs[trace.serial])
            rejections.append(rejection(trace.file, trace.trace_id, 0.0, "non-finite", f"{bad} NaN/Inf samples"))
            continue
        for first, n in nan_runs[trace.serial]:
            rejections.append(rejection(trace.file_at(first), trace.trace_id, first / fs, "non-finite",
                                        f"{n} NaN/Inf samples; trace split there"))
        segments += [SegmentInfo(trace, first, n) for first, n in runs[trace.serial]]
    for i, seg in enumerate(segments):
        seg.index = i
    return Scan(segments, rejections, orientations, assignment)


def _follow_runs(st: list, runs: list, nan_runs: list, first: int, bt: BlockTrace) -> None:
    """Extend a trace's finite runs and NaN runs by one block trace starting at sample ``first``;
    ``st`` = [open run start or None, open NaN start or None] carries across blocks."""
    pos = first
    for a, b in bt.runs:
        a, b = first + a, first + b
        if a > pos:  # non-finite samples before this run
            if st[0] is not None:
                runs.append((st[0], pos - st[0]))
                st[0] = None
            if st[1] is None:
                st[1] = pos
        if st[1] is not None:
            nan_runs.append((st[1], a - st[1]))
            st[1] = None
        if st[0] is None:
            st[0] = a
        pos = b
    if pos < first + bt.n:
        if st[0] is not None:
            runs.append((st[0], pos - st[0]))
            st[0] = None
        if st[1] is None:
            st[1] = pos


@dataclass(frozen=True)
class Group:
    """Files and segments that can be read apart from the rest: every file holding a sample of
    one of its segments' traces, and those segments (a cluster task reads one group)."""

    files: tuple
    segments: tuple


def groups(files, scan: Scan) -> list[Group]:
    """The corpus split into :class:`Group` s: files joined by the traces they share (connected
    components), in the order of their first segment."""
    parent = {path: path for path, _ in files}

    def root(p):
        while parent[p] != p:
            parent[p] = parent[parent[p]]
            p = parent[p]
        return p

    for seg in scan.segments:
        names = [f for _, f in seg.trace.parts]
        for other in names[1:]:
            parent[root(other)] = root(names[0])
    members: dict[str, list] = {}
    for seg in scan.segments:
        members.setdefault(root(seg.trace.file), []).append(seg)
    out = []
    for top, segs in members.items():
        out.append(Group(tuple((p, fmt) for p, fmt in files if root(p) == top), tuple(segs)))
    return out


def describe(files) -> str:
    """The files read, for an error message: the file, or how many and the first."""
    if len(files) == 1:
        return files[0][0]
    return f"{len(files)} files ({files[0][0]}, …)"


def rejection(file, trace_id, offset_s, reason, detail) -> dict:
    return {"file": file, "trace_id": trace_id, "offset_s": round(float(offset_s), 6), "reason": reason,
            "detail": detail}


# --- processed pieces ---------------------------------------------------------------------------

@dataclass(frozen=True)
class Layout:
    """How one segment is cut into pieces and brought to the common rate.

    Native samples ``n_raw`` at ``native_hz`` become ``n`` samples at ``rate_hz`` (polyphase
    ``up``/``down``). Piece k has the core ``[k·core, min((k+1)·core, n_raw))`` and the extended
    range reaching ``margin`` further on each side (clipped to the segment); both sizes are
    multiples of ``down``, and a core gives a whole number of ``FRAME``-sample output frames.
    ``taper_raw`` and ``taper`` are the cosine taper's length at each segment end, native and
    output samples (the segment's, not the piece's).
    """

    n_raw: int
    native_hz: float
    rate_hz: float
    up: int
    down: int
    core: int
    margin: int

    @classmethod
    def of(cls, seg: SegmentInfo, rate_hz: float) -> Layout:
        up, down = preprocess.resampling_factors(seg.native_rate_hz, rate_hz)
        step = FRAME * down // math.gcd(FRAME, up)   # core · up/down is a multiple of FRAME
        core = max(1, PIECE_SAMPLES // step) * step
        margin = max(1, MARGIN_SAMPLES // down) * down
        return cls(seg.n_raw, seg.native_rate_hz, rate_hz, up, down, core, margin)

    @property
    def n(self) -> int:
        """Output samples of the whole segment (``resample_poly``'s output length)."""
        return self.n_raw if (self.up, self.down) == (1, 1) else -(-self.n_raw * self.up // self.down)

    @property
    def n_pieces(self) -> int:
        return -(-self.n_raw // self.core)

    @property
    def taper_raw(self) -> int:
        return preprocess.taper_length(self.n_raw, self.native_hz)

    @property
    def taper(self) -> int:
        return preprocess.taper_length(self.n, self.rate_hz)

    def extended(self, k: int) -> tuple[int, int]:
        return max(0, k * self.core - self.margin), min((k + 1) * self.core + self.margin, self.n_raw)

    def core_range(self, k: int) -> tuple[int, int]:
        return k * self.core, min((k + 1) * self.core, self.n_raw)

    def to_output(self, raw_index: int) -> int:
        """Output index of native sample ``raw_index`` (a multiple of ``down``, or ``n_raw``)."""
        if raw_index >= self.n_raw:
            return self.n
        return raw_index * self.up // self.down


@dataclass
class Piece:
    """Processed samples of piece ``k`` of ``segment``.

    ``extended`` (float64, output rate) is the processed extended range, of which
    ``extended[core]`` is the core: output samples ``[start, start + core length)`` of the segment.
    ``raw`` holds the core's native samples (recorder dtype), starting at native sample
    ``raw_start``. ``last`` marks the segment's last piece.
    """

    segment: SegmentInfo
    layout: Layout
    k: int
    extended: np.ndarray
    core: slice
    start: int
    raw: np.ndarray
    raw_start: int

    @property
    def last(self) -> bool:
        return self.k == self.layout.n_pieces - 1

    @property
    def samples(self) -> np.ndarray:
        """The core's processed samples, output rate."""
        return self.extended[self.core]


def process_piece(raw: np.ndarray, layout: Layout, k: int, sos) -> tuple[np.ndarray, slice]:
    """Demean, detrend, taper (at the segment's own ends only), resample and band-pass the extended
    range of piece ``k``; returns the processed samples and the slice of its core. With one piece
    this is the whole segment, processed as one."""
    e0, e1 = layout.extended(k)
    c0, c1 = layout.core_range(k)
    x = raw.astype(np.float64)
    preprocess.demean_detrend(x)
    preprocess.taper_ends(x, e0, layout.n_raw, layout.taper_raw)
    if (layout.up, layout.down) != (1, 1):
        x = signal.resample_poly(x, layout.up, layout.down)
    if sos is not None:
        x = preprocess.zero_phase(sos, x)
    offset = layout.to_output(e0)
    return x, slice(layout.to_output(c0) - offset, layout.to_output(c1) - offset)


class _Builder:
    """Gathers one segment's native samples as they are read and hands out its pieces' extended
    ranges as soon as they are complete, keeping only what later pieces still need."""

    def __init__(self, seg: SegmentInfo, layout: Layout):
        self.seg, self.layout = seg, layout
        self.blocks: list[np.ndarray] = []
        self.lo = self.hi = 0   # segment samples [lo, hi) held in blocks
        self.k = 0

    def add(self, data: np.ndarray) -> None:
        self.blocks.append(data)
        self.hi += data.size

    def ready(self):
        """(k, extended native samples) of each piece whose extended range is now held."""
        while self.k < self.layout.n_pieces:
            e0, e1 = self.layout.extended(self.k)
            if self.hi < e1:
                return
            held = self.blocks[0] if len(self.blocks) == 1 else np.concatenate(self.blocks)
            ext = held[e0 - self.lo: e1 - self.lo]
            keep = self.layout.extended(self.k + 1)[0] if self.k + 1 < self.layout.n_pieces else self.hi
            self.blocks, self.lo = [held[keep - self.lo:]], keep
            yield self.k, ext
            self.k += 1


def pieces(files, segments, rate_hz: float, sos, *, csv_rate, assignment):
    """Read ``files`` again and yield the :class:`Piece` objects of ``segments`` (each segment's in
    order; segments interleave as their samples arrive). ``assignment`` is :func:`join`'s, for
    the same files and options; ``files`` may be a :class:`Group`'s, read apart from the rest."""
    by_trace: dict[int, list[SegmentInfo]] = {}
    for seg in segments:
        by_trace.setdefault(seg.trace.serial, []).append(seg)
    builders: dict[int, _Builder] = {}
    for path, fmt in files:
        for b, block in enumerate(iter_waveform_chunks(path, fmt, csv_sampling_rate_hz=csv_rate)):
            for i, raw in enumerate(block):
                where = assignment.get((path, b, i))
                if where is None or where[0] not in by_trace:
                    continue
                serial, first, n = where
                if raw.data.size != n:
                    raise CorpusError(f"{path}: changed while being read ({raw.data.size} samples where the "
                                      f"first look found {n})")
                yield from _route(by_trace[serial], builders, first, raw.data, rate_hz, sos)
    if builders:
        missing = ", ".join(f"{b.seg.file} ({b.seg.trace_id})" for b in builders.values())
        raise CorpusError(f"{missing}: changed while being read (fewer samples than at the first look)")


def _route(segments, builders, first, data, rate_hz, sos):
    """Hand the samples of a trace from sample ``first`` on to the segments they fall in, and
    yield each piece that becomes complete."""
    end = first + data.size
    for seg in segments:
        s0, s1 = seg.first_sample, seg.first_sample + seg.n_raw
        if s1 <= first or s0 >= end:
            continue
        builder = builders.get(seg.index)
        if builder is None:
            builder = builders[seg.index] = _Builder(seg, Layout.of(seg, rate_hz))
        builder.add(data[max(s0, first) - first: min(s1, end) - first])
        for k, ext in builder.ready():
            layout = builder.layout
            x, core = process_piece(ext, layout, k, sos)
            c0, c1 = layout.core_range(k)
            e0 = layout.extended(k)[0]
            yield Piece(seg, layout, k, x, core, layout.to_output(c0), ext[c0 - e0: c1 - e0], c0)
        if builder.k == builder.layout.n_pieces:
            del builders[seg.index]
