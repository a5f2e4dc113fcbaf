"""The filterbank over continuous records, written to a chunked Zarr v3 store.

Every trace (SEED id) is read as the tuning read its corpus (the streaming reader's processed
pieces, :mod:`search.corpus.stream`: detrend, taper at the segment's ends, resampling to the
filterbank's rate, band-pass) and transformed whole, a bounded piece at a time. Piece j's output
is the samples ``[j·T·Δ, (j+1)·T·Δ)`` of its segment, sampled every Δ (:mod:`search.timestep`), T
steps = one Zarr chunk; its input reaches ``overlap`` samples further on each side,

    overlap = max_c (⌈√(2 ln 1/ε)·σ_t,c·fs⌉ + L_c),

the time kernel's truncated half-width plus the lag count (:func:`search.wvd.lag_count`): S_c[n]
reads r[n′, m] = z[n′+m]·z*[n′−m] for |n − n′| within the kernel and m ≤ L_c, so a piece edge
changes nothing beyond the round-off of the analytic signal's edge (tested to 1e-5 relative). Within
``overlap`` of a segment's own ends the result depends on how the record's ends are handled (the
one-pass FFT analytic signal wraps the end onto the start; pieces do not).

Steady lines (``Filterbank.steady_lines_hz``) are removed per piece, by the same robust fit as
``transform`` (:func:`search.noise.remove_lines` over the piece's input range), before the
kernels see the samples: their fit, so the image, depends on the piece (measured in the tests).

Each chunk is computed at its output samples only (:func:`search.tfd.transform_decimated`,
equal to the hop-1 image sampled every Δ; ``precision="single"`` computes the unchirped
channels in float32, about 1e-7 of the image's peak from the double-precision image). Chunks run
in this process (``jobs=1``), on a local process pool (joblib, ``jobs`` workers), or on a
Dask cluster when joblib's Dask backend is in force (``joblib.parallel_config(backend="dask")``,
or ``service.dask_backend.evaluations_on``): the reader stays in this process, hands out batches
of chunks (input samples, offset, step) and writes their images in order, so the store's bytes
do not depend on where the chunks ran (in double precision; see ``transform_continuous``).

Store layout (Zarr v3, readable with ``xarray.open_zarr(store, group=..., consolidated=False)``
and no burstlens): one group per SEED id, one sub-group per part (a gap or a non-finite run
splits a trace), named by its first sample's UTC time ``YYYYmmddTHHMMSS.ffffffZ``; in it
``image`` (time, frequency) float32 chunked along time, ``time`` int64 ns since 1970-01-01 UTC
(CF ``units``, decoded to datetime64[ns]), ``frequency`` the channels' centres (Hz) and
``time_spread_s``. Attributes (root and every part): the filterbank JSON, its sha256, the reading
settings and the time step. Per part, ``complete_until`` counts the leading time steps written
(every chunk before it complete; later chunks read NaN until written) and ``final_until`` those no
later samples of the trace can change; ``n_samples`` is the trace's length as read. A run that
dies resumes at ``complete_until``; a later run over the trace extended (the earlier files
with the new) rewrites from ``final_until`` and extends ``time``. The root's and a part's
attributes are written with the group, in one write, and a new part's ``complete_until`` only
once its arrays and coordinates are whole: a run killed while creating a part leaves one
without it, which the next run makes anew. A write cut short leaves Zarr's temp file
(``*.partial``: the local store writes each key to one and renames it onto the key); the next
run removes them, so a copy of the store carries none.

Appending from the new files alone. A part's image near its end depends on samples not yet
recorded twice over: through the kernels (``overlap`` samples) and, before them, through the
reader's processing of its last pieces (each piece is detrended over its extended range, band-
passed and resampled with a margin, and the segment's last second is tapered). So the last
trace of each SEED id keeps its *seam* in the store, the state from which a continuation
proceeds exactly as a run over all the files would: in ``{part}/seam_{n_raw}`` the native samples
``raw`` from the first reader piece a continuation re-processes (``extended(K)[0]``, K =
:func:`final_pieces`) to the part's end, and the processed samples ``processed`` from the first
chunk a continuation rewrites (``final_until`` less ``overlap``) to where piece K begins, with
the part's ``seam`` attribute pointing at it. New data that starts within half a sample of the
seam's end (same id, rate and sample kind, the reader's own joining rule) continues the part:
pieces K… are processed from the seam's samples and the new ones with the joined segment's
layout, chunks from ``final_until`` on are rewritten, so the store holds the same bytes as one
run over all the files (tested). The new seam is written after the part's last chunk and only
then named in ``seam`` (the old one is removed after), so a run that dies mid-append resumes
from the same files. New data overlapping a stored part, or touching one it cannot continue,
is refused with a ValueError naming the SEED id and the times.
"""
from __future__ import annotations

