"""The filterbank transform: Gaussian-smoothed Wigner–Ville rows, one per channel (DESIGN §3).

For a window x (N samples at fs) with analytic signal z and channel c = (f_c, σ_t, a, β):

    S_c[n] = Σ_{n'} Σ_k W[n', k] · G_c((n − n')/fs, f_k − f_c) · Δf / fs,

W the discrete pseudo-WVD (:mod:`search.wvd`), G_c(u, ν) = g_t(u)·N(ν; βu, σ_f²(1−ρ²)) of unit
mass, g_t the N(0, σ_t²) density; linear (zero-padded) in time, circular in frequency. Summing
over k in closed form leaves, with τ_m = 2m/fs and r[n, m] = z[n+m]·z*[n−m],

    S_c[n] = Re Σ_{n'} g_t((n−n')/fs)/fs · Σ_{m=0}^{L_c} d_{c,m} · r[n', m] · e^{−j2πβτ_m(n−n')/fs},
    d_{c,m} = (2 − δ_{m0}) · w_c(τ_m) · e^{−j2π f_c τ_m},   w_c(τ) = exp(−2π² σ_f²(1−ρ²) τ²).

- β = 0 (fast path): the lag sum comes first, for all channels at once, as real matrix products
  (rows × 2(L+1)) @ (2(L+1) × C) on [Re r, Im r] interleaved, channels grouped by lag count;
  then one Gaussian time convolution per channel, batched through one real FFT.
- β ≠ 0: in the ambiguity domain, S_c = Re IFFT_θ[Σ_m R(θ, m)·d_{c,m}·ĝ_c(θ + βτ_m)], R the FFT
  over time of r, ĝ_c(θ) = exp(−2π²σ_t²θ²) periodised over fs, keeping only the band
  |θ + βτ_m| ≤ √(2 ln(1/ε))/(2πσ_t); the banded sums of all chirped channels form one sparse
  matrix applied to R.

Truncation by ε (default 1e-6): lags up to L_c (:func:`search.wvd.lag_count`), time kernels to
±⌈√(2 ln(1/ε))·σ_t·fs⌉ samples. float64 inside; work is cut in blocks of about 64 MB whatever M
and N are (never an M × N × N array). Per-filterbank weights are cached (LRU): the chirped
path's sparse matrix holds about 2 ln(1/ε)·P/(πa) complex entries per channel (≈ 90 MB for
C = 96, N = 4096, a = 1), so it grows linearly with N and 1/a.
"""
from __future__ import annotations

import math
import os
import threading
from collections import OrderedDict
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field

import numpy as np
import scipy.fft as sfft
import scipy.sparse as sp
from threadpoolctl import ThreadpoolController

from search.filterbank import Filterbank
from search.wvd import analytic_signal, autocorrelation, lag_count, truncation_width

_BLOCK_BYTES = 64 << 20  # working-set target for one block of r, R or channel rows
_GEMM_BLOCK_BYTES = 8 << 20  # a block of r for the lag products
_ROW_BLOCKS, _MIN_BLOCK_ROWS = 8, 64  # rows of a window are cut in about 8 blocks of ≥ 64
# Grouping cost model, in lag-columns per row (measured on the 2-core dev machine): reading the
# r block costs about 8 output columns, a matrix-product call about 300 lag-columns.
_GROUP_READ_COLUMNS = 8.0
_GROUP_CALL_COST = 300.0
_PLAN_CACHE_ENTRIES = 16
_PLAN_CACHE_BYTES = 256 << 20


@dataclass(frozen=True, eq=False)
class PreparedWindows:
    """Windows made ready for repeated transforms: the analytic signals, computed once.

    ``analytic``: (M, N) complex128, read-only. ``single``: the input was one 1-D window.
    """

    analytic: np.ndarray
    single: bool = False

    @property
    def n_windows(self) -> int:
        return self.analytic.shape[0]

    @property
    def window_samples(self) -> int:
        return self.analytic.shape[1]


