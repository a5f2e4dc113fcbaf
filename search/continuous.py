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

Each chunk is computed at its output samples only (:func:`search.transform.transform_decimated`,
equal to the hop-1 image sampled every Δ). Chunks run in this process (``n_jobs=1``), on a local
process pool (joblib, ``n_jobs`` workers), or on a Dask cluster when joblib's Dask backend is in
force (``joblib.parallel_config(backend="dask")``, or ``service.dask_backend.evaluations_on``):
the reader stays in this process, hands out batches of chunks (input samples, offset, step) and
writes their images in order, so the store's bytes do not depend on where the chunks ran.

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
with the new) rewrites from ``final_until`` and extends ``time``.
"""
from __future__ import annotations

import hashlib
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import UTC, datetime

import numpy as np

from burstlens.search.corpus import preprocess, stream
from burstlens.search.corpus.ingest import expand_paths
from burstlens.search.corpus.model import CorpusError
from burstlens.search.documents import FilterbankDocument
from burstlens.search.filterbank import Filterbank
from burstlens.search.timestep import TimeStep, time_step
from burstlens.search.transform import transform_decimated
from burstlens.search.wvd import lag_count, truncation_width

FORMAT = "burstlens-continuous"
VERSION = 1
PIECE_SAMPLES = 1 << 16  # target output samples per piece (one Zarr chunk of T = this // Δ steps)
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


def filterbank_sha256(document: FilterbankDocument) -> str:
    """sha256 (hex) of the filterbank document's JSON encoding (``documents.encode``)."""
    return hashlib.sha256(document.encode()).hexdigest()


@dataclass
class PartResult:
    """One part written: SEED id, group path, first sample (ns since epoch, UTC), steps in the
    store, steps computed by this run, and the chunk it resumed at."""

    trace_id: str
    group: str
    start_ns: int
    n_steps: int
    steps_written: int
    resumed_at_step: int


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
                         on_plan: Callable[[int], None] | None = None, n_jobs: int = 1) -> ContinuousResult:
    """Transform every trace of ``paths`` whole and write the images to the Zarr store ``out``.

    ``document``: the tuned filterbank; ``reading``: its ``reading_options()`` (rate,
    ``components``, ``bandpass_hz``, ``csv_sampling_rate_hz``; windowing options are ignored).
    ``step_s``: output step in s (default: :func:`search.timestep.time_step`'s rule).
    ``piece_samples``: output samples per piece (about; a whole number of steps, one chunk).
    ``progress(n)`` after each chunk written (n chunks); ``on_plan(total)`` once the chunks
    to write are known; ``on_chunk(group, steps_complete)`` after each chunk's marker is updated
    (what it raises stops the run, the store stays resumable). ``n_jobs``: processes computing
    chunks (joblib; 1 = this process, −1 = all CPUs); under joblib's Dask backend the cluster's
    workers, whatever ``n_jobs`` says. Raises ``CorpusError`` naming the
    file for unreadable input, ``ValueError`` for a store written with another filterbank,
    reading or step.
    """
    import zarr

    if isinstance(n_jobs, bool) or not isinstance(n_jobs, int) or n_jobs == 0 or n_jobs < -1:
        raise ValueError(f"n_jobs={n_jobs!r} must be a whole number ≥ 1, or −1 for all CPUs")
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
        "eps": eps, "overlap_samples": overlap, "chunk_steps": chunk_steps,
    }
    attrs = {"format": FORMAT, "version": VERSION, "filterbank": document.to_json(),
             "filterbank_sha256": filterbank_sha256(document), "reading": settings,
             "time_step": step.to_json(), "time_step_s": step.seconds, "sampling_rate_hz": fs}
    root = _open_root(zarr, out, attrs)
    writers = {}
    for seg in scan.segments:
        writer = _PartWriter(root, seg, filterbank, step, chunk_steps, overlap, attrs, eps, on_chunk)
        writers[seg.index] = writer
    if on_plan is not None:
        on_plan(sum(w.chunks_to_write for w in writers.values()))
    runner = _Runner(n_jobs)
    done = 0
    try:
        pending: list[_Chunk] = []
        for piece in stream.pieces(files, scan.segments, fs, sos, csv_rate=csv_rate,
                                   assignment=scan.assignment):
            pending.extend(writers[piece.segment.index].feed(piece))
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
        result.parts.append(writer.result())
    return result


def _open_root(zarr, out: str, attrs: dict):
    """The store's root group, created with ``attrs`` or checked against them."""
    try:
        root = zarr.open_group(out, mode="r+", zarr_format=3)
    except (FileNotFoundError, zarr.errors.GroupNotFoundError):
        root = zarr.open_group(out, mode="w-", zarr_format=3)
        root.attrs.update(attrs)
        return root
    old = dict(root.attrs)
    if old.get("format") != FORMAT:
        raise ValueError(f"--out {out}: not a {FORMAT} store (format {old.get('format')!r})")
    for key, what in (("filterbank_sha256", "filterbank"), ("reading", "reading settings"),
                      ("time_step_s", "time step")):
        if old.get(key) != attrs[key]:
            raise ValueError(f"--out {out}: the store was written with another {what} "
                             f"({key} {old.get(key)!r}, now {attrs[key]!r}); write to a new store")
    return root