import hashlib
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from datetime import UTC, datetime

import numpy as np

from burstlens.search.corpus import preprocess, stream
from burstlens.search.corpus.ingest import expand_paths
from burstlens.search.corpus.model import CorpusError
from burstlens.search.documents import FilterbankDocument
from burstlens.search.filterbank import Filterbank
from burstlens.search.timestep import TimeStep, time_step
from burstlens.search.tfd import transform_decimated
from burstlens.search.wvd import lag_count, truncation_width

FORMAT = "burstlens-continuous"
VERSION = 1
PIECE_SAMPLES = 1 << 16  # target output samples per piece (one Zarr chunk of T = this // Δ steps)
SEAM_CHUNK = 1 << 20  # samples per Zarr chunk of a seam's arrays
BATCH_PER_WORKER = 4  # chunks handed to the pool per worker at a time (bounds the samples held)
_NO_CAP = 1 << 62


def overlap_samples(filterbank: Filterbank, *, eps: float = 1e-6) -> int:
    """max_c (⌈√(2 ln 1/ε)·σ_t,c·fs⌉ + L_c): the input samples beyond a piece's output on each
    side that its kernels read (time half-width plus lag count, both truncated at ε)."""
    fs = filterbank.sampling_rate_hz
    half = np.ceil(truncation_width(eps) * filterbank.time_spread_s * fs).astype(np.int64)
    lags = np.atleast_1d(lag_count(filterbank.conditional_freq_spread_hz, fs, _NO_CAP, eps))
    return int((half + lags).max())


def part_name(start_ns: int) -> str:
    """The part's group name: its first sample's UTC time, ``YYYYmmddTHHMMSS.ffffffZ``."""
    seconds, ns = divmod(int(start_ns), 1_000_000_000)
    stamp = datetime.fromtimestamp(seconds, UTC).strftime("%Y%m%dT%H%M%S")
    return f"{stamp}.{ns // 1000:06d}Z"


