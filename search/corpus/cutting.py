"""The cutting pass: placed windows are cut from the processed stream as its pieces go by, checked,
and kept as a seeded uniform sample when there are more than ``max_windows``.

The sample is a bottom-k sample (reservoir sampling by hashed keys): every window found gets a key,
a 64-bit hash of the seed and of where the window lies (trace, rate, start, sample), and the
``max_windows`` windows with the smallest keys are kept, in window order. Each window is equally
likely to be kept, and the kept set depends neither on the order in which the pieces arrive nor on
how the files were split (common practice; the uniformity follows from the keys being i.i.d.
uniform, as in Vitter, "Random sampling with a reservoir", ACM TOMS 11(1), 1985, for the
order-free bottom-k form Cohen & Kaplan, "Summarizing data using bottom-k sketches", PODC 2007).
Noise windows (``Placement.noise``) are cut in the same pass and sampled apart, under keys salted
``NOISE_SALT``.
"""
from __future__ import annotations

import hashlib
import heapq
from datetime import UTC, datetime
from dataclasses import dataclass, field

import numpy as np

from burstlens.search.corpus import windowing
from burstlens.search.corpus.stream import Piece, SegmentInfo, rejection

CLIP_RUN = 3
NOISE_SALT = "noise"  # salts the noise windows' keys: a sample apart from the burst windows'


@dataclass(frozen=True)
class Placement:
    """A window of ``length`` output samples at ``start`` of a segment (−1: the segment is too
    short for it), with the triggers merged into it and the first trigger's offset from its start
    in samples (None for 'whole' and 'sliding' windows). ``noise``: a noise window (a quiet
    stretch between triggers), sampled apart from the others under keys salted ``NOISE_SALT``."""

    start: int
    length: int
    triggers: int = 0
    trigger: int | None = None
    noise: bool = False


@dataclass
class Found:
    """A window cut and accepted: its order (segment index, start), key, samples and record."""

    order: tuple
    key: int
    window: np.ndarray
    entry: dict


class _SegmentCutter:
    """Cuts one segment's placed windows from its pieces as they arrive, holding only the
    samples from the next window's start on (processed, output rate) and its native span."""

    def __init__(self, seg: SegmentInfo, plan: list[Placement]):
        self.seg = seg
        self.plan = [p for p in plan if p.start >= 0]
        self.i = 0
        self.out = np.empty(0)
        self.out_lo = 0
        self.raw = None
        self.raw_lo = 0

    def add(self, piece: Piece):
        """(placement, processed window, native span, first native sample) of each window now
        complete."""
        core = piece.samples
        if self.i >= len(self.plan):
            return
        self.out = np.concatenate((self.out, core)) if self.out.size else core
        self.raw = piece.raw if self.raw is None or self.raw.size == 0 else np.concatenate((self.raw, piece.raw))
        if self.out_lo + self.out.size != piece.start + core.size:  # nothing held yet: start here
            self.out_lo = piece.start
            self.raw_lo = piece.raw_start
        out_hi, raw_hi = self.out_lo + self.out.size, self.raw_lo + self.raw.size
        ratio = piece.layout.native_hz / piece.layout.rate_hz
        n_raw = piece.layout.n_raw
        while self.i < len(self.plan):
            p = self.plan[self.i]
            r0 = int(round(p.start * ratio))
            r1 = min(r0 + max(1, int(round(p.length * ratio))), n_raw)
            if p.start + p.length > out_hi or r1 > raw_hi:
                break
            yield (p, self.out[p.start - self.out_lo: p.start + p.length - self.out_lo],
                   self.raw[r0 - self.raw_lo: r1 - self.raw_lo], r0)
            self.i += 1
        if self.i < len(self.plan):  # keep what the next window needs
            nxt = self.plan[self.i]
            keep = max(0, nxt.start - self.out_lo)
            keep_raw = max(0, min(int(round(nxt.start * ratio)), raw_hi) - self.raw_lo)
            self.out, self.out_lo = self.out[keep:].copy(), self.out_lo + keep
            self.raw, self.raw_lo = self.raw[keep_raw:].copy(), self.raw_lo + keep_raw
        else:
            self.out, self.raw = np.empty(0), None


