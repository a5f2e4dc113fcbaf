"""STA/LTA triggers and window placement: pure numpy functions on 1-D float64 arrays.

STA/LTA (Allen, "Automatic earthquake recognition and timing from single traces", BSSA 68(5),
1978; Trnkoczy, "Understanding and parameter setting of STA/LTA trigger algorithm", New Manual of
Seismological Observatory Practice 2 (NMSOP-2), information sheet IS 8.1, 2012): the
characteristic function is the ratio of a short-term to a long-term average of x², either
equal-weight moving averages ('boxcar') or exponentially weighted ones ('exponential'). The
conventions (trailing windows, zeros during the LTA warm-up, the exponential form's initial state)
are those of ``obspy.signal.trigger``, which the tests use as the reference. The streaming
classes (``StreamingStaLta``, ``TriggerTracker``, ``EnergyPeak``) give the same results, bit for
bit, from a trace fed in consecutive chunks of any sizes, carrying bounded state.
"""
from __future__ import annotations

import numpy as np
from scipy import signal

_CHUNK = 1 << 15
_TINY = np.finfo(np.float64).tiny


def moving_sum(x: np.ndarray, n: int) -> np.ndarray:
    """Trailing sum of the last ``n`` samples, ``y[i] = Σ x[max(0, i−n+1) .. i]``, shape of x.

    Cumulative sums per block of some 32 k samples (not over the whole trace), so a quiet stretch
    long after a strong event does not lose precision to cancellation between two huge partial
    sums.
    """
    out = np.empty(x.size, dtype=np.float64)
    block = max(_CHUNK, 4 * n)
    for s in range(0, x.size, block):
        e = min(s + block, x.size)
        lo = max(0, s - n)
        c = np.cumsum(x[lo:e], dtype=np.float64)  # c[j] = Σ x[lo .. lo + j]
        part = out[s:e]
        part[:] = c[s - lo:]
        j0 = s - n - lo  # index in c of the sum to subtract for i = s
        if j0 >= 0:
            part -= c[j0: j0 + (e - s)]
        elif e > n:  # only in the first block: nothing to subtract before sample n
            part[-j0:] -= c[: e - n]
    return out


def boxcar_sta_lta(x: np.ndarray, nsta: int, nlta: int) -> np.ndarray:
    """STA/LTA of ``x`` (shape (n,)) with equal-weight trailing averages, STA and LTA lengths in
    samples; shape (n,).

    ``sta[i] = mean(x²[i−nsta+1..i])``, ``lta[i] = mean(x²[i−nlta+1..i])``, the first nlta−1
    values are 0 (warm-up), and an LTA below the smallest normal float is replaced by it.
    """
    x2 = np.square(x, dtype=np.float64)
    sta = moving_sum(x2, nsta)
    sta /= nsta
    lta = moving_sum(x2, nlta)
    del x2
    lta /= nlta
    sta[: nlta - 1] = 0.0
    np.maximum(lta, _TINY, out=lta)
    sta /= lta
    return sta


def exponential_sta_lta(x: np.ndarray, nsta: int, nlta: int) -> np.ndarray:
    """STA/LTA of ``x`` (shape (n,)) with exponentially weighted averages, the one-pole recursions
    ``s[i] = c·x²[i] + (1−c)·s[i−1]`` with c = 1/nsta (and 1/nlta), started from 0 (LTA from the
    smallest normal float) at i = 0; the first nlta values are 0. Shape (n,)."""
    x2 = np.square(x, dtype=np.float64)
    x2[0] = 0.0  # the recursion starts at i = 1
    csta, clta = 1.0 / nsta, 1.0 / nlta
    sta = signal.lfilter([csta], [1.0, csta - 1.0], x2)
    lta = signal.lfilter([clta], [1.0, clta - 1.0], x2, zi=[_TINY * (1.0 - clta)])[0]
    lta[0] = _TINY
    cf = sta / lta
    cf[:nlta] = 0.0
    return cf


def trigger_intervals(cf: np.ndarray, on: float, off: float) -> np.ndarray:
    """Trigger (on, off) sample pairs, shape (K, 2) int64, for ``off ≤ on``.

    A trigger switches on at the first sample with cf ≥ ``on`` and off at the last sample of the
    run of cf ≥ ``off`` that contains it (inclusive); the same pairs as
    ``obspy.signal.trigger.trigger_onset`` without a maximum length.
    """
    above_on = np.flatnonzero(cf >= on)
    if above_on.size == 0:
        return np.empty((0, 2), dtype=np.int64)
    above_off = cf >= off
    edges = np.diff(np.concatenate(([0], above_off.view(np.int8), [0])))
    run_start = np.flatnonzero(edges == 1)
    run_stop = np.flatnonzero(edges == -1) - 1
    run_of = np.searchsorted(run_start, above_on, side="right") - 1
    runs, first = np.unique(run_of, return_index=True)
    return np.column_stack((above_on[first], run_stop[runs])).astype(np.int64)


