"""One-pass, mergeable survey of the transients' dominant frequency.

``SpectrumSurvey`` sees processed samples piece by piece (each piece once, in any order, possibly
on different processes whose surveys are then merged) and gives the dominant frequency of the
loud frames in bounded memory. The result is bit-identical whatever the order or grouping of the
pieces: every sum whose value could depend on the order is an exact integer sum.

``splitmix64`` is the output function of Steele, Lea and Flood, "Fast splittable pseudorandom
number generators", OOPSLA 2014 (the SplitMix64 generator), used here as a 64-bit hash.
"""
from __future__ import annotations

import math

import numpy as np

BINS_PER_OCTAVE = 64
# frames of zero energy: one bin below the lowest positive one (2^-1074 lies in bin 64·(-1074))
ZERO_BIN = BINS_PER_OCTAVE * -1074 - 1
_GOLDEN = np.uint64(0x9E3779B97F4A7C15)
_MIX1 = np.uint64(0xBF58476D1CE4E5B9)
_MIX2 = np.uint64(0x94D049BB133111EB)
_LIMB = 32  # bits of the low limb of the exact sums
_LOW = (1 << _LIMB) - 1
# t = nfft · 2^octave / S at or above this: the window passes less than 2^-29 of the frame's energy
_T_MAX = 2.0 ** 30
_BLOCK_FRAMES = 1024  # frames transformed at once: 2 MB blocks at nfft 256, fastest here (cache)


def _mantissa_edges() -> np.ndarray:
    """Bin edges within one octave, shape (64,): 2^(k/64) rounded up to 53 bits, in [1, 2).

    Exact integer arithmetic (six nested integer square roots give ⌊n^(1/64)⌋), so the edges, and
    with them every frame's bin, are the same on every machine.
    """
    edges = []
    for k in range(BINS_PER_OCTAVE):
        n = 1 << (52 * BINS_PER_OCTAVE + k)
        r = n
        for _ in range(6):
            r = math.isqrt(r)
        edges.append(math.ldexp(r if r ** BINS_PER_OCTAVE == n else r + 1, -52))
    return np.array(edges)


MANTISSA_EDGES = _mantissa_edges()


def splitmix64(x: np.ndarray) -> np.ndarray:
    """SplitMix64 output for states ``x`` (uint64 array, any shape): z = x + 0x9E3779B97F4A7C15,
    z = (z ⊕ z≫30)·0xBF58476D1CE4E5B9, z = (z ⊕ z≫27)·0x94D049BB133111EB, z ⊕ z≫31, all mod 2^64.

    A bijection of the 64-bit integers; ``splitmix64(k · 0x9E3779B97F4A7C15)`` is the (k+1)-th
    output of the generator seeded with 0.
    """
    z = np.asarray(x, dtype=np.uint64) + _GOLDEN
    z = (z ^ (z >> np.uint64(30))) * _MIX1
    z = (z ^ (z >> np.uint64(27))) * _MIX2
    return z ^ (z >> np.uint64(31))


def frame_keys(stream_key: int, frames: np.ndarray) -> np.ndarray:
    """Sampling keys of frames ``frames`` (integer array, shape (F,)) of the segment named
    ``stream_key`` (taken mod 2^64): ``splitmix64(splitmix64(stream_key) ⊕ frame)``, uint64 (F,).

    Distinct frames of one segment get distinct keys (splitmix64 is a bijection).
    """
    stream = splitmix64(np.array([stream_key % (1 << 64)], dtype=np.uint64))
    return splitmix64(stream ^ np.asarray(frames, dtype=np.uint64))