def window_key(seed: int, seg: SegmentInfo, start: int, salt: str = "") -> int:
    """The 64-bit sampling key of the window at output sample ``start`` of ``seg``: a hash of the
    seed and of where the window lies (``SegmentInfo.place`` and the start, after ``salt`` if
    given), never of the order things arrive."""
    return int(window_keys(seed, seg, np.array([start]), salt)[0])


def window_keys(seed: int, seg: SegmentInfo, starts: np.ndarray, salt: str = "") -> np.ndarray:
    """:func:`window_key` of each start in ``starts`` (output samples, shape (K,)), shape (K,)
    uint64: the first 8 bytes (little-endian) of sha256(seed as 8 signed little-endian bytes,
    "[salt|]place|start")."""
    head = hashlib.sha256(int(seed).to_bytes(8, "little", signed=True))
    head.update(f"{salt + '|' if salt else ''}{seg.place}|".encode())
    out = np.empty(len(starts), dtype=np.uint64)
    for i, start in enumerate(starts):
        h = head.copy()
        h.update(str(int(start)).encode())
        out[i] = int.from_bytes(h.digest()[:8], "little")
    return out


class Candidates:
    """Every accepted window as offered: a cluster task's share of the cutting pass, for the
    client to sample (``keep_samples`` False: records only) or to collect (True)."""

    def __init__(self, keep_samples: bool):
        self.keep_samples = keep_samples
        self.items: list[tuple] = []

    @property
    def found(self) -> int:
        return len(self.items)

    def offer(self, found: Found, digest: int) -> None:
        if not self.keep_samples:
            found.window = None
        self.items.append((found, digest))


class WindowSample:
    """The accepted windows' bottom-k sample, with the order-free duplicate rule: of windows with
    the same native samples, the first in window order is kept and the others are 'duplicate'.

    Memory: the kept windows (at most ``max_windows`` plus one per duplicate seen) and, per window
    found, its 64-bit samples digest and order (about 150 B; two windows of different samples share
    a digest with odds below 1e-7 for a million windows)."""

    def __init__(self, max_windows: int, seed: int):
        self.max_windows = max_windows
        self.seed = seed
        self.heap: list[tuple] = []        # (−key, order, Found) of the smallest keys
        self.first_of: dict[int, tuple] = {}   # digest of the native samples -> order of the first
        self.duplicates: set[tuple] = set()    # orders of the windows that repeat an earlier one
        self.accepted = 0

    @property
    def found(self) -> int:
        return self.accepted - len(self.duplicates)

    def offer(self, found: Found, digest: int) -> None:
        """Take an accepted window; ``digest`` is a 64-bit hash of its native samples."""
        self.accepted += 1
        earlier = self.first_of.get(digest)
        if earlier is not None:
            loser = max(earlier, found.order)
            self.duplicates.add(loser)
            self.first_of[digest] = min(earlier, found.order)
            if loser == found.order:
                return
        else:
            self.first_of[digest] = found.order
        # room for every window that may still turn out a duplicate of a later-found one
        capacity = self.max_windows + len(self.duplicates)
        item = (-found.key, found.order, found)
        if len(self.heap) < capacity:
            heapq.heappush(self.heap, item)
        elif item > self.heap[0]:
            heapq.heapreplace(self.heap, item)

    def kept(self) -> list[Found]:
        """The kept windows, in window order."""
        alive = sorted((f for _, _, f in self.heap if f.order not in self.duplicates), key=lambda f: f.key)
        return sorted(alive[: self.max_windows], key=lambda f: f.order)


