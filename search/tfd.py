"""The filterbank transform: Gaussian-smoothed Wigner–Ville rows, one per channel (docs/design.md §3).

For a window x (N samples at fs) with analytic signal z and channel c = (f_c, σ_t, a, β):

    S_c[n] = Σ_{n'} Σ_k W[n', k] · G_c((n' − n)/fs, f_k − f_c) · Δf / fs,

W the discrete pseudo-WVD (:mod:`search.wvd`), G_c(u, ν) = g_t(u)·N(ν; βu, σ_f²(1−ρ²)) of unit
mass with u = t′ − t = (n′ − n)/fs, g_t the N(0, σ_t²) density; linear (zero-padded) in time,
circular in frequency. The kernel lies along f′ = f_c + β·(t′ − t), so a channel with β > 0
sharpens arrivals sweeping upward at β Hz/s. Summing over k in closed form leaves, with
τ_m = 2m/fs and r[n, m] = z[n+m]·z*[n−m],

    S_c[n] = Re Σ_{n'} g_t((n−n')/fs)/fs · Σ_{m=0}^{L_c} d_{c,m} · r[n', m] · e^{+j2πβτ_m(n−n')/fs},
    d_{c,m} = (2 − δ_{m0}) · w_c(τ_m) · e^{−j2π f_c τ_m},   w_c(τ) = exp(−2π² σ_f²(1−ρ²) τ²).

- β = 0 (fast path): the lag sum comes first, for all channels at once, as real matrix products
  (rows × 2(L+1)) @ (2(L+1) × C) on [Re r, Im r] interleaved, channels grouped by lag count;
  then one Gaussian time convolution per channel, batched through one real FFT.
- β ≠ 0: in the ambiguity domain, S_c = Re IFFT_θ[Σ_m R(θ, m)·d_{c,m}·ĝ_c(θ − βτ_m)], R the FFT
  over time of r, ĝ_c(θ) = exp(−2π²σ_t²θ²) periodised over fs, keeping only the band
  |θ − βτ_m| ≤ √(2 ln(1/ε))/(2πσ_t); the banded sums of all chirped channels form one sparse
  matrix applied to R. R is formed lag by lag (an FFT over time per lag) or, when the bands
  reach few θ bins, only at those bins (Doppler rows: for each bin, one FFT over the lags of
  the spectrum of z times its shifted copy, the cross-correlation theorem); a cost model picks
  the cheaper, both are exact; ``transform(..., chirp_method="lag" | "doppler")`` forces one.

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
from functools import partial

import numpy as np
from numpy.lib.stride_tricks import as_strided
import scipy.fft as sfft
import scipy.sparse as sp
from threadpoolctl import ThreadpoolController

from burstlens.search.filterbank import Filterbank
from burstlens.search.wvd import analytic_signal, autocorrelation, lag_count, truncation_width

BLOCK_BYTES = 64 << 20  # working-set target for one block of r, R or channel rows
GEMM_BLOCK_BYTES = 8 << 20  # a block of r for the lag products
_ROW_BLOCKS, _MIN_BLOCK_ROWS = 8, 64  # rows of a window are cut in about 8 blocks of ≥ 64
# Grouping cost model, in lag-columns per row (measured on the 2-core dev machine): reading the
# r block costs about 8 output columns, a matrix-product call about 300 lag-columns.
_GROUP_READ_COLUMNS = 8.0
_GROUP_CALL_COST = 300.0
# Chirped path: Doppler-row blocks of about 2 MB (in cache) for batches of up to 8 windows (one
# sparse product serves the batch); cost model in ns per window, measured on the dev machine.
ROW_BLOCK_BYTES = 2 << 20
_DOPPLER_WINDOWS = 8
_COST_FFT = 0.8  # per point and log2(size) of a complex FFT
_COST_LAGS = 1.0  # per sample and lag of the lag-major autocorrelation
_COST_PRODUCT = 1.25  # per complex product of the Doppler rows
_COST_SPARSE_ONE, _COST_SPARSE_BATCH = 5.0, 1.6  # per sparse weight, alone or batched
_PLAN_CACHE_ENTRIES = 16
_PLAN_CACHE_BYTES = 256 << 20
# Ways of forming the chirped channels' ambiguity samples (transform's chirp_method): the cost
# model's choice, lag by lag (lag-major), or only at the θ bins the bands reach (Doppler rows).
CHIRP_METHODS = ("auto", "lag", "doppler")


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


def _checked_input(windows, filterbank, eps, workers, chirp_method) -> tuple:
    """(prepared windows, worker count) after checking the arguments both transforms share;
    the filterbank's steady lines leave the samples first (``search.noise.remove_lines``)."""
    if not isinstance(filterbank, Filterbank):
        raise ValueError(f"filterbank must be a Filterbank, got {type(filterbank).__name__}")
    truncation_width(eps)  # validates eps
    if filterbank.steady_lines_hz:
        if isinstance(windows, PreparedWindows):
            raise ValueError("the filterbank removes steady lines from the samples: pass the "
                             "windows themselves, not prepare()'s analytic signals")
        from burstlens.search.noise import remove_lines

        windows = remove_lines(windows, filterbank.sampling_rate_hz, filterbank.steady_lines_hz)
    workers = _default_workers() if workers is None else int(workers)
    if workers < 1:
        raise ValueError(f"workers={workers!r} must be ≥ 1")
    _check_chirp_method(chirp_method)
    return prepare(windows), workers