def energy_bins(energy: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Energy bin and octave of each frame energy (finite, ≥ 0; shape (F,)), both int64 (F,).

    With E = m·2^(oct+1), m ∈ [1/2, 1), the bin is b = 64·oct + j where j is the last k with
    ``MANTISSA_EDGES[k] ≤ 2m``: bin b holds energies in [edge(b), edge(b+1)) (see ``bin_edge``),
    1/64 octave wide. E = 0 goes to ``ZERO_BIN``. Exact comparisons, no logarithm.
    """
    m, e = np.frexp(energy)
    octave = e.astype(np.int64) - 1
    step = np.searchsorted(MANTISSA_EDGES, 2.0 * m, side="right") - 1
    bins = octave * BINS_PER_OCTAVE + step
    bins[energy == 0] = ZERO_BIN
    return bins, octave


def bin_edge(b: int) -> float:
    """Lower edge of energy bin ``b``: 2^(b/64) with its mantissa rounded up to 53 bits (units of
    the frame energy, i.e. the samples' units squared)."""
    return math.ldexp(float(MANTISSA_EDGES[b % BINS_PER_OCTAVE]), b // BINS_PER_OCTAVE)


class SpectrumSurvey:
    """Dominant frequency of the transients, Hz, accumulated in one pass over pieces of segments.

    Frames are the whole blocks of ``nfft`` samples of a segment, frame j = samples
    [j·nfft, (j+1)·nfft) counted from the segment start. For frame i with samples x:

    - energy E_i = Σ x² and power spectrum P_i(f) = |rfft(w·x)|²(f), w = ``np.hanning(nfft)``,
      f on ``np.fft.rfftfreq(nfft, 1/fs)`` (nfft/2 + 1 frequencies); S_i = Σ_f P_i(f).
    - energy bin b_i: 1/64 octave bins of E_i (``energy_bins``); N_b frames per bin, N in all.
    - quantiles: b_q = the first bin whose cumulative count reaches q·N (integer comparison); the
      estimate of the q-quantile is that bin's upper edge edge(b_q + 1), which lies above the
      ⌈qN⌉-th smallest energy by at most 1/64 octave (≈ 1.09 %).
    - loud cut = max(8·median, q95) = edge(L), L = max(b_0.5 + 1 + 192, b_0.95 + 1) (8 = 192 bins);
      the loud frames are those of the bins b ≥ L, i.e. energy ≥ the cut, which is itself
      quantised upward by at most 1/64 octave.
    - noise spectrum noise(f): element-wise median of P_i over a uniform sample of
      ``noise_frames`` frames, the frames with the smallest ``frame_keys`` (ties broken by
      stream key, then frame index): bottom-k sampling, the same set whatever the order.
    - transient spectrum, linear in the frames so it can be summed before the noise is known:
      per bin A_b(f) = Σ P_i(f)/S_i, c_b = Σ 1/S_i, n_b = number of frames, then
      excess(f) = max(0, (Σ_loud A_b(f) − noise(f)·Σ_loud c_b) / Σ_loud n_b), the mean over the loud
      frames of (P_i − noise)/S_i, clipped after averaging; stationary lines (hum) sit in the
      median and cancel.
    - f_dom = Σ_f f·excess(f) / Σ_f excess(f); None when no frame is loud or Σ excess ≯ 0.

    Exact sums: P_i(f)/S_i ∈ [0, 1] is rounded to a multiple of 2^-32 and 1/S_i is kept as
    t_i = nfft·2^oct_i/S_i ∈ (1/2, 2^30) (oct_i = ⌊log2 E_i⌋, since S_i ≤ nfft·E_i) rounded to a
    multiple of 2^-32; both are summed as integers in two 64-bit limbs (low limb < 2^32), exact
    for up to 2^33 frames per bin. Integer sums do not depend on the order, so ``add`` and
    ``merge`` in any order and grouping give bit-identical results. Frames with t_i ≥ 2^30 or
    E_i = 0 count in the energy histogram but are never loud: the window passes at most 2^-29 of
    their energy (S_i = 0, or, at nfft = 256, all energy in the two end samples where the Hann
    window is 0).

    Memory, whatever the data volume: the noise sample, ``noise_frames`` × (nfft/2 + 1) float64
    plus 3 × ``noise_frames`` 8-byte keys, and per occupied energy bin 2·(nfft/2 + 1) + 4 int64
    (2.1 kB at nfft 256), stored with up to twice the occupied rows; the occupied bins are at most
    64 per octave spanned by the frame energies plus one for E = 0 (at most 64·2098 + 1 for any
    float64 data). ``nbytes`` gives the current figure.
    """

    def __init__(self, fs: float, nfft: int = 256, noise_frames: int = 4096):
        if not fs > 0 or nfft < 2 or noise_frames < 1:
            raise ValueError(f"need fs > 0, nfft ≥ 2 and noise_frames ≥ 1, got {fs}, {nfft}, {noise_frames}")
        self.fs = float(fs)
        self.nfft = int(nfft)
        self.noise_frames = int(noise_frames)
        self._window = np.hanning(self.nfft)
        nf = self.nfft // 2 + 1
        self._slot: dict[int, int] = {}  # energy bin -> row of the per-bin arrays
        self._count = np.zeros(0, dtype=np.int64)  # N_b: all frames of the bin
        self._used = np.zeros(0, dtype=np.int64)  # n_b: frames that may be loud
        self._a_lo = np.zeros((0, nf), dtype=np.int64)  # A_b·2^32 = a_hi·2^32 + a_lo
        self._a_hi = np.zeros((0, nf), dtype=np.int64)
        self._c_lo = np.zeros(0, dtype=np.int64)  # Σ t_i·2^32 = c_hi·2^32 + c_lo
        self._c_hi = np.zeros(0, dtype=np.int64)
        self._res_n = 0  # frames held in the noise sample (slots 0 .. res_n−1, in no order)
        self._res_keys = np.zeros(self.noise_frames, dtype=np.uint64)
        self._res_streams = np.zeros(self.noise_frames, dtype=np.uint64)
        self._res_frames = np.zeros(self.noise_frames, dtype=np.uint64)
        self._res_power = np.zeros((self.noise_frames, nf), dtype=np.float64)

    @property
    def nbytes(self) -> int:
        """Bytes held by the accumulators and the noise sample."""
        arrays = (self._count, self._used, self._a_lo, self._a_hi, self._c_lo, self._c_hi,
                  self._res_keys, self._res_streams, self._res_frames, self._res_power)
        return sum(a.nbytes for a in arrays)

    @property
    def energy_bin_count(self) -> int:
        """Number of occupied energy bins (rows of the per-bin accumulators in use)."""
        return len(self._slot)

    @property
    def noise_sample_size(self) -> int:
        """Number of frame spectra held for the noise median (≤ ``noise_frames``)."""
        return self._res_n

    def add(self, x: np.ndarray, stream_key: int, first_frame: int) -> None:
        """Add processed samples ``x`` (1-D, shape (n,)) of the segment ``stream_key``; x[0] is the
        first sample of frame ``first_frame`` of that segment. Only the whole frames
        x[: n // nfft · nfft] are used. Raises ValueError on non-finite frame energies."""
        x = np.asarray(x, dtype=np.float64)
        if x.ndim != 1:
            raise ValueError(f"x must be 1-D, got shape {x.shape}")
        if first_frame < 0:
            raise ValueError(f"first_frame must be ≥ 0, got {first_frame}")
        n_frames = x.size // self.nfft
        for start in range(0, n_frames, _BLOCK_FRAMES):
            stop = min(start + _BLOCK_FRAMES, n_frames)
            frames = x[start * self.nfft: stop * self.nfft].reshape(-1, self.nfft)
            self._add_frames(frames, int(stream_key), int(first_frame) + start)

    def merge(self, other: SpectrumSurvey) -> None:
        """Add the accumulators and noise sample of ``other`` (same fs, nfft, noise_frames)."""
        if other is self:
            raise ValueError("cannot merge a survey into itself")
        if (other.fs, other.nfft, other.noise_frames) != (self.fs, self.nfft, self.noise_frames):
            raise ValueError(f"surveys differ: (fs, nfft, noise_frames) {(self.fs, self.nfft, self.noise_frames)} "
                             f"vs {(other.fs, other.nfft, other.noise_frames)}")
        if other._slot:
            theirs = np.fromiter(other._slot.values(), dtype=np.int64, count=len(other._slot))
            ours = self._rows_for(list(other._slot))
            self._count[ours] += other._count[theirs]
            self._used[ours] += other._used[theirs]
            self._add_exact(ours, other._a_lo[theirs], other._a_hi[theirs], other._c_lo[theirs], other._c_hi[theirs])
        n = other._res_n
        self._offer(other._res_keys[:n], other._res_streams[:n], other._res_frames[:n], other._res_power[:n])

    def result(self) -> tuple[float | None, dict]:
        """(dominant frequency in Hz, or None when no frame stands out; info).

        info: "frames" (whole frames seen), "loud_frames" (frames in the transient mean),
        "energy_bins" (occupied bins), "noise_frames" (spectra in the noise median), and when
        there are frames "median_energy" and "loud_cut" (bin edges, units of E).
        """
        info = {"frames": int(self._count.sum()), "loud_frames": 0, "energy_bins": len(self._slot),
                "noise_frames": self._res_n}
        if info["frames"] == 0:
            return None, info
        bins = np.array(sorted(self._slot), dtype=np.int64)
        rows = np.array([self._slot[b] for b in bins.tolist()], dtype=np.int64)
        cum = np.cumsum(self._count[rows])
        total = int(cum[-1])
        b50 = int(bins[np.argmax(2 * cum >= total)])
        b95 = int(bins[np.argmax(20 * cum >= 19 * total)])
        first_loud = max(b50 + 1 + 3 * BINS_PER_OCTAVE, b95 + 1)
        loud_bins, loud = bins[bins >= first_loud], rows[bins >= first_loud]
        n_loud = int(self._used[loud].sum())
        info.update(loud_frames=n_loud, median_energy=bin_edge(b50 + 1), loud_cut=bin_edge(first_loud))
        if n_loud == 0:
            return None, info
        # Σ A_b(f): exact integer limb sums, then one rounding each
        a = self._a_hi[loud].sum(axis=0).astype(np.float64) + np.ldexp(
            self._a_lo[loud].sum(axis=0).astype(np.float64), -_LIMB)
        # Σ 1/S_i = Σ_b 2^-oct_b · (Σ t_i) / nfft, each bin's exact sum rounded once, then an exact float sum
        c = math.fsum(math.ldexp(float((int(hi) << _LIMB) + int(lo)), -_LIMB - b // BINS_PER_OCTAVE)
                      for b, hi, lo in zip(loud_bins.tolist(), self._c_hi[loud], self._c_lo[loud], strict=True))
        c /= self.nfft
        noise = self.noise_spectrum()
        excess = np.maximum((a - noise * c) / n_loud, 0.0)
        weight = excess.sum()
        if not weight > 0:
            return None, info
        freqs = np.fft.rfftfreq(self.nfft, 1.0 / self.fs)
        return float(np.sum(freqs * excess) / weight), info

    def noise_spectrum(self) -> np.ndarray | None:
        """Noise power spectrum, shape (nfft/2 + 1,): the element-wise median of the sampled frames'
        P_i (units of P), or None before any frame."""
        n = self._res_n
        if n == 0:
            return None
        # in key order, so the value cannot depend on which slots the frames happen to occupy
        order = np.lexsort((self._res_frames[:n], self._res_streams[:n], self._res_keys[:n]))
        return np.median(self._res_power[:n][order], axis=0)

    def _add_frames(self, frames: np.ndarray, stream_key: int, first: int) -> None:
        """Accumulate the frames ``frames`` (shape (F, nfft)), frame indices first .. first+F−1."""
        energy = np.square(frames).sum(axis=1)
        if not np.all(np.isfinite(energy)):
            raise ValueError("non-finite samples (or frame energies above the float64 range)")
        spectrum = np.fft.rfft(frames * self._window, axis=1)
        power = np.square(spectrum.real)
        power += np.square(spectrum.imag)
        total = power.sum(axis=1)
        index = np.arange(first, first + frames.shape[0], dtype=np.uint64)
        keys = frame_keys(stream_key, index)
        streams = np.full(index.size, stream_key % (1 << 64), dtype=np.uint64)
        self._offer(keys, streams, index, power)

        bins, octave = energy_bins(energy)
        unique, inverse, counts = np.unique(bins, return_inverse=True, return_counts=True)
        rows = self._rows_for(unique.tolist())
        self._count[rows] += counts
        with np.errstate(divide="ignore", invalid="ignore"):
            t = self.nfft / np.ldexp(total, -octave)
        usable = np.flatnonzero((energy > 0) & (t < _T_MAX))
        if usable.size == 0:
            return
        usable = usable[np.argsort(inverse[usable], kind="stable")]
        group = inverse[usable]
        starts = np.flatnonzero(np.concatenate(([True], group[1:] != group[:-1])))
        # per-frame values rounded to multiples of 2^-32, then exact integer sums per bin
        scale = np.ldexp(1.0, _LIMB) / total[usable]
        share = power[usable]
        share *= scale[:, None]
        a = np.add.reduceat(np.rint(share, out=share).astype(np.int64), starts, axis=0)
        tq = np.rint(np.ldexp(t[usable], _LIMB)).astype(np.int64)
        c_lo = np.add.reduceat(tq & _LOW, starts)
        c_hi = np.add.reduceat(tq >> _LIMB, starts)
        target = rows[group[starts]]
        self._used[target] += np.diff(np.append(starts, usable.size))
        self._add_exact(target, a, np.zeros_like(a), c_lo, c_hi)

    def _add_exact(self, rows: np.ndarray, a_lo, a_hi, c_lo, c_hi) -> None:
        """Add integer sums to the limbs of the distinct ``rows``, carrying so the low limbs stay < 2^32
        (a unique representation of each exact sum)."""
        lo = self._a_lo[rows] + a_lo
        self._a_hi[rows] += a_hi + (lo >> _LIMB)
        self._a_lo[rows] = lo & _LOW
        lo = self._c_lo[rows] + c_lo
        self._c_hi[rows] += c_hi + (lo >> _LIMB)
        self._c_lo[rows] = lo & _LOW

    def _rows_for(self, bins: list[int]) -> np.ndarray:
        """Rows of the energy bins ``bins``, creating rows (doubling the capacity) for new ones."""
        rows = []
        for b in bins:
            row = self._slot.get(b)
            if row is None:
                row = self._slot[b] = len(self._slot)
            rows.append(row)
        if len(self._slot) > self._count.size:
            self._grow(max(2 * self._count.size, len(self._slot), 16))
        return np.array(rows, dtype=np.int64)

    def _grow(self, capacity: int) -> None:
        """Enlarge the per-bin arrays to ``capacity`` rows, zero-filled."""
        def grown(a):
            out = np.zeros((capacity,) + a.shape[1:], dtype=a.dtype)
            out[: a.shape[0]] = a
            return out
        self._count, self._used = grown(self._count), grown(self._used)
        self._a_lo, self._a_hi = grown(self._a_lo), grown(self._a_hi)
        self._c_lo, self._c_hi = grown(self._c_lo), grown(self._c_hi)

    def _offer(self, keys, streams, frames, power) -> None:
        """Keep the ``noise_frames`` smallest (key, stream, frame) among the held frames and these
        candidates (keys, streams, frames: uint64 (F,); power: (F, nfft/2+1)). Only the spectra of
        newly kept candidates are copied, into the slots freed by the evicted ones."""
        k, held = self.noise_frames, self._res_n
        if held == k:
            # a candidate can only enter with a key ≤ the largest held key
            pick = np.flatnonzero(keys <= self._res_keys.max())
            if pick.size == 0:
                return
            keys, streams, frames, power = keys[pick], streams[pick], frames[pick], power[pick]
        all_keys = np.concatenate((self._res_keys[:held], keys))
        all_streams = np.concatenate((self._res_streams[:held], streams))
        all_frames = np.concatenate((self._res_frames[:held], frames))
        if all_keys.size <= k:
            kept = np.ones(all_keys.size, dtype=bool)
        else:
            # the k smallest keys in O(n); a tie at the k-th key is settled by (stream, frame)
            kth = np.partition(all_keys, k - 1)[k - 1]
            kept = all_keys < kth
            tied = np.flatnonzero(all_keys == kth)
            tied = tied[np.lexsort((all_frames[tied], all_streams[tied]))][: k - int(kept.sum())]
            kept[tied] = True
        new = np.flatnonzero(kept[held:])
        free = np.concatenate((np.flatnonzero(~kept[:held]), np.arange(held, k)))[: new.size]
        self._res_keys[free], self._res_streams[free], self._res_frames[free] = keys[new], streams[new], frames[new]
        self._res_power[free] = power[new]
        self._res_n = min(k, held + keys.size)