def chunk_image(x: np.ndarray, filterbank: Filterbank, eps: float, step: int, offset: int,
                n_steps: int) -> np.ndarray:
    """One chunk's steps: (n_steps, C) float32, rows the samples offset + k·step of the
    transform of the input samples ``x`` (N,) (module level: joblib and Dask workers import it)."""
    return transform_decimated(x, filterbank, step, offset=offset, eps=eps)[:, :n_steps].T


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

    def __init__(self, n_jobs: int):
        from joblib import Parallel, effective_n_jobs
        from joblib.parallel import get_active_backend

        kind = type(get_active_backend()[0]).__name__
        self.parallel = None
        self.batch = 1
        if kind == "DaskDistributedBackend":  # the cluster's workers, whatever n_jobs says
            self.parallel = Parallel(n_jobs=-1)
        elif n_jobs != 1 and kind != "SequentialBackend":
            self.parallel = Parallel(n_jobs=n_jobs)
        if self.parallel is not None:
            self.parallel.__enter__()
            self.batch = BATCH_PER_WORKER * max(1, effective_n_jobs(self.parallel.n_jobs))

    def run(self, chunks: list[_Chunk], done: int, progress) -> int:
        if not chunks:
            return done
        args = [(c.x, c.writer.filterbank, c.writer.eps, c.writer.step, c.offset, c.n_steps) for c in chunks]
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


class _PartWriter:
    """One segment: gathers its processed samples and writes each chunk once its input is held."""

    def __init__(self, root, seg, filterbank, step: TimeStep, chunk_steps, overlap, attrs, eps, on_chunk):
        self.seg, self.filterbank, self.eps, self.on_chunk = seg, filterbank, eps, on_chunk
        self.step, self.chunk_steps, self.overlap = step.samples, chunk_steps, overlap
        layout = stream.Layout.of(seg, filterbank.sampling_rate_hz)
        self.n = layout.n
        self.n_steps = -(-self.n // self.step)
        self.span = chunk_steps * self.step  # output samples per chunk
        self.n_chunks = -(-self.n_steps // chunk_steps)
        self.start_ns = int(round(seg.start * 1e6)) * 1000
        # samples no continuation of the trace can change: the cores of the reader pieces whose
        # extended range is not cut by the segment's end (see stream.Layout), less the overlap
        unclipped = max(0, (layout.n_raw - layout.margin) // layout.core)
        final_samples = layout.to_output(unclipped * layout.core) - overlap if unclipped else 0
        final_chunks = max(0, final_samples) // self.span if final_samples > 0 else 0
        self.final_until = min(self.n_steps, final_chunks * chunk_steps)
        self.group_path = f"{seg.trace_id}/{part_name(self.start_ns)}"
        self.image, self.group, first = self._prepare(root, attrs)
        self.next_chunk = self.resumed_chunk = first  # the next chunk to write
        self.planned = first  # the next chunk to hand out
        self.chunks_to_write = self.n_chunks - first
        self.buffer = np.zeros(0)
        self.buffer_start = 0  # output index of buffer[0]
        self.received = 0      # output samples received so far
        self.steps_written = 0

    def _prepare(self, root, attrs):
        """Create the part's arrays, or reopen them and choose the chunk to resume at."""
        fb = self.filterbank
        trace_group = root.require_group(self.seg.trace_id)
        name = self.group_path.split("/")[-1]
        first = 0
        if name in trace_group:
            group = trace_group[name]
            old_n = int(group.attrs.get("n_samples", -1))
            done = int(group.attrs.get("complete_until", 0))
            if old_n == self.n:
                first = done // self.chunk_steps
            elif old_n < self.n:  # the trace goes on: keep only what no later sample changes
                first = min(done, int(group.attrs.get("final_until", 0))) // self.chunk_steps
            group.attrs.update({"complete_until": first * self.chunk_steps, "n_samples": self.n,
                                "final_until": self.final_until})
            image = group["image"]
            image.resize((self.n_steps, len(fb)))
            times = group["time"]
            times.resize((self.n_steps,))
            times[:] = self._times()
            return image, group, first
        group = trace_group.create_group(name)
        group.attrs.update({**attrs, "trace_id": self.seg.trace_id, "start": _iso(self.start_ns),
                            "start_ns": self.start_ns, "complete_until": 0, "final_until": self.final_until,
                            "n_samples": self.n})
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
        return image, group, first

    def _times(self) -> np.ndarray:
        """UTC time of each output step, ns since 1970-01-01 (the record's start plus i·Δ/fs)."""
        offsets = np.arange(self.n_steps, dtype=np.float64) * (self.step * 1e9 / self.filterbank.sampling_rate_hz)
        return self.start_ns + np.round(offsets).astype(np.int64)

    @property
    def finished(self) -> bool:
        return self.next_chunk >= self.n_chunks

    def feed(self, piece: stream.Piece) -> list[_Chunk]:
        """Take a reader piece's core samples; return the chunks whose input is now held."""
        samples = piece.samples
        keep_from = max(0, self.planned * self.span - self.overlap)
        if piece.start + samples.size > keep_from:
            cut = max(0, keep_from - piece.start)
            if self.buffer.size == 0:
                self.buffer_start = piece.start + cut
                self.buffer = samples[cut:].copy()
            else:
                self.buffer = np.concatenate((self.buffer, samples[cut:]))
        self.received = piece.start + samples.size
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

    def result(self) -> PartResult:
        return PartResult(self.seg.trace_id, self.group_path, self.start_ns, self.n_steps, self.steps_written,
                          self.resumed_chunk * self.chunk_steps)


def _iso(ns: int) -> str:
    seconds, rest = divmod(int(ns), 1_000_000_000)
    return datetime.fromtimestamp(seconds, UTC).strftime("%Y-%m-%dT%H:%M:%S") + f".{rest // 1000:06d}Z"