def transform(windows, filterbank: Filterbank, *, eps: float = 1e-6, dtype=np.float32,
              workers: int | None = None, chirp_method: str = "auto") -> np.ndarray:
    """Filterbank image of each window.

    windows: (M, N) real samples at ``filterbank.sampling_rate_hz``, one (N,) window, or the
    result of :func:`prepare` (not for a filterbank with steady lines: those are removed from
    the samples first, ``search.noise.remove_lines``). Returns (M, C, N) (or (C, N) for one 1-D window) of ``dtype``;
    row c is S_c of the module docstring, one output sample per input sample. ``eps``: truncation
    level of the Gaussian tails. ``workers``: threads to use (default: the BLAS thread count in
    force — all CPUs, or 1 in a joblib worker); the lag products run on that many threads with
    one BLAS thread each (BLAS is limited through threadpoolctl during the call), the FFTs with
    ``workers`` threads. ``chirp_method``: how the chirped channels (β ≠ 0) form their
    ambiguity samples R(θ, m) — ``"auto"`` (default) the cheaper by the module's cost model
    (:func:`auto_chirp_method` tells which), ``"lag"`` lag by lag (one FFT over time per lag),
    ``"doppler"`` only at the θ bins their bands reach (Doppler rows); all are exact and agree to
    round-off. Unchirped channels ignore it.

    Examples
    --------
    Two tones, each at the centre of one channel, in windows of 256 samples at 100 Hz:

    >>> import numpy as np
    >>> from burstlens.search import Channel, Filterbank, transform
    >>> fs = 100.0
    >>> bank = Filterbank([Channel(10.0, 0.1), Channel(25.0, 0.1)], fs)
    >>> t = np.arange(256) / fs
    >>> windows = np.stack([np.sin(2 * np.pi * 10 * t), np.sin(2 * np.pi * 25 * t)])
    >>> image = transform(windows, bank)
    >>> image.shape, image.dtype  # (M, C, N)
    ((2, 2, 256), dtype('float32'))
    >>> image[:, :, 64:192].mean(axis=2).argmax(axis=1)  # each tone fills its own channel
    array([0, 1])
    >>> transform(windows[0], bank).shape  # one 1-D window gives (C, N)
    (2, 256)
    """
    prepared, workers = _checked_input(windows, filterbank, eps, workers, chirp_method)
    z = prepared.analytic
    n_windows, n_samples = z.shape
    plan = _plan(filterbank, n_samples, float(eps), chirp_method)
    out = np.empty((n_windows, len(filterbank), n_samples), dtype=dtype)
    if plan.fast is not None:
        _run_fast(plan.fast, z, out, workers)
    if plan.chirped is not None:
        _run_chirped(plan.chirped, z, out, workers)
    return out[0] if prepared.single else out