def prepare(windows) -> PreparedWindows:
    """Analytic signals of ``windows`` ((M, N) or one (N,) real window) for :func:`transform`."""
    if isinstance(windows, PreparedWindows):
        return windows
    x = np.asarray(windows)
    if x.ndim not in (1, 2):
        raise ValueError(f"windows must be (M, N) or (N,), got shape {x.shape}")
    if x.ndim == 2 and x.shape[0] == 0:
        raise ValueError("windows: no windows (M = 0)")
    z = analytic_signal(np.atleast_2d(x))
    z.setflags(write=False)
    return PreparedWindows(z, single=x.ndim == 1)


def transform(windows, filterbank: Filterbank, *, eps: float = 1e-6, dtype=np.float32,
              workers: int | None = None) -> np.ndarray:
    """Filterbank image of each window.

    windows: (M, N) real samples at ``filterbank.sampling_rate_hz``, one (N,) window, or the
    result of :func:`prepare`. Returns (M, C, N) (or (C, N) for one 1-D window) of ``dtype``;
    row c is S_c of the module docstring, one output sample per input sample. ``eps``: truncation
    level of the Gaussian tails. ``workers``: threads to use (default: the BLAS thread count in
    force — all CPUs, or 1 in a joblib worker); the lag products run on that many threads with
    one BLAS thread each (BLAS is limited through threadpoolctl during the call), the FFTs with
    ``workers`` threads.
    """
    if not isinstance(filterbank, Filterbank):
        raise ValueError(f"filterbank must be a Filterbank, got {type(filterbank).__name__}")
    truncation_width(eps)  # validates eps
    prepared = prepare(windows)
    z = prepared.analytic
    n_windows, n_samples = z.shape
    workers = _default_workers() if workers is None else int(workers)
    if workers < 1:
        raise ValueError(f"workers={workers!r} must be ≥ 1")
    plan = _plan(filterbank, n_samples, float(eps))
    out = np.empty((n_windows, len(filterbank), n_samples), dtype=dtype)
    if plan.fast is not None:
        _run_fast(plan.fast, z, out, workers)
    if plan.chirped is not None:
        _run_chirped(plan.chirped, z, out, workers)
    return out[0] if prepared.single else out


# ---------------------------------------------------------------------------------------------
# Plans: everything that depends on (filterbank, N, ε) only, cached across calls.


@dataclass
class _FastPlan:
    channels: np.ndarray  # filterbank indices, sorted by lag count
    groups: list  # (first column, last column + 1, 2·(L_g+1), weights (2(L_g+1), n_g))
    max_lag: int
    fft_size: int  # the largest P_g
    convolutions: list  # (first, last + 1, P_g, rfft of the sampled time kernels (n_g, P_g//2+1))
    nbytes: int = 0


@dataclass
class _ChirpPlan:
    channels: np.ndarray  # filterbank indices
    fft_size: int
    blocks: list  # (lag_start, lag_stop, csr (n_chirp·P, P·(stop−start)))
    nbytes: int = 0


@dataclass
class _Plan:
    fast: _FastPlan | None
    chirped: _ChirpPlan | None
    nbytes: int = field(init=False)

    def __post_init__(self):
        self.nbytes = sum(p.nbytes for p in (self.fast, self.chirped) if p is not None)


_PLANS: OrderedDict = OrderedDict()
_PLANS_LOCK = threading.Lock()
_BLAS = None  # threadpoolctl controller, made on first use