def final_pieces(layout: stream.Layout) -> int:
    """K: the leading reader pieces of a segment that no continuation of it changes.

    Piece k (``stream.process_piece``) reads the native samples ``layout.extended(k)`` and the
    cosine taper of the segment's ends, m = ``layout.taper_raw`` samples each side. A later sample
    changes it when its extended range is cut by the segment's end or meets the end taper,
    (k+1)·core + margin > n_raw − m, or, for a segment shorter than TAPER_FRACTION⁻¹·TAPER_MAX_S
    (the taper not yet at its cap), always (its head taper grows). Returns K ≥ 0 (pieces, not
    samples); output samples before ``layout.to_output(K·core)`` are final."""
    cap = preprocess.taper_length(_NO_CAP, layout.native_hz)
    if layout.taper_raw < cap:
        return 0
    return min(layout.n_pieces, max(0, (layout.n_raw - layout.taper_raw - layout.margin) // layout.core))


def filterbank_sha256(document: FilterbankDocument) -> str:
    """sha256 (hex) of the filterbank document's JSON encoding (``documents.encode``)."""
    return hashlib.sha256(document.encode()).hexdigest()


@dataclass
class PartResult:
    """One part written: SEED id, group path, first sample (ns since epoch, UTC), steps in the
    store, steps computed by this run, the step it resumed at, and whether the run's samples
    continued a part already in the store (from its seam)."""

    trace_id: str
    group: str
    start_ns: int
    n_steps: int
    steps_written: int
    resumed_at_step: int
    appended: bool = False


@dataclass
class ContinuousResult:
    """What :func:`transform_continuous` wrote: the step, the overlap and the parts."""

    step: TimeStep
    overlap: int
    parts: list[PartResult] = field(default_factory=list)


def transform_continuous(paths, document: FilterbankDocument, out: str, *, step_s: float | None = None,
                         reading: dict | None = None, piece_samples: int = PIECE_SAMPLES, eps: float = 1e-6,
                         progress: Callable[[int], None] | None = None,
                         on_chunk: Callable[[str, int], None] | None = None,
                         on_plan: Callable[[int], None] | None = None, jobs: int = 1,
                         precision: str = "double") -> ContinuousResult:
    """Transform every trace of ``paths`` whole and write the images to the Zarr store ``out``.

    ``document``: the tuned filterbank; ``reading``: its ``reading_options()`` (rate,
    ``components``, ``bandpass_hz``, ``csv_sampling_rate_hz``; windowing options are ignored).
    ``step_s``: output step in s (default: :func:`search.timestep.time_step`'s rule).
    ``piece_samples``: output samples per piece (about; a whole number of steps, one chunk).
    ``progress(n)`` after each chunk written (n chunks); ``on_plan(total)`` once the chunks
    to write are known; ``on_chunk(group, steps_complete)`` after each chunk's marker is updated
    (what it raises stops the run, the store stays resumable). ``jobs``: processes computing
    chunks (joblib; 1 = this process, −1 = all CPUs); under joblib's Dask backend the cluster's
    workers, whatever ``jobs`` says. ``precision``: ``"double"`` (default) or ``"single"``, the
    unchirped channels' lag products and FFTs in float32 (``transform_decimated``'s; about 2.5×
    faster, the same bytes serially and on process pools, but chunks computed at once in threads
    of one process, e.g. a Dask worker with several threads, may differ in the last bits; the
    store records it). Raises ``CorpusError`` naming the
    file for unreadable input, ``ValueError`` for a store written with another filterbank,
    reading or step.
    """
    import zarr

    if precision not in ("double", "single"):
        raise ValueError(f"precision={precision!r} must be 'double' or 'single'")
    if isinstance(jobs, bool) or not isinstance(jobs, int) or jobs == 0 or jobs < -1:
        raise ValueError(f"jobs={jobs!r} must be a whole number ≥ 1, or −1 for all CPUs")
    filterbank = document.filterbank
    fs = filterbank.sampling_rate_hz
    reading = dict(reading if reading is not None else document.reading_options())
    step = time_step(filterbank, step_s=step_s, eps=eps)
    overlap = overlap_samples(filterbank, eps=eps)
    chunk_steps = max(1, int(piece_samples) // step.samples)
    files, _ = expand_paths(paths)
    csv_rate = reading.get("csv_sampling_rate_hz")
    summaries = [stream.summarize_file(path, fmt, csv_rate) for path, fmt in files]
    scan = stream.join(files, summaries, components=reading.get("components"), whole=False)
    if not scan.segments:
        raise CorpusError(f"{stream.describe(files)}: no finite samples to transform")
    for seg in scan.segments:
        if seg.start is None:
            raise CorpusError(f"{seg.file}: trace {seg.trace_id} carries no start time; the continuous "
                              f"transform needs absolute (UTC) times (miniSEED, SAC, SEG-Y)")
    preprocess.check_rates(scan.segments, fs, "requested")
    band = reading.get("bandpass_hz")
    sos = preprocess.bandpass_sos(band, fs) if band is not None else None
    settings = {
        "sampling_rate_hz": fs, "components": reading.get("components"),
        "bandpass_hz": list(band) if band is not None else None,
        "bandpass_order": preprocess.BANDPASS_ORDER if sos is not None else None,
        "detrend": "linear, per reader piece", "taper": f"cosine at each segment's ends, at most "
        f"{preprocess.TAPER_MAX_S:g} s", "resampling": "polyphase (scipy.signal.resample_poly)",
        "csv_sampling_rate_hz": csv_rate, "steady_lines": "removed per piece (robust least squares)",
        "eps": eps, "overlap_samples": overlap, "chunk_steps": chunk_steps, "precision": precision,
    }
    attrs = {"format": FORMAT, "version": VERSION, "filterbank": document.to_json(),
             "filterbank_sha256": filterbank_sha256(document), "reading": settings,
             "time_step": step.to_json(), "time_step_s": step.seconds, "sampling_rate_hz": fs}
    root = _open_root(zarr, out, attrs)
    last = {seg.trace_id: seg.index for seg in scan.segments}  # a trace's last segment keeps a seam
    plans = [_plan_part(root, seg, out) for seg in scan.segments]  # refuses before anything is written
    context = _Context(filterbank, step.samples, chunk_steps, overlap, attrs, eps, sos, on_chunk, precision)
    writers = {}
    for seg, (mode, stored) in zip(scan.segments, plans, strict=True):
        writers[seg.index] = _PartWriter(root, seg, mode, stored, context, seam=last[seg.trace_id] == seg.index)
    if on_plan is not None:
        on_plan(sum(w.chunks_to_write for w in writers.values()))
    runner = _Runner(jobs)
    done = 0
    try:
        pending: list[_Chunk] = []
        for piece in stream.pieces(files, scan.segments, fs, sos, csv_rate=csv_rate,
                                   assignment=scan.assignment):
            pending.extend(writers[piece.segment.index].take(piece))
            if len(pending) >= runner.batch:
                done = runner.run(pending, done, progress)
                pending = []
        done = runner.run(pending, done, progress)
    except (ValueError, OSError) as exc:
        if isinstance(exc, CorpusError):
            raise
        raise CorpusError(f"{stream.describe(files)}: {exc}") from None
    finally:
        runner.close()
    result = ContinuousResult(step, overlap)
    for writer in writers.values():
        if not writer.finished:
            raise CorpusError(f"{writer.seg.file} ({writer.seg.trace_id}): ended before all its samples "
                              f"were read")
        writer.keep_seam()
        result.parts.append(writer.result())
    return result


def _open_root(zarr, out: str, attrs: dict):
    """The store's root group, created with ``attrs`` or checked against them."""
    try:
        root = zarr.open_group(out, mode="r+", zarr_format=3)
    except (FileNotFoundError, zarr.errors.GroupNotFoundError):
        # one write (attrs.update writes once per key): a kill leaves no root or a whole one
        return zarr.open_group(out, mode="w-", zarr_format=3, attributes=attrs)
    _remove_temp_files(out)
    old = dict(root.attrs)
    if old.get("format") != FORMAT:
        raise ValueError(f"--out {out}: not a {FORMAT} store (format {old.get('format')!r})")
    for key, what in (("filterbank_sha256", "filterbank"), ("time_step_s", "time step"),
                      ("reading", "reading settings")):
        was, now = old.get(key), attrs[key]
        if was != now:
            if isinstance(was, dict):  # name the settings that differ, not all of them
                keys = sorted(k for k in set(was) | set(now) if was.get(k) != now.get(k))
                was, now = ({k: d.get(k) for k in keys} for d in (was, now))
            raise ValueError(f"--out {out}: the store was written with another {what} "
                             f"({key} {was!r}, now {now!r}); write to a new store")
    return root


def _remove_temp_files(out: str) -> None:
    """Remove the temp files of Zarr writes a killed run cut short (``*.partial`` under a local
    store's folder; readers never use them, a copy of the store would carry them)."""
    import os
    from pathlib import Path

    if os.path.isdir(out):
        for path in Path(out).rglob("*.partial"):
            path.unlink(missing_ok=True)


def chunk_image(x: np.ndarray, filterbank: Filterbank, eps: float, step: int, offset: int,
                n_steps: int, precision: str = "double") -> np.ndarray:
    """One chunk's steps: (n_steps, C) float32, rows the samples offset + k·step of the
    transform of the input samples ``x`` (N,) (module level: joblib and Dask workers import it)."""
    return transform_decimated(x, filterbank, step, offset=offset, eps=eps, precision=precision)[:, :n_steps].T


@dataclass
class _Chunk:
    """One chunk to compute: its part, its index, input samples and where its steps start."""

    writer: _PartWriter
    index: int
    x: np.ndarray
    offset: int
    n_steps: int


class _Runner:
    """Computes batches of chunks in this process, on joblib's pool, or on the Dask cluster of
    joblib's Dask backend, and has each part write its chunks in order."""

    def __init__(self, jobs: int):
        from joblib import Parallel, effective_n_jobs
        from joblib.parallel import get_active_backend

        kind = type(get_active_backend()[0]).__name__
        self.parallel = None
        self.batch = 1
        if kind == "DaskDistributedBackend":  # the cluster's workers, whatever jobs says
            self.parallel = Parallel(n_jobs=-1)
        elif jobs != 1 and kind != "SequentialBackend":
            self.parallel = Parallel(n_jobs=jobs)
        if self.parallel is not None:
            self.parallel.__enter__()
            self.batch = BATCH_PER_WORKER * max(1, effective_n_jobs(self.parallel.n_jobs))

    def run(self, chunks: list[_Chunk], done: int, progress) -> int:
        if not chunks:
            return done
        args = [(c.x, c.writer.filterbank, c.writer.eps, c.writer.step, c.offset, c.n_steps, c.writer.ctx.precision)
                for c in chunks]
        if self.parallel is None:
            images = [chunk_image(*a) for a in args]
        else:
            from joblib import delayed

            images = self.parallel(delayed(chunk_image)(*a) for a in args)
        for chunk, image in zip(chunks, images, strict=True):
            chunk.writer.write(chunk, image)
            done += 1
            if progress is not None:
                progress(done)
        return done

    def close(self) -> None:
        if self.parallel is not None:
            self.parallel.__exit__(None, None, None)
            self.parallel = None


@dataclass(frozen=True)
class _Context:
    """What every part of a run shares."""

    filterbank: Filterbank
    step: int
    chunk_steps: int
    overlap: int
    attrs: dict
    eps: float
    sos: np.ndarray | None
    on_chunk: Callable[[str, int], None] | None
    precision: str


@dataclass(frozen=True)
class _Stored:
    """A part already in the store, as its attributes describe it (POSIX s, native samples)."""

    group: str
    start_s: float
    n_raw: int
    native_rate_hz: float
    kind: str
    seam: dict | None

    @property
    def end_s(self) -> float:
        return self.start_s + self.n_raw / self.native_rate_hz

    @property
    def seam_end_s(self) -> float | None:
        return None if self.seam is None else self.start_s + self.seam["n_raw"] / self.native_rate_hz


def _stored_parts(root, trace_id: str, fs: float) -> list[_Stored]:
    """The parts of ``trace_id`` in the store (none for a new trace). Parts written before seams
    existed lack ``n_raw``: their extent is then taken from ``n_samples`` at the output rate."""
    if trace_id not in root:
        return []
    parts = []
    for name, group in root[trace_id].groups():
        a = group.attrs
        rate = float(a.get("native_rate_hz", fs))
        start = float(a.get("start_s", int(a["start_ns"]) / 1e9))
        parts.append(_Stored(f"{trace_id}/{name}", start, int(a.get("n_raw", a["n_samples"])), rate,
                             str(a.get("sample_kind", "")), a.get("seam")))
    return parts


def _plan_part(root, seg, out: str) -> tuple[str, _Stored | None]:
    """How a segment meets the store: ``("new", None)``, ``("rerun", part)`` (it starts where a
    stored part starts: resume, or the same trace read again with later files), or
    ``("continue", part)`` (it starts where a stored part's seam ends). Raises ValueError naming
    the SEED id and the times when it overlaps a stored part, or touches one it cannot continue."""
    rate = seg.native_rate_hz
    tol = 0.5 / rate  # the reader's joining rule (stream.TraceInfo.continues)
    start, end = seg.start, seg.start + seg.n_raw / rate
    parts = _stored_parts(root, seg.trace_id, rate)
    here = f"{seg.file}: {seg.trace_id} from {_iso_s(start)} to {_iso_s(end)}"
    found = ("new", None)
    for part in parts:
        joinable = part.native_rate_hz == rate and part.kind in ("", seg.trace.kind)
        if joinable and part.seam is not None and abs(start - part.seam_end_s) < tol:
            found = ("continue", part)
            end = max(end, part.end_s)
            break
        if abs(start - part.start_s) < tol:
            if seg.n_raw < part.n_raw:
                raise ValueError(f"{here} overlaps the stored part {part.group} of {out}, which runs on to "
                                 f"{_iso_s(part.end_s)}: the store already holds these times (append only "
                                 f"later data, or transform into a new store)")
            found = ("rerun", part)
            break
    for part in parts:
        if found[1] is part:
            continue
        if start < part.end_s - tol and end > part.start_s - tol:
            stored = f"the stored part {part.group} ({_iso_s(part.start_s)} to {_iso_s(part.end_s)}) of {out}"
            if end > part.start_s + tol:
                raise ValueError(f"{here} overlaps {stored}; the store already holds these times (append only "
                                 f"later data, or transform all the files into a new store)")
            raise ValueError(f"{here} ends where {stored} begins; data cannot be joined to a stored part "
                             f"from before its start (transform all the files into a new store)")
        joinable = part.native_rate_hz == rate and part.kind in ("", seg.trace.kind)
        if found[0] == "new" and joinable and abs(start - part.end_s) < tol:
            raise ValueError(f"{here} continues the stored part {part.group} of {out}, which cannot be "
                             f"continued: {_why_no_seam(part)}; or transform all the files into a new store")
    return found


def _why_no_seam(part: _Stored) -> str:
    """Why a stored part ending where new data starts has no seam there, in words."""
    if part.seam is not None:
        return (f"an append to it stopped (its seam ends at {_iso_s(part.seam_end_s)}): run the files "
                f"that continue it from there first")
    if not part.kind:
        return "it was written before stores kept seams (no appends from new files alone)"
    return "its run did not finish, or a later part of its trace followed it: run the same files again first"


class _Continuation:
    """A stored part's trace joined with new samples: the native samples from the seam on, then
    each new reader piece's core, cut into the joined segment's pieces K, K+1, … (``layout``, the
    joined length) and processed as a run over all the files would process them."""

    def __init__(self, layout: stream.Layout, first_piece: int, raw_first: int, raw: np.ndarray, sos):
        self.layout, self.k, self.sos = layout, first_piece, sos
        self.blocks, self.lo, self.hi = [raw], raw_first, raw_first + raw.size

    def add(self, raw: np.ndarray):
        """Take the next native samples; yield (output start, processed core, native core start)
        of each joined piece now complete."""
        self.blocks.append(raw)
        self.hi += raw.size
        layout = self.layout
        while self.k < layout.n_pieces:
            e0, e1 = layout.extended(self.k)
            if self.hi < e1:
                return
            held = self.blocks[0] if len(self.blocks) == 1 else np.concatenate(self.blocks)
            x, core = stream.process_piece(held[e0 - self.lo: e1 - self.lo], layout, self.k, self.sos)
            c0 = layout.core_range(self.k)[0]
            keep = layout.extended(self.k + 1)[0] if self.k + 1 < layout.n_pieces else self.hi
            self.blocks, self.lo = [held[keep - self.lo:]], keep
            self.k += 1
            yield layout.to_output(c0), x[core]


class _PartWriter:
    """One segment: gathers its processed samples, writes each chunk once its input is held, and
    keeps the samples of its seam as they pass."""

    def __init__(self, root, seg, mode: str, stored: _Stored | None, ctx: _Context, *, seam: bool):
        self.seg, self.ctx, self.mode, self.stored, self.wants_seam = seg, ctx, mode, stored, seam
        self.filterbank, self.eps, self.on_chunk = ctx.filterbank, ctx.eps, ctx.on_chunk
        self.step, self.chunk_steps, self.overlap = ctx.step, ctx.chunk_steps, ctx.overlap
        fs = self.filterbank.sampling_rate_hz
        layout = stream.Layout.of(seg, fs)
        old_seam = stored.seam if mode == "continue" else None
        if old_seam is not None:
            layout = replace(layout, n_raw=int(old_seam["n_raw"]) + seg.n_raw)
            self.start_s, self.start_ns = stored.start_s, int(root[stored.group].attrs["start_ns"])
        else:
            self.start_s, self.start_ns = seg.start, int(round(seg.start * 1e6)) * 1000
        self.layout = layout
        self.n = layout.n
        self.n_steps = -(-self.n // self.step)
        self.span = self.chunk_steps * self.step  # output samples per chunk
        self.n_chunks = -(-self.n_steps // self.chunk_steps)
        # the seam: samples no continuation changes end at `final_out`; chunks reading only
        # those are final, the rest are rewritten from `proc_from` and pieces K… from `raw_from`
        self.final_pieces = final_pieces(layout)
        final_out = layout.to_output(self.final_pieces * layout.core) if self.final_pieces else 0
        self.final_chunks = min(self.n_chunks, max(0, final_out - self.overlap) // self.span)
        self.final_until = min(self.n_steps, self.final_chunks * self.chunk_steps)
        self.raw_from = layout.extended(self.final_pieces)[0] if self.final_pieces else 0
        self.proc_from, self.proc_to = max(0, self.final_chunks * self.span - self.overlap), final_out
        self.raw_tail: list[np.ndarray] = []
        self.proc_tail: list[np.ndarray] = []
        self.group_path = stored.group if stored is not None else f"{seg.trace_id}/{part_name(self.start_ns)}"
        self.image, self.group, first = self._prepare(root)
        self.next_chunk = self.resumed_chunk = first  # the next chunk to write
        self.planned = first  # the next chunk to hand out
        self.chunks_to_write = self.n_chunks - first
        self.buffer = np.zeros(0)
        self.buffer_start = 0  # output index of buffer[0]
        self.received = 0      # output samples received so far
        self.steps_written = 0
        self.joined = None
        self.ready: list[_Chunk] = []
        if old_seam is not None:  # start from the stored seam: its native and processed samples
            held = self.group[old_seam["group"]]
            raw = held["raw"][:]
            self.joined = _Continuation(layout, int(old_seam["final_pieces"]), int(old_seam["raw_first"]), raw,
                                        ctx.sos)
            self._keep_raw(int(old_seam["raw_first"]), raw)
            self.ready = self.feed(int(old_seam["processed_first"]), held["processed"][:])

    def _prepare(self, root):
        """Create the part's arrays, or reopen them and choose the chunk to resume at."""
        fb = self.filterbank
        marks = {"n_samples": self.n, "final_until": self.final_until, "n_raw": self.layout.n_raw,
                 "start_s": self.start_s, "native_rate_hz": self.seg.native_rate_hz,
                 "sample_kind": self.seg.trace.kind}
        if self.stored is not None and "complete_until" not in root[self.group_path].attrs:
            del root[self.group_path]  # a run was killed while creating it: make it anew
            self.stored = None
        if self.stored is not None:
            group = root[self.group_path]
            old_n = int(group.attrs.get("n_samples", -1))
            done = int(group.attrs.get("complete_until", 0))
            whole = self.n_chunks if done >= self.n_steps else done // self.chunk_steps  # chunks complete
            if self.mode == "continue":
                if int(group.attrs["n_raw"]) == self.layout.n_raw:  # the same append, resumed
                    first = whole
                else:
                    first = min(done // self.chunk_steps, int(self.stored.seam["final_chunks"]))
            elif old_n == self.n:
                first = whole
            else:  # the trace goes on: keep only what no later sample changes
                first = min(done, int(group.attrs.get("final_until", 0))) // self.chunk_steps
            # lower the marker before the arrays change: nothing stale ever reads as complete
            group.attrs.update({"complete_until": min(self.n_steps, first * self.chunk_steps), **marks})
            image = group["image"]
            image.resize((self.n_steps, len(fb)))
            times = group["time"]
            times.resize((self.n_steps,))
            times[:] = self._times()
            return image, group, first
        trace_group = root.require_group(self.seg.trace_id)
        # the attributes in one write; complete_until once the arrays are whole (see above)
        group = trace_group.create_group(self.group_path.split("/")[-1], attributes={
            **self.ctx.attrs, "trace_id": self.seg.trace_id, "start": _iso(self.start_ns),
            "start_ns": self.start_ns, **marks, "seam": None})
        chunks = (self.chunk_steps, len(fb))
        image = group.create_array("image", shape=(self.n_steps, len(fb)), chunks=chunks, dtype="float32",
                                   fill_value=float("nan"), dimension_names=("time", "frequency"),
                                   attributes={"long_name": "filterbank image", "units": "signal units^2",
                                               "coordinates": "time_spread_s"})
        times = group.create_array("time", shape=(self.n_steps,), chunks=(self.chunk_steps,), dtype="int64",
                                   fill_value=0, dimension_names=("time",),
                                   attributes={"units": "nanoseconds since 1970-01-01T00:00:00",
                                               "calendar": "proleptic_gregorian", "standard_name": "time"})
        times[:] = self._times()
        freq = group.create_array("frequency", shape=(len(fb),), dtype="float64", dimension_names=("frequency",),
                                  attributes={"units": "Hz", "long_name": "channel centre frequency"},
                                  fill_value=0.0)
        freq[:] = fb.center_hz
        spread = group.create_array("time_spread_s", shape=(len(fb),), dtype="float64",
                                    dimension_names=("frequency",), attributes={"units": "s"}, fill_value=0.0)
        spread[:] = fb.time_spread_s
        group.attrs["complete_until"] = 0
        return image, group, 0

    def _times(self) -> np.ndarray:
        """UTC time of each output step, ns since 1970-01-01 (the record's start plus i·Δ/fs)."""
        offsets = np.arange(self.n_steps, dtype=np.float64) * (self.step * 1e9 / self.filterbank.sampling_rate_hz)
        return self.start_ns + np.round(offsets).astype(np.int64)

    @property
    def finished(self) -> bool:
        return self.next_chunk >= self.n_chunks

    def take(self, piece: stream.Piece) -> list[_Chunk]:
        """Take a reader piece of this segment; return the chunks whose input is now held."""
        chunks, self.ready = self.ready, []
        if self.joined is None:
            self._keep_raw(piece.raw_start, piece.raw)
            return chunks + self.feed(piece.start, piece.samples)
        raw_start = int(self.stored.seam["n_raw"]) + piece.raw_start  # in the joined segment
        self._keep_raw(raw_start, piece.raw)
        for start, samples in self.joined.add(piece.raw):
            chunks += self.feed(start, samples)
        return chunks

    def _keep_raw(self, raw_start: int, raw: np.ndarray) -> None:
        if self.wants_seam and raw_start + raw.size > self.raw_from:
            self.raw_tail.append(np.array(raw[max(0, self.raw_from - raw_start):]))

    def feed(self, start: int, samples: np.ndarray) -> list[_Chunk]:
        """Take processed samples [start, start + size) (output rate, in order); return the
        chunks whose input is now held."""
        if self.wants_seam and start < self.proc_to and start + samples.size > self.proc_from:
            self.proc_tail.append(samples[max(0, self.proc_from - start): self.proc_to - start].copy())
        keep_from = max(0, self.planned * self.span - self.overlap)
        if start + samples.size > keep_from:
            cut = max(0, keep_from - start)
            if self.buffer.size == 0:
                self.buffer_start = start + cut
                self.buffer = samples[cut:].copy()
            else:
                self.buffer = np.concatenate((self.buffer, samples[cut:]))
        self.received = start + samples.size
        chunks = []
        while self.planned < self.n_chunks:
            a = self.planned * self.span
            b = min(self.n, a + self.span)
            hi = min(self.n, b + self.overlap)
            if self.received < hi:
                break
            lo = max(0, a - self.overlap)
            # a view: the buffer is only ever replaced, never written, so it stays valid
            x = self.buffer[lo - self.buffer_start: hi - self.buffer_start]
            chunks.append(_Chunk(self, self.planned, x, a - lo, -(-(b - a) // self.step)))
            self.planned += 1
            drop = max(0, self.planned * self.span - self.overlap) - self.buffer_start
            if drop > 0:
                self.buffer = self.buffer[drop:]
                self.buffer_start += drop
        return chunks

    def write(self, chunk: _Chunk, steps: np.ndarray) -> None:
        """Store a computed chunk ((n_steps, C) float32), then advance the part's marker."""
        s0 = chunk.index * self.chunk_steps
        self.image[s0: s0 + steps.shape[0]] = steps
        self.next_chunk += 1
        self.steps_written += steps.shape[0]
        complete = min(self.n_steps, self.next_chunk * self.chunk_steps)
        self.group.attrs["complete_until"] = complete  # after the chunk: never claims more
        if self.on_chunk is not None:
            self.on_chunk(self.group_path, complete)

    def keep_seam(self) -> None:
        """Write the part's seam (after its last chunk), then name it in ``seam``, then remove
        the one it replaces: at every moment ``seam`` names a complete one or none."""
        if not self.wants_seam:
            return
        current = self.group.attrs.get("seam")
        name = f"seam_{self.layout.n_raw}"
        if current is not None and current["n_raw"] == self.layout.n_raw:
            return
        if name in self.group:
            del self.group[name]
        held = self.group.create_group(name)
        raw = np.concatenate(self.raw_tail) if self.raw_tail else np.zeros(0)
        processed = np.concatenate(self.proc_tail) if self.proc_tail else np.zeros(0)
        if raw.size != self.layout.n_raw - self.raw_from or processed.size != self.proc_to - self.proc_from:
            raise AssertionError(f"{self.group_path}: seam of {raw.size}, {processed.size} samples where "
                                 f"{self.layout.n_raw - self.raw_from}, {self.proc_to - self.proc_from} are due")
        for key, data in (("raw", raw), ("processed", processed)):
            array = held.create_array(key, shape=data.shape, chunks=(max(1, min(data.size, SEAM_CHUNK)),),
                                      dtype=data.dtype, fill_value=0)
            if data.size:
                array[:] = data
        self.group.attrs["seam"] = {
            "group": name, "n_raw": self.layout.n_raw, "raw_first": self.raw_from,
            "processed_first": self.proc_from, "final_pieces": self.final_pieces,
            "final_chunks": self.final_chunks}
        for old, _ in list(self.group.groups()):
            if old.startswith("seam_") and old != name:
                del self.group[old]

    def result(self) -> PartResult:
        return PartResult(self.seg.trace_id, self.group_path, self.start_ns, self.n_steps, self.steps_written,
                          self.resumed_chunk * self.chunk_steps, appended=self.mode == "continue")


def _iso_s(seconds: float) -> str:
    return _iso(int(round(seconds * 1e6)) * 1000)


def _iso(ns: int) -> str:
    seconds, rest = divmod(int(ns), 1_000_000_000)
    return datetime.fromtimestamp(seconds, UTC).strftime("%Y-%m-%dT%H:%M:%S") + f".{rest // 1000:06d}Z"