@dataclass
class Cut:
    """What a cutting pass gives: the collectors its accepted windows and noise windows were
    offered to, and each kind's rejections as (order, record) pairs."""

    windows: object
    noise: object
    rejected: list = field(default_factory=list)
    noise_rejected: list = field(default_factory=list)


def cut_windows(pieces, *, plans: dict, mode: str, seed: int, collector, noise, on_segment=None) -> Cut:
    """The cutting pass over ``pieces``. ``plans`` maps segment index to its placements in start
    order, noise windows (``Placement.noise``) among them; each accepted window is offered to
    ``collector`` and each accepted noise window to ``noise`` (each a :class:`WindowSample`, or
    :class:`Candidates` on a cluster worker). ``on_segment()`` is called after each segment's
    last piece."""
    cut = Cut(collector, noise)
    cutters: dict[int, _SegmentCutter] = {}
    for piece in pieces:
        seg = piece.segment
        fs = piece.layout.rate_hz
        cutter = cutters.get(seg.index)
        if cutter is None:
            cutter = cutters[seg.index] = _SegmentCutter(seg, plans.get(seg.index, []))
            for p in plans.get(seg.index, []):
                if p.start < 0:
                    cut.rejected.append(((seg.index, -1), rejection(
                        seg.file, seg.trace_id, seg.offset_s, "too short",
                        f"trace of {piece.layout.n / fs:g} s is shorter than the window of {p.length / fs:g} s"
                        + (f" ({p.triggers} triggers)" if p.triggers and mode == "bursts" else ""))))
        for p, window, raw, r0 in cutter.add(piece):
            offset = seg.offset_s + p.start / fs
            file = seg.file_at(r0)
            reason = windowing.rejection_reason(raw, window, CLIP_RUN)
            if reason is not None:
                (cut.noise_rejected if p.noise else cut.rejected).append(
                    ((seg.index, p.start), rejection(file, seg.trace_id, offset, reason, detail(reason))))
                continue
            entry = {"file": file, "trace_id": seg.trace_id,
                     "start": iso(None if seg.start is None else seg.start + p.start / fs),
                     "offset_s": round(offset, 6)}
            if not p.noise:
                if mode == "bursts":
                    entry["triggers"] = p.triggers
                entry["trigger_offset_s"] = None if p.trigger is None else p.trigger / fs
            digest = int.from_bytes(hashlib.sha1(raw.dtype.str.encode() + raw.tobytes()).digest()[:8], "little")
            key = window_key(seed, seg, p.start, NOISE_SALT if p.noise else "")
            (cut.noise if p.noise else cut.windows).offer(
                Found((seg.index, p.start), key, window.copy(), entry), digest)
        if piece.last:
            del cutters[seg.index]
            if on_segment is not None:
                on_segment()
    return cut


def duplicate_rejections(sample: WindowSample, segments: list[SegmentInfo], rate_hz: float) -> list[tuple]:
    """(order, record) of each window ``sample`` found to repeat an earlier one, its record made
    from its place as the cutting pass makes it (kept as orders only: a few bytes per window)."""
    out = []
    for index, start in sorted(sample.duplicates):
        seg = segments[index]
        r0 = int(round(start * seg.native_rate_hz / rate_hz))
        out.append(((index, start), rejection(seg.file_at(r0), seg.trace_id, seg.offset_s + start / rate_hz,
                                              "duplicate", detail("duplicate"))))
    return out


def iso(ts: float | None) -> str | None:
    """ISO 8601 UTC with microseconds and a Z, or None."""
    if ts is None:
        return None
    return datetime.fromtimestamp(ts, tz=UTC).isoformat(timespec="microseconds").replace("+00:00", "Z")


def detail(reason: str) -> str:
    return {
        "flat": "no variation in the raw samples",
        "non-finite": "NaN/Inf after processing",
        "clipped": f"peak value held for ≥ {CLIP_RUN} samples (saturated recorder)",
        "duplicate": "same raw samples as an earlier window",
    }[reason]