def _plan(filterbank: Filterbank, n_samples: int, eps: float) -> _Plan:
    key = (filterbank.key(), n_samples, eps)
    with _PLANS_LOCK:
        plan = _PLANS.get(key)
        if plan is not None:
            _PLANS.move_to_end(key)
            return plan
    chirp = filterbank.chirp_hz_per_s
    fast_idx = np.flatnonzero(chirp == 0.0)
    chirp_idx = np.flatnonzero(chirp != 0.0)
    plan = _Plan(
        _fast_plan(filterbank, fast_idx, n_samples, eps) if fast_idx.size else None,
        _chirp_plan(filterbank, chirp_idx, n_samples, eps) if chirp_idx.size else None,
    )
    with _PLANS_LOCK:
        _PLANS[key] = plan
        while len(_PLANS) > _PLAN_CACHE_ENTRIES or (
            len(_PLANS) > 1 and sum(p.nbytes for p in _PLANS.values()) > _PLAN_CACHE_BYTES
        ):
            _PLANS.popitem(last=False)
    return plan


def _kernel_half_widths(time_spread_s, fs, n_samples, eps):
    """Time kernel half widths ⌈kσ_t fs⌉ in samples, capped at N−1 (further lags never meet)."""
    half = np.ceil(truncation_width(eps) * np.asarray(time_spread_s) * fs).astype(np.int64)
    return np.minimum(half, n_samples - 1)


def _group_by_lags(lags: np.ndarray) -> list[tuple[int, int]]:
    """Split channels sorted by lag count into contiguous groups minimising the modelled cost
    Σ_g (L_g + 1)·(n_g + read) + call (dynamic programming over the C sorted channels)."""
    n = lags.size
    best = np.full(n + 1, np.inf)
    best[0] = 0.0
    cut = np.zeros(n + 1, dtype=np.int64)
    for j in range(1, n + 1):
        starts = np.arange(j)
        costs = best[:j] + (lags[j - 1] + 1) * (j - starts + _GROUP_READ_COLUMNS) + _GROUP_CALL_COST
        i = int(np.argmin(costs))
        best[j], cut[j] = costs[i], i
    groups, j = [], n
    while j > 0:
        groups.append((int(cut[j]), j))
        j = int(cut[j])
    return groups[::-1]


def _fast_plan(filterbank, idx, n_samples, eps) -> _FastPlan:
    fs = filterbank.sampling_rate_hz
    spread = filterbank.conditional_freq_spread_hz[idx]
    lags = lag_count(spread, fs, n_samples, eps)
    order = np.argsort(lags, kind="stable")
    idx, lags, spread = idx[order], lags[order], spread[order]
    centers = filterbank.center_hz[idx]
    groups = []
    for start, stop in _group_by_lags(lags):
        n_lags = int(lags[stop - 1]) + 1
        m = np.arange(n_lags)
        tau = 2.0 * m / fs
        weight = np.exp(-2.0 * np.pi**2 * (spread[start:stop, None] * tau) ** 2)
        weight *= np.where(m == 0, 1.0, 2.0)  # r[n, −m] = conj r[n, m]: fold negative lags
        weight[m[None, :] > lags[start:stop, None]] = 0.0
        phase = 2.0 * np.pi * centers[start:stop, None] * tau
        weights = np.empty((2 * n_lags, stop - start))
        weights[0::2] = (weight * np.cos(phase)).T  # Re r · cos + Im r · sin = Re(r e^{−jφ})
        weights[1::2] = (weight * np.sin(phase)).T
        groups.append((start, stop, 2 * n_lags, weights))
    sigma = filterbank.time_spread_s[idx]
    half = _kernel_half_widths(sigma, fs, n_samples, eps)
    # Linear convolution by FFT needs P_g ≥ N + half width; channels (in lag order) are cut
    # into runs sharing one P_g so that short kernels do not pay for the longest one.
    sizes = np.array([sfft.next_fast_len(n_samples + int(h), real=True) for h in half])
    convolutions = []
    for start, stop in _group_by_size(sizes):
        size = int(sizes[start:stop].max())
        top = int(half[start:stop].max())
        d = np.arange(-top, top + 1)
        s_fs = sigma[start:stop, None] * fs
        kernel = np.exp(-0.5 * (d[None, :] / s_fs) ** 2) / (math.sqrt(2.0 * math.pi) * s_fs)
        kernel[np.abs(d)[None, :] > half[start:stop, None]] = 0.0  # g_t(d/fs)/fs, truncated
        circular = np.zeros((stop - start, size))
        circular[:, d % size] = kernel
        convolutions.append((start, stop, size, sfft.rfft(circular, axis=1)))
    plan = _FastPlan(idx, groups, int(lags.max()), int(sizes.max()), convolutions)
    plan.nbytes = sum(c[3].nbytes for c in convolutions) + sum(g[3].nbytes for g in groups)
    return plan


