"""Stage 0: the baselines a person would pick by hand, fitted on the fit windows.

The best constant-window spectrogram (a = 1, β = 0, one σ_t for all channels, scored on its own
FFT grid over the stage-1 subset: ``search.spectrogram``) and the best constant-Q Gaussian
scalogram (σ_t ∝ 1/f_c, a = 1, on the channel grid, over all fit windows), each by a 1-D search
over log σ_t (``search.diagnostics.search_1d``) of the criterion (for the detection criterion,
of the detection threshold on the subset: ``search.fit.detect``). Both seed stage 1. The pseudo-WVD has nothing
to fit: the judgement scores it. Units: s, Hz; parameter tuples ``(centers, sigma, area,
beta)``, each (C,).
"""
from __future__ import annotations

import math
import time

import numpy as np

from burstlens.search import diagnostics as dg
from burstlens.search.fit import detect
from burstlens.search.fit.state import BaselineFit
from burstlens.search.spectrogram import grid_description

# 1-D baseline searches: (grid points over log σ_t, then bounded Brent steps between the best
# point's neighbours). The spectrogram gets the finer search: the gain is measured against it.
BASELINE_SEARCH = {"spectrogram": (6, 5), "scalogram": (4, 3)}


def scalogram(space, sigma_ref: float) -> tuple:
    """Constant-Q Gaussian scalogram: σ_t = σ_ref·f_ref/f_c (a = 1), clipped to the grid cap."""
    f, ones = space.centers_hz, np.ones_like(space.centers_hz)
    return (f, np.minimum(sigma_ref * space.f_ref_hz / f, space.grid_cap_s(ones)),
            ones, np.zeros_like(f))


def pseudo_wvd(space, n_samples: int) -> tuple:
    """The pseudo-WVD as the limit of the kernel on windows of ``n_samples``: time spread of a
    quarter sample and a lag window far wider than the window (cell area chosen so
    σ_f√(1−ρ²)·window ≪ 1). Far narrower than any channel spacing, so its score shows what
    interference and an unsampled grid do, not a sharpness to beat."""
    sigma = 0.25 / space.fs
    area = 4 * math.pi * sigma * 1e-3 / (n_samples / space.fs)   # σ_f√(1−ρ²) = 1e-3 / window
    f = space.centers_hz
    return (f, np.full(f.shape, sigma), np.full(f.shape, area), np.zeros_like(f))


def run(ctx) -> None:
    """Fit the spectrogram and scalogram baselines into ``ctx.state.baselines`` (each
    resumable on its own), then hand over to the family search."""
    space, full, base = ctx.space, ctx.evaluator("full"), ctx.state.baselines
    lo, hi = space.bounds("log_sigma_ref")
    log = ctx.state.log

    def search(kind, score):
        def objective(x):
            ctx.check_cancel()
            t0 = time.perf_counter()
            r = score(math.exp(x))
            y = r if isinstance(r, float) else ctx.ceiling(r.scores, r.shares)
            log.add(f"baseline:{kind}", 0, {"time_spread_s": math.exp(x)}, y,
                    time.perf_counter() - t0)
            return y
        grid, maxiter = BASELINE_SEARCH[kind]
        x, y, tried = dg.search_1d(objective, lo, hi, grid=grid, maxiter=maxiter, xatol=0.01)
        return math.exp(x), y, len(tried)

    by_detection = detect.applies(ctx)
    if base.spectrogram is None:
        sub, band = ctx.evaluator("subset"), ctx.s["band_hz"]
        sigma, y, n = search("spectrogram", (lambda s: detect.spectrogram_threshold(ctx, s))
                             if by_detection else (lambda s: sub.spectrogram(s, band)))
        base.spectrogram = BaselineFit(y, n, {"time_spread_s": sigma, "cell_area": 1.0,
                                              "chirp_hz_per_s": 0.0,
                                              **grid_description(sigma, space.fs,
                                                                 ctx.windows.shape[1],
                                                                 ctx.s["eps"])})
        ctx.report("baselines", 0.5)
    if base.scalogram is None:
        sigma, y, n = search("scalogram", (
            lambda s: detect.filterbank_threshold(ctx, scalogram(space, s))) if by_detection
            else (lambda s: full.score([scalogram(space, s)])[0]))
        base.scalogram = BaselineFit(y, n, {"cycles": sigma * space.f_ref_hz,
                                            "time_spread_at_reference_s": sigma,
                                            "reference_hz": space.f_ref_hz, "cell_area": 1.0})
    ctx.state.phase = "family"
    ctx.report("baselines", 1.0)