# --- streaming versions: the same results, bit for bit, from consecutive chunks of a trace ----------

def _last(a: np.ndarray, b: np.ndarray, n: int) -> np.ndarray:
    """The last ``n`` values of ``a`` followed by ``b`` (1-D), as a new float64 array of at most n
    values, so the caller never keeps a whole chunk alive through a view."""
    if b.size >= n:
        return b[b.size - n:].astype(np.float64)
    return np.concatenate((a[max(0, a.size - (n - b.size)):], b)).astype(np.float64, copy=False)


class _StreamingMovingSum:
    """``moving_sum(x, n)`` of a trace fed in consecutive chunks, equal bit for bit for any chunking.

    ``moving_sum`` takes the sums of block [s, s + block) — s a multiple of block = max(_CHUNK, 4n)
    counted from the trace's first sample — as differences of one sequential cumulative sum started
    at sample s − n (at 0 in the first block). A cumulative sum continued from its last value is the
    same sum, so carried between chunks are the last n samples (to restart the sum n samples before
    the next block) and the current block's last n cumulative sums (the values to subtract):
    at most 2n values, whatever has been fed.
    """

    def __init__(self, n: int):
        if n < 1:
            raise ValueError(f"window length must be at least 1 sample, got {n}")
        self.n = n
        self.block = max(_CHUNK, 4 * n)
        self.position = 0  # samples fed so far
        self._x_tail = np.empty(0)  # samples position − n .. position − 1 (fewer at the start)
        self._c_tail = np.empty(0)  # the current block's cumulative sums at those samples

    @property
    def history_samples(self) -> int:
        """Number of values carried between chunks (≤ 2n)."""
        return self._x_tail.size + self._c_tail.size

    def __call__(self, x: np.ndarray) -> np.ndarray:
        """Trailing sums for the next chunk ``x`` (shape (m,), m ≥ 0); shape (m,) float64."""
        out = np.empty(x.size, dtype=np.float64)
        done = 0
        while done < x.size:
            take = min(x.size - done, self.block - self.position % self.block)
            self._piece(x[done: done + take], out[done: done + take])
            done += take
        return out

    def _piece(self, x: np.ndarray, out: np.ndarray) -> None:
        """Sums of ``x`` (non-empty, inside one block) into ``out``, and the carried state updated."""
        n = self.n
        if self.position % self.block == 0 and self.position > 0:
            self._c_tail = np.cumsum(self._x_tail)  # the new block's sum starts at its s − n
        if self._c_tail.size:
            c = np.cumsum(np.concatenate((self._c_tail[-1:], x)), dtype=np.float64)[1:]
        else:
            c = np.cumsum(x, dtype=np.float64)
        out[:] = c
        # subtract the cumulative sum at sample position + k − n: carried for k < n, in c after;
        # in the first block there is none for the first n − (samples so far) values
        skip = n - self._c_tail.size
        m = min(n, x.size)
        if m > skip:
            out[skip:m] -= self._c_tail[: m - skip]
        if x.size > n:
            out[n:] -= c[: x.size - n]
        self._c_tail = _last(self._c_tail, c, n)
        self._x_tail = _last(self._x_tail, x, n)
        self.position += x.size