def transform_decimated(windows, filterbank: Filterbank, step: int, *, offset: int = 0, eps: float = 1e-6,
                        dtype=np.float32, workers: int | None = None, chirp_method: str = "auto",
                        precision: str = "double") -> np.ndarray:
    """Filterbank image of each window at every ``step``-th sample from ``offset`` on:
    ``transform(windows, ...)[..., offset::step]`` to round-off, with less work.

    windows, filterbank, eps, dtype, workers, chirp_method: as :func:`transform`. ``step``
    (samples, ≥ 1) and ``offset`` (samples, 0 ≤ offset < N): output sample k is input sample
    offset + k·step. Returns (M, C, K) (or (C, K) for one 1-D window), K = ⌈(N − offset)/step⌉.

    Unchirped channels (the fast path): the lag products and the forward FFT are those of
    :func:`transform` (every input sample enters the time convolution); the inverse FFT is
    evaluated at the output samples only. With P = step·K′ and Y the P-point spectrum of the
    smoothed row, sampling every step-th point of IDFT_P(Y) is the K′-point IDFT of Y folded:

        y[k·step] = (1/step) · IDFT_K′[F](k),   F[q] = Σ_{l=0}^{step−1} Y[q + l·K′]

    (DFT decimation in time; e.g. Oppenheim & Schafer, Discrete-Time Signal Processing, 3rd
    ed., 2010, §4.6), so the inverse costs K′·log K′ instead of P·log P; ``offset`` shifts the
    sampled kernel by −offset samples (no extra work). ``precision="single"`` runs the unchirped
    channels' lag products and FFTs in float32 after the analytic signal (about 2.5× faster on
    the dev machine; the image then differs from the double-precision one by about 1e-7 of its
    peak, tested below 1e-5; calls running at once in threads of one process may differ in the
    last bits, since OpenBLAS's float32 products then vary); ``"double"`` (default) computes as
    :func:`transform`. Chirped channels (β ≠ 0) are computed at every sample in double
    precision and then sampled (no saving).
    """
    if isinstance(step, bool) or not isinstance(step, (int, np.integer)) or step < 1:
        raise ValueError(f"step={step!r} must be a whole number of samples ≥ 1")
    if isinstance(offset, bool) or not isinstance(offset, (int, np.integer)) or offset < 0:
        raise ValueError(f"offset={offset!r} must be a whole number of samples ≥ 0")
    step, offset = int(step), int(offset)
    if precision not in ("double", "single"):
        raise ValueError(f"precision={precision!r} must be 'double' or 'single'")
    prepared, workers = _checked_input(windows, filterbank, eps, workers, chirp_method)
    z = prepared.analytic
    n_windows, n_samples = z.shape
    if offset >= n_samples:
        raise ValueError(f"offset={offset} must be below the window length N = {n_samples}")
    n_out = -(-(n_samples - offset) // step)
    out = np.empty((n_windows, len(filterbank), n_out), dtype=dtype)
    chirp = filterbank.chirp_hz_per_s
    single = precision == "single"
    if (chirp == 0.0).any():
        if step == 1 and offset == 0 and not single:
            fast = _plan(filterbank, n_samples, float(eps), chirp_method).fast
        else:
            fast = _decimated_fast_plan(filterbank, n_samples, float(eps), step, offset, single)
        _run_fast(fast, z, out, workers, single=single)
    if (chirp != 0.0).any():
        chirped = _plan(filterbank, n_samples, float(eps), chirp_method).chirped
        full = np.empty((n_windows, len(filterbank), n_samples), dtype=dtype)
        _run_chirped(chirped, z, full, workers)
        out[:, chirped.channels, :] = full[:, chirped.channels, offset::step]
    return out[0] if prepared.single else out


def auto_chirp_method(filterbank: Filterbank, n_samples: int, *, eps: float = 1e-6) -> str | None:
    """The way ``transform(..., chirp_method="auto")`` forms the chirped channels of
    ``filterbank`` on windows of ``n_samples`` samples: ``"lag"`` or ``"doppler"``, None when
    no channel is chirped. Builds and caches the weights as the transform's first call would."""
    if not isinstance(filterbank, Filterbank):
        raise ValueError(f"filterbank must be a Filterbank, got {type(filterbank).__name__}")
    truncation_width(eps)  # validates eps
    if isinstance(n_samples, bool) or not isinstance(n_samples, (int, np.integer)) or n_samples < 1:
        raise ValueError(f"n_samples={n_samples!r} must be a whole number of samples ≥ 1")
    chirped = _plan(filterbank, int(n_samples), float(eps), "auto").chirped
    return None if chirped is None else chirped.method


def clear_plans() -> None:
    """Forget the cached per-filterbank weights: the next transform of each filterbank builds
    them again (to time a first call, or to free their memory)."""
    with _PLANS_LOCK:
        _PLANS.clear()


def _check_chirp_method(chirp_method) -> None:
    if not isinstance(chirp_method, str) or chirp_method not in CHIRP_METHODS:
        raise ValueError(f"chirp_method={chirp_method!r}: choose one of "
                         f"{', '.join(map(repr, CHIRP_METHODS))}")


# ---------------------------------------------------------------------------------------------
# Plans: everything that depends on (filterbank, N, ε, chirp method) only, cached across calls.


@dataclass
class _FastPlan:
    channels: np.ndarray  # filterbank indices, sorted by lag count
    groups: list  # (first column, last column + 1, 2·(L_g+1), weights (2(L_g+1), n_g))
    max_lag: int
    fft_size: int  # the largest P_g
    convolutions: list  # (first, last + 1, P_g, rfft of the sampled time kernels (n_g, P_g//2+1))
    nbytes: int = 0
    step: int = 1  # output every step-th sample (transform_decimated); P_g then a multiple of it


@dataclass
class _ChirpPlan:
    channels: np.ndarray  # filterbank indices
    fft_size: int  # P
    method: str  # "lag" (lag-major) or "doppler" (Doppler rows), see _run_chirped
    blocks: list  # lag: (lag_start, lag_stop, CSR); doppler: (segments, first, stop, CSR)
    rows: np.ndarray | None  # doppler: the θ bins reached, ascending
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


def _plan(filterbank: Filterbank, n_samples: int, eps: float, chirp_method: str) -> _Plan:
    key = (filterbank.key(), n_samples, eps, chirp_method)
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
        _chirp_plan(filterbank, chirp_idx, n_samples, eps, chirp_method)
        if chirp_idx.size else None,
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
    idx, lags, groups = _lag_groups(filterbank, idx, n_samples, eps)
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


def _lag_groups(filterbank, idx, n_samples, eps) -> tuple[np.ndarray, np.ndarray, list]:
    """The unchirped channels ``idx`` sorted by lag count, their lag counts, and the lag
    weights per group of :func:`_group_by_lags`: (first, last + 1, 2(L_g+1), (2(L_g+1), n_g))."""
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
    return idx, lags, groups


def _decimated_fast_plan(filterbank, n_samples, eps, step, offset, single) -> _FastPlan:
    """The fast plan of ``transform_decimated``: the lag weights and channel runs of the hop-1
    plan (:func:`_fast_plan`, whose own kernels it does not build), each run's FFT size
    P′ = step·K′ (K′ 5-smooth, P′ ≥ N + half width, so the circular convolution is linear over
    the window) and its kernel placed at (d − offset) mod P′, so the convolution's sample j is
    the linear one's j + offset; with ``single`` the weights and kernel spectra are float32 and
    complex64. Cached with the hop-1 plans."""
    key = (filterbank.key(), n_samples, eps, "decimated", step, offset, single)
    with _PLANS_LOCK:
        plan = _PLANS.get(key)
        if plan is not None:
            _PLANS.move_to_end(key)
            return plan.fast
    fs = filterbank.sampling_rate_hz
    idx, lags, groups = _lag_groups(filterbank, np.flatnonzero(filterbank.chirp_hz_per_s == 0.0), n_samples, eps)
    sigma = filterbank.time_spread_s[idx]
    half = _kernel_half_widths(sigma, fs, n_samples, eps)
    sizes = np.array([sfft.next_fast_len(n_samples + int(h), real=True) for h in half])  # as _fast_plan
    convolutions = []
    for start, stop in _group_by_size(sizes):
        top = int(half[start:stop].max())
        size = step * sfft.next_fast_len(-(-(n_samples + top) // step), real=True)
        d = np.arange(-top, top + 1)
        s_fs = sigma[start:stop, None] * fs
        kernel = np.exp(-0.5 * (d[None, :] / s_fs) ** 2) / (math.sqrt(2.0 * math.pi) * s_fs)
        kernel[np.abs(d)[None, :] > half[start:stop, None]] = 0.0  # as in _fast_plan
        circular = np.zeros((stop - start, size))
        circular[:, (d - offset) % size] = kernel
        spectrum = sfft.rfft(circular, axis=1)
        convolutions.append((start, stop, size, spectrum.astype(np.complex64) if single else spectrum))
    if single:
        groups = [(a, b, width, weights.astype(np.float32)) for a, b, width, weights in groups]
    fast = _FastPlan(idx, groups, int(lags.max()), max(c[2] for c in convolutions), convolutions, step=step)
    fast.nbytes = sum(c[3].nbytes for c in convolutions) + sum(g[3].nbytes for g in groups)
    with _PLANS_LOCK:
        _PLANS[key] = _Plan(fast, None)
        while len(_PLANS) > _PLAN_CACHE_ENTRIES or (
            len(_PLANS) > 1 and sum(p.nbytes for p in _PLANS.values()) > _PLAN_CACHE_BYTES
        ):
            _PLANS.popitem(last=False)
    return fast


def _folded_irfft(half_spectrum: np.ndarray, size: int, step: int, workers: int) -> np.ndarray:
    """Every step-th sample of irfft(half_spectrum, n=size) (size P = step·K′, last axis): the
    K′-point inverse of F[q] = Σ_l Y[q + l·K′] divided by step (see :func:`transform_decimated`).

    Y is Hermitian (Y[P − i] = Y*[i]), so F is formed from the half spectrum H = Y[0..⌊P/2⌋]
    in one pass: with G[j] = Σ_l H[j + l·K′] (H zero beyond ⌊P/2⌋) and G′ the same without
    Y[P/2] (P even), F[q] = G[q] + (G′[(−q) mod K′] − δ_q0·H[0])*. (..., K′) float64."""
    reduced = size // step
    n_half = half_spectrum.shape[-1]
    rows, rest = divmod(n_half, reduced)
    folded = half_spectrum[..., : rows * reduced].reshape(half_spectrum.shape[:-1] + (rows, reduced)).sum(axis=-2)
    folded[..., :rest] += half_spectrum[..., rows * reduced:]
    mirror = folded[..., (-np.arange(reduced // 2 + 1)) % reduced]  # G[(−q) mod K′], a copy
    mirror[..., 0] -= half_spectrum[..., 0]
    if size % 2 == 0:  # Y[P/2] is its own mirror: counted once, in G
        q = (reduced - (size // 2) % reduced) % reduced
        if q <= reduced // 2:
            mirror[..., q] -= half_spectrum[..., size // 2]
    spectrum = folded[..., : reduced // 2 + 1]
    spectrum += np.conjugate(mirror)
    samples = sfft.irfft(spectrum, n=reduced, axis=-1, workers=workers)
    samples /= step
    return samples


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


def _chirp_plan(filterbank, idx, n_samples, eps, method) -> _ChirpPlan:
    """Plan for the chirped channels: the lag-major or the Doppler-row way of forming R(θ, m)
    (both exact, see :func:`_run_chirped`) as ``method`` says, ``"auto"`` the cheaper by the
    cost model of :func:`_chirp_method`, with the banded weights laid out for it: one CSR
    matrix, filled one channel at a time (int32 indices where they fit, no argsort), then cut
    into row blocks."""
    fs = filterbank.sampling_rate_hz
    k = truncation_width(eps)
    spread = filterbank.conditional_freq_spread_hz[idx]
    sigma = filterbank.time_spread_s[idx]
    centers = filterbank.center_hz[idx]
    # The helpers below take the kernel's shear s in the convolution variable t − t′, where
    # the kernel G (centred on ν = β·u, u = t′ − t, docs/design.md §3) is sheared by −β: a channel
    # with +β then sharpens arrivals sweeping upward at β Hz/s. The only place the sign is set.
    shears = -filterbank.chirp_hz_per_s[idx]
    lags = np.atleast_1d(lag_count(spread, fs, n_samples, eps))
    n_chirp, n_lags = idx.size, int(lags.max()) + 1
    # The banded θ-domain kernel is the whole time Gaussian, aliased with period P: P must hold
    # its full support (no cap at N−1 here, unlike the time-domain kernels of the fast path).
    # The Doppler rows also correlate z with itself over shifts 2m ≤ 2L, and need P even.
    # 5-smooth sizes (real=True): pocketfft's radix 7 and 11 cost more per point than the few
    # extra points (measured).
    half = int(np.ceil(k * sigma.max() * fs))
    sizes = {
        "lag": sfft.next_fast_len(n_samples + half, real=True),
        "doppler": 2 * sfft.next_fast_len(-(-(n_samples + max(half, 2 * (n_lags - 1))) // 2),
                                          real=True),
    }
    reached = _bins_reached(shears, sigma, lags, sizes["doppler"], fs, k)
    if method == "auto":
        method = _chirp_method(sigma, lags, n_samples, sizes, int(reached.sum()), fs, k)
    size = sizes[method]
    if method == "lag":  # row blocks of lags start..start+width−1 stacked: b·(C·P) + c·P + q
        width = max(1, min(n_lags, BLOCK_BYTES // (16 * size)))
        cuts = [(start, min(n_lags, start + width)) for start in range(0, n_lags, width)]
        block_rows, rows = n_chirp * size, None
        n_rows, n_columns = len(cuts) * block_rows, width * size
        shapes = [(b * block_rows, (b + 1) * block_rows, (stop - start) * size)
                  for b, (start, stop) in enumerate(cuts)]
    else:  # rows (position of the θ bin)·C + c, position in plan.rows
        rows = np.flatnonzero(reached)
        position = np.cumsum(reached) - 1
        phase = 0.5 * np.exp(2j * np.pi * np.arange(size) / size)  # ½·e^{j2πqm/P}, by qm mod P
        per_block = max(1, ROW_BLOCK_BYTES // (16 * (size // 2) * _DOPPLER_WINDOWS))
        cuts = [(first, min(rows.size, first + per_block))
                for first in range(0, rows.size, per_block)]
        n_rows, n_columns = rows.size * n_chirp, per_block * (size // 2)
        shapes = [(first * n_chirp, stop * n_chirp, (stop - first) * (size // 2))
                  for first, stop in cuts]
    counts = (lags + 1) * _band_bins(_half_bands(sigma, size, fs, k))  # entries per channel
    index = np.int32 if max(n_rows, n_columns) <= np.iinfo(np.int32).max else np.int64
    data = np.empty(int(counts.sum()), dtype=np.complex128)
    row = np.empty(data.size, dtype=index)
    column = np.empty(data.size, dtype=index)
    end = 0
    for c in range(n_chirp):
        q, m, values = _chirp_entries(centers[c], sigma[c], spread[c], shears[c], int(lags[c]),
                                      size, fs, k)
        part = slice(end, end + q.size)
        end += q.size
        if method == "lag":
            block, lag = np.divmod(m, width)
            row[part] = block * block_rows + c * size + q
            column[part] = lag * size + q
            data[part] = values
        else:
            at = position[q]
            row[part] = at * n_chirp + c
            column[part] = (at % per_block) * (size // 2) + m
            data[part] = values * phase[(q * m) % size]
    whole = sp.csr_matrix((data, (row, column)), shape=(n_rows, n_columns))
    del data, row, column
    blocks = [cut + (_row_block(whole, r0, r1, n_cols),)
              for cut, (r0, r1, n_cols) in zip(cuts, shapes, strict=True)]
    if method == "doppler":
        blocks = [(_segments(rows[first:stop]), first, stop, matrix)
                  for first, stop, matrix in blocks]
    nbytes = whole.data.nbytes + whole.indices.nbytes + whole.indptr.nbytes
    return _ChirpPlan(idx, size, method, blocks, rows, nbytes)


def _row_block(matrix, first: int, stop: int, n_columns: int):
    """Rows first..stop−1 of a CSR matrix (scipy keeps a large share as a view, copies a
    small one so that the whole can be freed)."""
    a, b = matrix.indptr[first], matrix.indptr[stop]
    pointers = matrix.indptr[first:stop + 1] - a
    return sp.csr_matrix((matrix.data[a:b], matrix.indices[a:b], pointers),
                         shape=(stop - first, n_columns), copy=False)


def _segments(bins: np.ndarray) -> list[tuple[int, int, int]]:
    """Runs of consecutive θ bins in a block: (offset in the block, count, first bin)."""
    breaks = np.flatnonzero(np.diff(bins) != 1) + 1
    starts, ends = np.r_[0, breaks], np.r_[breaks, bins.size]
    return [(int(a), int(b - a), int(bins[a])) for a, b in zip(starts, ends, strict=True)]


def _chirp_entries(center, sigma, spread, shear, lags, size, fs, k):
    """One chirped channel's banded ambiguity-domain weights d_m·ĝ(θ_q + sτ_m) for lags
    0..L, s = −β the shear in t − t′ (see _chirp_plan): flat arrays (q, m, value) sorted by m,
    q the θ bin mod P. Bins j (unwrapped) around θ = −sτ_m with |θ_j + sτ_m| ≲ band; aliases
    j ≡ q (mod P) are summed by the sparse layout, which periodises ĝ over fs."""
    m = np.arange(lags + 1)
    tau = 2.0 * m / fs
    d = np.where(m == 0, 1.0, 2.0) * np.exp(-2.0 * np.pi**2 * (spread * tau) ** 2)
    d = d * np.exp(-2j * np.pi * center * tau)
    band = _half_bands(sigma, size, fs, k)
    j = _band_starts(shear, tau, band, size, fs)[:, None] + np.arange(_band_bins(band))
    offset = j * (fs / size) + shear * tau[:, None]
    values = d[:, None] * np.exp(-2.0 * np.pi**2 * (sigma * offset) ** 2)
    return (j % size).ravel(), np.repeat(m, j.shape[1]), values.ravel()


def _half_bands(sigma, size, fs, k):
    """Half width of ĝ's band in θ bins, √(2 ln(1/ε))/(2πσ_t) in units of fs/P."""
    return k * size / (2.0 * np.pi * np.asarray(sigma) * fs)


def _band_starts(shear, tau, band, size, fs) -> np.ndarray:
    """First θ bin (unwrapped) of each lag's band, ⌈−sτ_m·P/fs − band⌉ (s = −β)."""
    return np.ceil(-shear * tau * size / fs - band).astype(np.int64)


def _band_bins(band):
    """θ bins kept per lag for a half band of ``band`` bins (scalar or array): ⌊2·band⌋ + 2."""
    return np.floor(2.0 * np.asarray(band)).astype(np.int64) + 2


def _bins_reached(shears, sigma, lags, size, fs, k) -> np.ndarray:
    """(P,) bool: the θ bins mod P that some channel's band reaches at some lag (s = −β)."""
    reached = np.zeros(size, dtype=bool)
    for shear, band, n_lags in zip(shears, _half_bands(sigma, size, fs, k), lags, strict=True):
        starts = _band_starts(shear, 2.0 * np.arange(n_lags + 1) / fs, band, size, fs)
        # the hull of the lag bands (they overlap unless a band moves more than its width
        # from one lag to the next; a superset costs time, never accuracy)
        low, high = int(starts.min()), int(starts.max()) + int(_band_bins(band))
        reached[np.arange(low, min(high, low + size)) % size] = True
    return reached


def _chirp_method(sigma, lags, n_samples, sizes, doppler_rows, fs, k) -> str:
    """'lag' or 'doppler', whichever the cost model (ns per window, constants measured on the
    2-core dev machine) finds cheaper. Lag-major: L+1 FFTs of P points over time plus the
    autocorrelation, and a sparse product per window. Doppler rows: for each of the
    ``doppler_rows`` θ bins the bands reach, P products and one P/2-point FFT over lags, and a
    sparse product shared by a batch of windows."""
    def weights(size):  # sparse entries at FFT size P
        return float(np.sum((lags + 1) * _band_bins(_half_bands(sigma, size, fs, k))))

    lag, doppler = sizes["lag"], sizes["doppler"]
    lag_cost = (int(lags.max()) + 1) * (lag * math.log2(lag) * _COST_FFT
                                        + n_samples * _COST_LAGS)
    lag_cost += weights(lag) * _COST_SPARSE_ONE
    doppler_cost = doppler_rows * doppler / 2 * (math.log2(doppler / 2) * _COST_FFT
                                                 + 2.0 * _COST_PRODUCT)
    doppler_cost += weights(doppler) * _COST_SPARSE_BATCH
    return "lag" if lag_cost <= doppler_cost else "doppler"


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


def _lag_block_single(padded, conj, pad, rows, lags, out):
    """r[w, n, m] = z[w, n+m]·z*[w, n−m] for rows n in [n0, n1), m = 0..lags, into ``out``
    (windows, n1−n0, lags+1) complex64, from z padded once per call by ``pad`` zeros each side
    (``padded``) and its conjugate (the single-precision twin of ``wvd.autocorrelation``)."""
    n0, n1 = rows
    other, step = padded.strides
    shape = (padded.shape[0], n1 - n0, lags + 1)
    forward = as_strided(padded[:, pad + n0:], shape, (other, step, step), writeable=False)
    backward = as_strided(conj[:, pad + n0:], shape, (other, step, -step), writeable=False)
    return np.multiply(forward, backward, out=out)


def _run_fast(plan: _FastPlan, z: np.ndarray, out: np.ndarray, workers: int, single: bool = False) -> None:
    """The unchirped channels (module docstring), in double precision, or with ``single`` (a
    plan of float32 weights) the lag products and FFTs in single precision
    (``transform_decimated`` with float32 output)."""
    n_windows, n_samples = z.shape
    n_fast = plan.channels.size
    size = plan.fft_size
    groups, convolutions = plan.groups, plan.convolutions  # float32 ones when single
    real = np.float32 if single else np.float64
    if single:  # z padded once (not per block, as wvd.autocorrelation does)
        padded = np.zeros((n_windows, n_samples + 2 * plan.max_lag), np.complex64)
        padded[:, plan.max_lag: plan.max_lag + n_samples] = z
        conj = np.conj(padded)
    per_window = n_fast * (8 * size + 16 * (size // 2 + 1) + 8 * size)
    chunk = max(1, min(n_windows, BLOCK_BYTES // per_window))
    row_bytes = 16 * (plan.max_lag + 1)
    # Short windows are batched into one product; long ones are cut in row blocks: r[n, m] is
    # zero for m > min(n, N−1−n), so blocks near the window ends need fewer lag columns (about
    # a third less work when L ≈ N/2).
    window_bytes = n_samples * row_bytes
    if window_bytes <= GEMM_BLOCK_BYTES // _ROW_BLOCKS:
        unit_rows, unit_windows = n_samples, max(1, GEMM_BLOCK_BYTES // window_bytes)
    else:
        rows = max(_MIN_BLOCK_ROWS, -(-n_samples // _ROW_BLOCKS))
        unit_rows, unit_windows = max(1, min(n_samples, rows, GEMM_BLOCK_BYTES // row_bytes)), 1

    scratch = threading.local()  # one r buffer per thread, reused block after block

    def lag_products(lagged, w0, unit):
        """lagged[w, c, n] = Σ_m Re(d_{c,m} r[n, m]) for one block of windows × rows."""
        u0, u1, n0, n1 = unit
        lags = min(plan.max_lag, n1 - 1, n_samples - 1 - n0)  # nonzero lags in these rows
        shape = (u1 - u0, n1 - n0, lags + 1)
        if getattr(scratch, "r", None) is None:
            scratch.r = np.empty(unit_windows * unit_rows * (plan.max_lag + 1),
                                 np.complex64 if single else np.complex128)
        block = scratch.r[: math.prod(shape)].reshape(shape)
        if single:
            r = _lag_block_single(padded[u0:u1], conj[u0:u1], plan.max_lag, (n0, n1), lags, block)
        else:
            r = autocorrelation(z[u0:u1], lags, rows=(n0, n1), out=block)
        a = r.view(real).reshape((u1 - u0) * (n1 - n0), 2 * (lags + 1))
        for start, stop, width, weights in groups:
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
        buffer = np.zeros((chunk, n_fast, size), dtype=real)
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
                    for _ in pool.map(partial(lag_products, lagged, w0), units):
                        pass
                for start, stop, fft_size, kernels in convolutions:
                    spectrum = sfft.rfft(lagged[:, start:stop, :fft_size], axis=2,
                                         workers=workers)
                    spectrum *= kernels
                    if plan.step == 1:
                        smoothed = sfft.irfft(spectrum, n=fft_size, axis=2, workers=workers)
                    else:
                        smoothed = _folded_irfft(spectrum, fft_size, plan.step, workers)
                    out[w0:w1, plan.channels[start:stop], :] = smoothed[:, :, :out.shape[2]]
    finally:
        if pool is not None:
            pool.shutdown()


def _run_chirped(plan: _ChirpPlan, z: np.ndarray, out: np.ndarray, workers: int) -> None:
    """S_c = Re IFFT_θ[Σ_m R(θ, m)·W_c(θ, m)] for the chirped channels, W_c the banded weights.

    R(θ_q, m) = Σ_n r[n, m]·e^{−j2πqn/P} is formed one of two exact ways:
    - lag-major: r in (lag, time) layout, one P-point FFT over time per lag;
    - Doppler rows, only at the θ bins the bands reach: with Z the P-point DFT of z,
      R(θ_q, m) = ½·e^{j2πqm/P}·IFFT_{P/2}[F_q](m), F_q[k] = Σ_{s=0,1} Z[k+q+sP/2]·Z*[k+sP/2]
      (r[n, m] = z[n+m]·z*[n−m] is the product of z modulated by θ_q with z shifted by 2m:
      a cross-correlation at even shifts 2m, exact while P ≥ N + 2L; the phase sits in W).
    """
    n_windows = z.shape[0]
    n_chirp, size = plan.channels.size, plan.fft_size
    scratch = threading.local()  # per-thread buffers, reused unit after unit (no page faults)
    if plan.method == "doppler":
        # θ-row blocks run in parallel (each block's products, FFTs and sparse product are
        # independent), window chunks in turn: this parallelises whatever M is
        chunk = min(n_windows, max(1, min(_DOPPLER_WINDOWS,
                                          BLOCK_BYTES // (16 * size * n_chirp))))
        pool = ThreadPoolExecutor(workers) if workers > 1 and len(plan.blocks) > 1 else None
        try:
            for w0 in range(0, n_windows, chunk):
                w1 = min(n_windows, w0 + chunk)
                rows = _doppler_rows(plan, z[w0:w1], chunk, scratch, workers, pool)
                out[w0:w1, plan.channels, :] = rows[:, :, : z.shape[1]].real
        finally:
            if pool is not None:
                pool.shutdown()
        return
    widest = max(stop - start for start, stop, _ in plan.blocks)
    chunk = min(n_windows, max(1, BLOCK_BYTES // (16 * size * max(widest, n_chirp))))
    units = [(w0, min(n_windows, w0 + chunk)) for w0 in range(0, n_windows, chunk)]
    # Window chunks run in parallel, each with one FFT thread: the sparse products hold the
    # GIL, so one thread's product overlaps the other's autocorrelation and FFTs.
    parallel = workers > 1 and len(units) > 1
    fft_workers = 1 if parallel else workers

    def one(unit):
        w0, w1 = unit
        rows = _lag_major(plan, z[w0:w1], chunk, scratch, fft_workers)
        out[w0:w1, plan.channels, :] = rows[:, :, : z.shape[1]].real

    if parallel:
        with ThreadPoolExecutor(workers) as pool:
            for _ in pool.map(one, units):
                pass
    else:
        for unit in units:
            one(unit)


def _lag_major(plan, z, chunk, scratch, fft_workers):
    """Channel rows (windows, n_chirp, P) complex, R formed lag by lag (see _run_chirped)."""
    n_windows, n_samples = z.shape
    n_chirp, size = plan.channels.size, plan.fft_size
    if getattr(scratch, "padded", None) is None:
        widest = max(stop - start for start, stop, _ in plan.blocks)
        scratch.padded = np.empty((chunk, widest, size), dtype=np.complex128)
    spectra = np.zeros((n_windows, n_chirp * size), dtype=np.complex128)
    for start, stop, matrix in plan.blocks:
        # r in lag-major layout zero-padded to P along time, transformed in place (measured
        # faster than a fresh output array): the FFTs run on contiguous rows
        buffer = scratch.padded[:n_windows, : stop - start]
        buffer[:, :, n_samples:] = 0.0
        autocorrelation(z, stop - 1, lag_start=start, layout="lag", out=buffer[:, :, :n_samples])
        ambiguity = sfft.fft(buffer, axis=2, overwrite_x=True, workers=fft_workers)
        for i in range(n_windows):  # Σ_m R(θ, m)·d_m·ĝ(θ − βτ_m) over the bands, all channels
            spectra[i] += matrix @ ambiguity[i].reshape(-1)
    return sfft.ifft(spectra.reshape(n_windows, n_chirp, size), axis=2, overwrite_x=True,
                     workers=fft_workers)


def _doppler_rows(plan, z, chunk, scratch, workers, pool):
    """Channel rows (windows, n_chirp, P) complex, R formed at the reached θ bins only (see
    _run_chirped). Windows are the innermost axis, so one sparse product serves the batch;
    blocks of θ rows go to ``pool`` (one FFT thread each) when there is one."""
    n_windows = z.shape[0]
    n_chirp, size = plan.channels.size, plan.fft_size
    half = size // 2
    per_block = max(stop - first for _, first, stop, _ in plan.blocks)
    doubled = np.empty((2 * size, n_windows), dtype=np.complex128)
    doubled[:size] = sfft.fft(z, n=size, axis=1, workers=workers).T
    doubled[size:] = doubled[:size]
    conj = np.conj(doubled[:size])
    # shifted[q, k] = Z[(k + q) mod P]: a read-only strided view, no copy
    step, window_step = doubled.strides
    shifted = as_strided(doubled, (size, size, n_windows), (step, step, window_step),
                         writeable=False)
    sums = np.empty((plan.rows.size, n_chirp, n_windows), dtype=np.complex128)  # Ŝ_c(θ_q)
    fft_workers = 1 if pool is not None else workers

    def one(block):
        segments, first, stop, matrix = block
        if getattr(scratch, "rows", None) is None:
            scratch.rows = np.empty(per_block * half * chunk, dtype=np.complex128)
            scratch.product = np.empty(per_block * half * chunk, dtype=np.complex128)
        folded = scratch.rows[: (stop - first) * half * n_windows].reshape(stop - first, half,
                                                                           n_windows)
        product = scratch.product[: folded.size].reshape(folded.shape)
        for offset, count, q0 in segments:
            rows = shifted[q0:q0 + count]
            np.multiply(rows[:, :half], conj[:half], out=folded[offset:offset + count])
            np.multiply(rows[:, half:], conj[half:], out=product[:count])
            folded[offset:offset + count] += product[:count]
        lags = sfft.ifft(folded, axis=1, overwrite_x=True, workers=fft_workers)
        sums[first:stop] = (matrix @ lags.reshape(-1, n_windows)).reshape(
            stop - first, n_chirp, n_windows)

    if pool is None:
        for block in plan.blocks:
            one(block)
    else:
        for _ in pool.map(one, plan.blocks):
            pass
    spectra = np.zeros((n_windows, n_chirp, size), dtype=np.complex128)
    spectra[:, :, plan.rows] = sums.transpose(2, 1, 0)
    return sfft.ifft(spectra, axis=2, overwrite_x=True, workers=workers)