def _group_by_size(sizes: np.ndarray) -> list[tuple[int, int]]:
    """Contiguous runs of channels sharing one FFT size, minimising Σ_g n_g·P_g·log P_g plus a
    per-run overhead of about two transforms of the largest size (dynamic programming)."""
    n = sizes.size
    overhead = 2.0 * float(sizes.max()) * math.log2(float(sizes.max()))
    best = np.full(n + 1, np.inf)
    best[0] = 0.0
    cut = np.zeros(n + 1, dtype=np.int64)
    for j in range(1, n + 1):
        top = np.maximum.accumulate(sizes[:j][::-1])[::-1]  # max over i..j−1 for each start i
        costs = best[:j] + (j - np.arange(j)) * top * np.log2(top) + overhead
        i = int(np.argmin(costs))
        best[j], cut[j] = costs[i], i
    runs, j = [], n
    while j > 0:
        runs.append((int(cut[j]), j))
        j = int(cut[j])
    return runs[::-1]


def _chirp_plan(filterbank, idx, n_samples, eps) -> _ChirpPlan:
    fs = filterbank.sampling_rate_hz
    k = truncation_width(eps)
    spread = filterbank.conditional_freq_spread_hz[idx]
    sigma = filterbank.time_spread_s[idx]
    centers = filterbank.center_hz[idx]
    chirps = filterbank.chirp_hz_per_s[idx]
    lags = np.atleast_1d(lag_count(spread, fs, n_samples, eps))
    # The banded θ-domain kernel is the whole time Gaussian, aliased with period P: P must hold
    # its full support (no cap at N−1 here, unlike the time-domain kernels of the fast path).
    half = np.ceil(k * sigma * fs).astype(np.int64)
    # 5-smooth sizes (real=True): pocketfft's radix 7 and 11 cost more per point than the
    # few extra points (measured)
    size = sfft.next_fast_len(n_samples + int(half.max()), real=True)
    n_lags_total = int(lags.max()) + 1
    width = max(1, min(n_lags_total, _BLOCK_BYTES // (16 * size)))
    blocks, nbytes = [], 0
    for start in range(0, n_lags_total, width):
        stop = min(start + width, n_lags_total)
        pieces = [
            _chirp_rows(centers[c], sigma[c], spread[c], chirps[c], int(lags[c]), start, stop,
                        size, fs, k)
            for c in range(idx.size)
        ]
        matrix = sp.vstack(pieces, format="csr")
        blocks.append((start, stop, matrix))
        nbytes += matrix.data.nbytes + matrix.indices.nbytes + matrix.indptr.nbytes
    return _ChirpPlan(idx, size, blocks, nbytes)


def _chirp_rows(center, sigma, spread, chirp, lags, start, stop, size, fs, k):
    """One chirped channel's banded ambiguity-domain weights for lags start..stop−1, as a CSR
    matrix (P, (stop−start)·P) acting on R flattened as R[m − start, q] (q the θ bin)."""
    shape = (size, size * (stop - start))
    m = np.arange(start, min(stop, lags + 1))
    if m.size == 0:
        return sp.csr_matrix(shape, dtype=np.complex128)
    tau = 2.0 * m / fs
    d = np.where(m == 0, 1.0, 2.0) * np.exp(-2.0 * np.pi**2 * (spread * tau) ** 2)
    d = d * np.exp(-2j * np.pi * center * tau)
    band = k * size / (2.0 * np.pi * sigma * fs)  # half band, θ bins
    # bins j (unwrapped) around θ = −βτ_m with |θ_j + βτ_m| ≲ band; aliases j ≡ q (mod P)
    # are summed by the CSR conversion, which periodises ĝ over fs
    j = np.ceil(-chirp * tau * size / fs - band).astype(np.int64)[:, None] + np.arange(
        int(2.0 * band) + 2
    )
    offset = j * (fs / size) + chirp * tau[:, None]
    values = d[:, None] * np.exp(-2.0 * np.pi**2 * (sigma * offset) ** 2)
    q = j % size
    columns = (m - start)[:, None] * size + q
    return sp.csr_matrix((values.ravel(), (q.ravel(), columns.ravel())), shape=shape)


# ---------------------------------------------------------------------------------------------
# Execution


def _blas_controller():
    global _BLAS
    if _BLAS is None:
        _BLAS = ThreadpoolController()
    return _BLAS


def _default_workers() -> int:
    """The BLAS thread count in force (all CPUs normally; 1 inside joblib/loky workers or a
    threadpoolctl limit), so the transform never oversubscribes a parallel caller."""
    counts = [lib.num_threads for lib in _blas_controller().select(user_api="blas").lib_controllers]
    return max(counts) if counts else (os.cpu_count() or 1)


def _run_fast(plan: _FastPlan, z: np.ndarray, out: np.ndarray, workers: int) -> None:
    n_windows, n_samples = z.shape
    n_fast = plan.channels.size
    size = plan.fft_size
    per_window = n_fast * (8 * size + 16 * (size // 2 + 1) + 8 * size)
    chunk = max(1, min(n_windows, _BLOCK_BYTES // per_window))
    row_bytes = 16 * (plan.max_lag + 1)
    # Short windows are batched into one product; long ones are cut in row blocks: r[n, m] is
    # zero for m > min(n, N−1−n), so blocks near the window ends need fewer lag columns (about
    # a third less work when L ≈ N/2).
    window_bytes = n_samples * row_bytes
    if window_bytes <= _GEMM_BLOCK_BYTES // _ROW_BLOCKS:
        unit_rows, unit_windows = n_samples, max(1, _GEMM_BLOCK_BYTES // window_bytes)
    else:
        rows = max(_MIN_BLOCK_ROWS, -(-n_samples // _ROW_BLOCKS))
        unit_rows, unit_windows = max(1, min(n_samples, rows, _GEMM_BLOCK_BYTES // row_bytes)), 1

    scratch = threading.local()  # one r buffer per thread, reused block after block

    def lag_products(lagged, w0, unit):
        """lagged[w, c, n] = Σ_m Re(d_{c,m} r[n, m]) for one block of windows × rows."""
        u0, u1, n0, n1 = unit
        lags = min(plan.max_lag, n1 - 1, n_samples - 1 - n0)  # nonzero lags in these rows
        shape = (u1 - u0, n1 - n0, lags + 1)
        if getattr(scratch, "r", None) is None:
            scratch.r = np.empty(unit_windows * unit_rows * (plan.max_lag + 1), np.complex128)
        r = autocorrelation(z[u0:u1], lags, rows=(n0, n1),
                            out=scratch.r[: math.prod(shape)].reshape(shape))
        a = r.view(np.float64).reshape((u1 - u0) * (n1 - n0), 2 * (lags + 1))
        for start, stop, width, weights in plan.groups:
            width = min(width, 2 * (lags + 1))
            # a row-major prefix of the lag columns: a BLAS-able operand (a transposed view
            # would send numpy's matmul to its slow non-BLAS loop)
            y = a[:, :width] @ weights[:width]  # (rows, n_g)
            lagged[u0 - w0:u1 - w0, start:stop, n0:n1] = (
                y.reshape(u1 - u0, n1 - n0, stop - start).transpose(0, 2, 1)
            )

    # Parallel over blocks, one BLAS thread each: coarse-grained threads keep both cores busy
    # (the r products too) and do not stall on a loaded machine as many small multi-threaded
    # products do.
    pool = ThreadPoolExecutor(workers) if workers > 1 else None
    try:
        # zero tail up to the largest P_g: the FFTs read it in place, no padded copy; every
        # chunk overwrites the first N columns only, so one buffer serves all chunks
        buffer = np.zeros((chunk, n_fast, size))
        with _blas_controller().limit(limits=1, user_api="blas"):
            for w0 in range(0, n_windows, chunk):
                w1 = min(n_windows, w0 + chunk)
                lagged = buffer[: w1 - w0]
                units = [(u0, min(w1, u0 + unit_windows), n0, min(n_samples, n0 + unit_rows))
                         for u0 in range(w0, w1, unit_windows)
                         for n0 in range(0, n_samples, unit_rows)]
                if pool is None or len(units) == 1:
                    for unit in units:
                        lag_products(lagged, w0, unit)
                else:
                    for _ in pool.map(lambda unit: lag_products(lagged, w0, unit), units):
                        pass
                for start, stop, fft_size, kernels in plan.convolutions:
                    spectrum = sfft.rfft(lagged[:, start:stop, :fft_size], axis=2,
                                         workers=workers)
                    spectrum *= kernels
                    smoothed = sfft.irfft(spectrum, n=fft_size, axis=2, workers=workers)
                    out[w0:w1, plan.channels[start:stop], :] = smoothed[:, :, :n_samples]
    finally:
        if pool is not None:
            pool.shutdown()


def _run_chirped(plan: _ChirpPlan, z: np.ndarray, out: np.ndarray, workers: int) -> None:
    n_windows, n_samples = z.shape
    n_chirp = plan.channels.size
    size = plan.fft_size
    widest = max(stop - start for start, stop, _ in plan.blocks)
    chunk = max(1, min(n_windows, _BLOCK_BYTES // (16 * size * max(widest, n_chirp))))
    units = [(w0, min(n_windows, w0 + chunk)) for w0 in range(0, n_windows, chunk)]
    # Window chunks run in parallel, each with one FFT thread: the sparse products hold the
    # GIL, so one thread's product overlaps the other's autocorrelation and FFTs.
    parallel = workers > 1 and len(units) > 1
    fft_workers = 1 if parallel else workers

    scratch = threading.local()  # per-thread buffers, reused unit after unit (no page faults)

    def run(unit):
        w0, w1 = unit
        if getattr(scratch, "padded", None) is None:
            scratch.padded = np.empty((chunk, widest, size), dtype=np.complex128)
            scratch.spectra = np.empty(chunk * n_chirp * size, dtype=np.complex128)
        spectra = scratch.spectra[: (w1 - w0) * n_chirp * size].reshape(w1 - w0, n_chirp * size)
        spectra[...] = 0.0
        for start, stop, matrix in plan.blocks:
            # r in lag-major layout zero-padded to P along time, transformed in place (measured
            # faster than a fresh output array): the FFTs run on contiguous rows
            buffer = scratch.padded[: w1 - w0, : stop - start]
            buffer[:, :, n_samples:] = 0.0
            autocorrelation(z[w0:w1], stop - 1, lag_start=start, layout="lag",
                            out=buffer[:, :, :n_samples])
            ambiguity = sfft.fft(buffer, axis=2, overwrite_x=True, workers=fft_workers)
            for i in range(w1 - w0):  # Σ_m R(θ, m)·d_m·ĝ(θ + βτ_m) over the bands, all channels
                spectra[i] += matrix @ ambiguity[i].reshape(-1)
        rows = sfft.ifft(spectra.reshape(w1 - w0, n_chirp, size), axis=2, overwrite_x=True,
                         workers=fft_workers)
        out[w0:w1, plan.channels, :] = rows[:, :, :n_samples].real

    if parallel:
        with ThreadPoolExecutor(workers) as pool:
            for _ in pool.map(run, units):
                pass
    else:
        for unit in units:
            run(unit)