class StreamingStaLta:
    """STA/LTA of a trace fed in consecutive chunks of any sizes (Allen 1978; Trnkoczy 2012).

    ``kind`` 'boxcar' or 'exponential', ``nsta`` and ``nlta`` in samples. Calling the object with
    the next chunk (1-D float64, shape (m,), m ≥ 0) returns the characteristic function of those
    samples, shape (m,); the outputs, concatenated, equal ``boxcar_sta_lta(whole, nsta, nlta)``
    resp. ``exponential_sta_lta(whole, nsta, nlta)`` on the concatenated input bit for bit, with
    the same warm-up zeros and LTA floor, whatever the chunking.

    The boxcar form carries at most 2·nsta + 2·nlta samples of history (see ``history_samples``),
    the exponential form only the two filter states. One call costs O(m + nsta + nlta), so
    chunks of at least nlta samples keep the total cost linear.
    """

    def __init__(self, kind: str, nsta: int, nlta: int):
        if kind not in ("boxcar", "exponential"):
            raise ValueError(f"kind must be 'boxcar' or 'exponential', got {kind!r}")
        self.kind, self.nsta, self.nlta = kind, nsta, nlta
        self.position = 0  # samples fed so far
        self._sums = (_StreamingMovingSum(nsta), _StreamingMovingSum(nlta)) if kind == "boxcar" else ()
        self._csta, self._clta = 1.0 / nsta, 1.0 / nlta
        # lfilter states of the two recursions, as exponential_sta_lta starts them
        self._zsta = np.zeros(1)
        self._zlta = np.array([_TINY * (1.0 - self._clta)])

    @property
    def history_samples(self) -> int:
        """Number of samples of history carried between chunks: at most 2·nsta + 2·nlta (boxcar),
        0 (exponential)."""
        return sum(s.history_samples for s in self._sums)

    def __call__(self, x: np.ndarray) -> np.ndarray:
        """Characteristic function (dimensionless), shape (m,), for the next chunk ``x``, shape (m,)."""
        x2 = np.square(x, dtype=np.float64)
        if x2.size == 0:
            return x2
        cf = self._boxcar(x2) if self.kind == "boxcar" else self._exponential(x2)
        self.position += x2.size
        return cf

    def _boxcar(self, x2: np.ndarray) -> np.ndarray:
        """The steps of ``boxcar_sta_lta`` on one chunk of x²."""
        sta_sum, lta_sum = self._sums
        sta = sta_sum(x2)
        sta /= self.nsta
        lta = lta_sum(x2)
        lta /= self.nlta
        sta[: max(0, self.nlta - 1 - self.position)] = 0.0
        np.maximum(lta, _TINY, out=lta)
        sta /= lta
        return sta

    def _exponential(self, x2: np.ndarray) -> np.ndarray:
        """The steps of ``exponential_sta_lta`` on one chunk of x², the filter states carried."""
        first = self.position == 0
        if first:
            x2[0] = 0.0  # the recursion starts at the trace's second sample
        sta, self._zsta = signal.lfilter([self._csta], [1.0, self._csta - 1.0], x2, zi=self._zsta)
        lta, self._zlta = signal.lfilter([self._clta], [1.0, self._clta - 1.0], x2, zi=self._zlta)
        if first:
            lta[0] = _TINY
        cf = sta / lta
        cf[: max(0, self.nlta - self.position)] = 0.0
        return cf


class TriggerTracker:
    """``trigger_intervals`` of a characteristic function fed in consecutive chunks (Allen 1978;
    Trnkoczy 2012), for ``off ≤ on``.

    ``feed(cf)`` returns the (on, off) pairs, shape (K, 2) int64, whose run of cf ≥ ``off`` has
    ended inside the data fed so far, in sample indices counted from the first sample ever fed; a
    run still going at the end of a chunk waits for later chunks (its first cf ≥ ``on`` sample may
    come in one of them). ``close()`` returns the pair still open at the end of the data, shape
    (0, 2) or (1, 2), its off the last sample fed. All feed outputs and close(), concatenated,
    equal ``trigger_intervals(whole_cf, on, off)`` exactly, whatever the chunking.
    """

    def __init__(self, on: float, off: float):
        if off > on:
            raise ValueError(f"off ({off}) must not exceed on ({on})")
        self.on, self.off = on, off
        self.position = 0  # samples fed so far
        self._run_start = -1  # start of the run of cf ≥ off going on at the end of the data, or −1
        self._onset = -1  # that run's first sample with cf ≥ on, or −1

    def feed(self, cf: np.ndarray) -> np.ndarray:
        """Pairs completed by the next chunk ``cf`` (shape (m,), m ≥ 0); shape (K, 2) int64."""
        if cf.size == 0:
            return np.empty((0, 2), dtype=np.int64)
        above_off = (cf >= self.off).view(np.int8)
        going = self._run_start >= 0
        edges = np.diff(np.concatenate(([int(going)], above_off, [0])))
        starts = np.flatnonzero(edges == 1) + self.position
        stops = np.flatnonzero(edges == -1) - 1 + self.position  # the last one is the chunk end if still going
        above_on = np.flatnonzero(cf >= self.on) + self.position
        if going:
            starts = np.concatenate(([self._run_start], starts))
        if self._onset >= 0:
            above_on = np.concatenate(([self._onset], above_on))
        run_of = np.searchsorted(starts, above_on, side="right") - 1
        runs, first = np.unique(run_of, return_index=True)
        onsets = np.full(starts.size, -1, dtype=np.int64)
        onsets[runs] = above_on[first]
        still_going = bool(above_off[-1])
        self.position += cf.size
        self._run_start = int(starts[-1]) if still_going else -1
        self._onset = int(onsets[-1]) if still_going else -1
        done = starts.size - still_going
        hit = onsets[:done] >= 0
        return np.column_stack((onsets[:done][hit], stops[:done][hit])).astype(np.int64)

    def close(self) -> np.ndarray:
        """The pair still open at the end of the data fed so far, shape (0, 2) or (1, 2) int64."""
        if self._onset < 0:
            return np.empty((0, 2), dtype=np.int64)
        return np.array([[self._onset, self.position - 1]], dtype=np.int64)


class EnergyPeak:
    """Where the trailing energy of a trace fed in consecutive chunks peaks.

    ``argmax`` is the sample index (counted from the first sample fed; the first one on ties) of
    the maximum of ``moving_sum(np.square(whole), width)``, ``width`` in samples, equal to
    ``int(np.argmax(moving_sum(np.square(whole), width)))`` for any chunking (the same block-aligned
    sums, bit for bit). At most 2·width samples of history are carried.
    """

    def __init__(self, width: int):
        self._sum = _StreamingMovingSum(width)
        self._best = np.nan
        self._argmax = -1

    @property
    def history_samples(self) -> int:
        """Number of samples of history carried between chunks (≤ 2·width)."""
        return self._sum.history_samples

    @property
    def argmax(self) -> int:
        """Index of the peak so far; ValueError before any sample, as ``np.argmax`` of nothing."""
        if self._argmax < 0:
            raise ValueError("no samples fed yet")
        return self._argmax

    def feed(self, x: np.ndarray) -> None:
        """Take the next chunk ``x`` (1-D, shape (m,), m ≥ 0)."""
        energy = self._sum(np.square(x))
        if energy.size == 0:
            return
        k = int(np.argmax(energy))
        v = energy[k]
        # np.argmax takes the first maximum, and a NaN as the maximum
        if self._argmax < 0 or v > self._best or (np.isnan(v) and not np.isnan(self._best)):
            self._best, self._argmax = v, self._sum.position - energy.size + k


def fast_length(n: float, mode: str = "ceil") -> int:
    """A power of two near ``n`` (the fastest FFT size): the smallest ≥ n ('ceil') or the closest
    in log scale ('nearest'); at least 2."""
    n = max(float(n), 2.0)
    k = np.log2(n)
    return int(2 ** (np.ceil(k - 1e-12) if mode == "ceil" else np.round(k)))


def burst_durations(onsets: np.ndarray, gap: int) -> np.ndarray:
    """Durations in samples of bursts: triggers less than ``gap`` samples apart (off to next on,
    e.g. the P and S triggers of one event) form one burst, from its first on to its last off."""
    if len(onsets) == 0:
        return np.empty(0, dtype=np.int64)
    new = np.concatenate(([True], onsets[1:, 0] - onsets[:-1, 1] > gap))
    first = np.flatnonzero(new)
    last = np.concatenate((first[1:] - 1, [len(onsets) - 1]))
    return onsets[last, 1] - onsets[first, 0] + 1


def place_burst_windows(onsets: np.ndarray, n: int, window: int, pre: int, guard: int):
    """Start samples of fixed windows around trigger onsets, merging triggers that overlap.

    Each window starts ``pre`` samples before its first trigger; a trigger that falls inside the
    current window is merged into it. Windows are moved inward to keep ``guard`` samples (the taper)
    from the segment ends (onsets inside the guards are the caller's to drop). Returns (starts,
    merged_counts, too_short_onsets).
    """
    starts, counts, short = [], [], []
    lo, hi = guard, n - guard - window
    for on in onsets:
        if starts and on < starts[-1] + window:
            counts[-1] += 1
            continue
        if hi < lo:
            short.append(int(on))
            continue
        start = int(min(max(on - pre, lo), hi))
        if starts and start < starts[-1] + window:
            # moved inward onto its predecessor: the same burst
            counts[-1] += 1
            continue
        starts.append(start)
        counts.append(1)
    return starts, counts, short


def sliding_starts(n: int, window: int, hop: int, guard: int) -> list[int]:
    """Start samples of windows of ``window`` samples every ``hop`` samples inside the guards."""
    last = n - guard - window
    return list(range(guard, last + 1, hop)) if last >= guard else []


def rejection_reason(raw: np.ndarray, processed: np.ndarray, clip_run: int = 3) -> str | None:
    """Why a window is unusable, or None. ``raw``: native samples of its span; ``processed``: the
    window as it would enter the corpus.

    'non-finite' (NaN/Inf after processing), 'flat' (raw peak-to-peak 0), 'clipped' (the raw peak
    absolute value held for ≥ ``clip_run`` consecutive samples: the flat top of a saturated
    digitiser, common practice).
    """
    if not np.all(np.isfinite(processed)) or (raw.dtype.kind == "f" and not np.all(np.isfinite(raw))):
        return "non-finite"
    if raw.size == 0 or raw.max() == raw.min() or not np.any(processed):
        return "flat"
    a = np.abs(raw.astype(np.float64))
    at_peak = (a == a.max()).view(np.int8)
    if clip_run > 1 and at_peak.sum() >= clip_run:
        run = np.convolve(at_peak, np.ones(clip_run, dtype=np.int8), mode="valid")
        if run.max() >= clip_run:
            return "clipped"
    return None
