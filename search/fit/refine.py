"""Stage 2: per-channel refinement by coordinate sweeps over (log σ_t, log a, β).

Each coordinate of each channel is minimised by bounded Brent (:func:`bounded_brent`, the steps
of ``scipy.optimize.minimize_scalar(method="bounded")``) in a bracket around its value, on the
reduced criterion over ALL fit windows plus a smoothness penalty on second differences between
neighbour channels (zero on every family member with log spacing, so leaving the family is never
paid for by the penalty). Only the changed channel's row enters a trial: the criterion sees each
(window, channel) row only through its statistics (``search.fit.evaluate.row_stats``), kept as an
``(M, C, 4)`` array, so a trial replaces one row of it. The 1-D searches of all channels run in
lockstep — one transform call yields the next trial row of every channel — and a safeguarded
combination step applies the improvements, so each round lowers the objective. The Gini index is
not separable by channel: with it the refinement is skipped.

Coordinates: ``log_sigma`` (ln of σ_t in s), ``log_area`` (ln of the cell area), ``beta`` (Hz/s);
parameters ``(sigma, area, beta)``, each (C,).
"""
from __future__ import annotations

import math
import time

import numpy as np

from burstlens.search.criteria import L1, TOTAL, shares_from_totals
from burstlens.search.fit.context import Cancelled
from burstlens.search.fit.evaluate import scores_from_stats
from burstlens.search.fit.state import ChannelRecord, RefineState, RefineStep

# ---------------------------------------------------------------------------------------------
# Bounded Brent as a coroutine, so that many 1-D searches can share each transform call
# ---------------------------------------------------------------------------------------------

_GOLDEN = 0.5 * (3.0 - math.sqrt(5.0))
_SQRT_EPS = math.sqrt(2.2e-16)


def bounded_brent(a: float, b: float, x0: float, f0: float, xatol: float, maxiter: int):
    """Brent's bounded minimiser (R. P. Brent, "Algorithms for Minimization without
    Derivatives", 1973; the same steps as ``scipy.optimize.minimize_scalar(method="bounded")``)
    started from a point ``x0`` in [a, b] whose value ``f0`` is known.

    A generator: it yields each trial point, receives its value through ``send``, and returns
    ``(x_best, f_best)`` (as ``StopIteration.value``) after at most ``maxiter`` trials or when
    the bracket is narrower than about ``xatol``.
    """
    lo, hi = a, b
    xf, fx = min(max(x0, a), b), f0
    nfc, fnfc = xf, fx
    fulc, ffulc = xf, fx
    rat = e = 0.0
    xm = 0.5 * (a + b)
    tol1 = _SQRT_EPS * abs(xf) + xatol / 3.0
    tol2 = 2.0 * tol1
    n = 0
    while abs(xf - xm) > (tol2 - 0.5 * (b - a)) and n < maxiter:
        golden = True
        if abs(e) > tol1:                      # try a parabola through the three best points
            golden = False
            r = (xf - nfc) * (fx - ffulc)
            q = (xf - fulc) * (fx - fnfc)
            p = (xf - fulc) * q - (xf - nfc) * r
            q = 2.0 * (q - r)
            if q > 0.0:
                p = -p
            q = abs(q)
            r, e = e, rat
            if abs(p) < abs(0.5 * q * r) and q * (a - xf) < p < q * (b - xf):
                rat = p / q
                x = xf + rat
                if (x - a) < tol2 or (b - x) < tol2:
                    rat = tol1 * (1.0 if xm >= xf else -1.0)
            else:
                golden = True
        if golden:                             # golden-section step into the larger part
            e = (a - xf) if xf >= xm else (b - xf)
            rat = _GOLDEN * e
        x = xf + (1.0 if rat >= 0 else -1.0) * max(abs(rat), tol1)
        x = min(max(x, lo), hi)
        fu = yield x
        n += 1
        if fu <= fx:
            if x >= xf:
                a = xf
            else:
                b = xf
            fulc, ffulc = nfc, fnfc
            nfc, fnfc = xf, fx
            xf, fx = x, fu
        else:
            if x < xf:
                a = x
            else:
                b = x
            if fu <= fnfc or nfc == xf:
                fulc, ffulc = nfc, fnfc
                nfc, fnfc = x, fu
            elif fu <= ffulc or fulc in (xf, nfc):
                fulc, ffulc = x, fu
        xm = 0.5 * (a + b)
        tol1 = _SQRT_EPS * abs(xf) + xatol / 3.0
        tol2 = 2.0 * tol1
    return xf, fx


# ---------------------------------------------------------------------------------------------
# Channel coordinates (shared with the stability intervals of the judgement)
# ---------------------------------------------------------------------------------------------

def coords(space) -> list[str]:
    """The coordinates a channel moves along: ``log_sigma``, and ``log_area`` / ``beta`` when
    their bounds leave room."""
    out = ["log_sigma"]
    if space.area_bounds[1] > space.area_bounds[0]:
        out.append("log_area")
    if space.beta_bound > 0:
        out.append("beta")
    return out


def coord_setup(space, coord: str) -> tuple:
    """(global low, global high, half width of the local bracket, xatol) of a coordinate."""
    if coord == "log_sigma":
        return (*space.bounds("log_sigma_ref"), math.log(2.0), 0.005)
    if coord == "log_area":
        return (*space.bounds("log_cell_area"), math.log(2.0), 0.005)
    return (-space.beta_bound, space.beta_bound, 0.25 * space.beta_bound, 0.002 * space.beta_bound)


def channel_limits(space, coord: str, params) -> tuple:
    """(C,) low and high limits of a coordinate per channel: the global bounds, narrowed so
    that the grid keeps sampling each kernel (σ_t ≤ a/(4π Δf_c), SearchSpace.grid_cap_s)."""
    glo, ghi = coord_setup(space, coord)[:2]
    sigma, area, _ = params
    lo, hi = np.full(sigma.shape, glo), np.full(sigma.shape, ghi)
    if coord == "log_sigma":
        hi = np.minimum(hi, np.log(space.grid_cap_s(area)))
    elif coord == "log_area":
        lo = np.maximum(lo, np.log(4.0 * math.pi * sigma * space.widths_hz))
    return lo, hi


def coord_values(coord: str, params) -> np.ndarray:
    sigma, area, beta = params
    return {"log_sigma": np.log(sigma), "log_area": np.log(area), "beta": beta}[coord]


def with_coord(coord: str, params, channels, values) -> list:
    """Copy of (sigma, area, beta) with ``coord`` of ``channels`` set to ``values``."""
    out = [a.copy() for a in params]
    k = {"log_sigma": 0, "log_area": 1, "beta": 2}[coord]
    out[k][channels] = np.exp(values) if k < 2 else values
    return out


def one_changed_scores(ctx, stats, channels, trial_stats) -> tuple:
    """``(M, n)`` per-window criterion and negative shares with only channel
    ``channels[i]``'s row replaced by ``trial_stats[:, i]`` (the other rows as in ``stats``)."""
    total = stats.sum(axis=1)
    totals = total[:, None, :] - stats[:, channels, :] + trial_stats
    scores = ctx.criterion.scores_from_totals(totals, stats.shape[1] * ctx.windows.shape[1],
                                              float(np.mean(ctx.space.cell)))
    return scores, shares_from_totals(totals)


def channel_shares(ctx, stats) -> np.ndarray:
    """Mean over windows of each channel's share of the image's absolute mass (of the bursts'
    excess when the criterion scores it: where the bursts are, not the steady sound), (C,)."""
    if ctx.criterion.separable:
        mass = stats[:, :, TOTAL if ctx.criterion.excess else L1]
    else:
        mass = np.abs(np.asarray(stats, dtype=np.float64)).sum(-1)
    total = mass.sum(axis=1, keepdims=True)
    return np.mean(np.where(total > 0, mass / np.where(total > 0, total, 1.0), 0.0), axis=0)


# ---------------------------------------------------------------------------------------------
# The objective
# ---------------------------------------------------------------------------------------------

def penalty(ctx, sigma, area, beta) -> float:
    """Smoothness penalty: weight/(C−2) · Σ over channels of squared second differences of
    log σ_t, log a and β/β_bound (zero on the family when centres are log-spaced)."""
    c = len(sigma)
    if c < 3 or ctx.s["smoothness"] == 0:
        return 0.0
    total = np.sum(np.diff(np.log(sigma), 2) ** 2) + np.sum(np.diff(np.log(area), 2) ** 2)
    if ctx.space.beta_bound > 0:
        total += np.sum(np.diff(beta / ctx.space.beta_bound, 2) ** 2)
    return float(ctx.s["smoothness"] * total / (c - 2))


def objective(ctx, stats, params) -> float:
    """Refinement objective: reduced criterion over the fit windows (+inf above the
    positivity ceiling) plus the penalty."""
    scores, shares = scores_from_stats(stats, ctx.criterion, ctx.windows.shape[1], ctx.space.cell)
    return ctx.ceiling(scores, shares) + penalty(ctx, *params)


def start_params(ctx) -> tuple:
    """Refinement start: the family's best or the best spectrogram, whichever scores better
    on all windows (the family was only scored on the subset); returns (name, per-channel
    arrays, row stats on all windows or None)."""
    fam, base = ctx.state.family, ctx.state.baselines
    candidates = []
    want = ctx.criterion.separable
    if fam.best_x is not None:
        p = ctx.space.family(fam.best_x)
        r = ctx.evaluator("full").score([p], want_stats=want)[0]
        candidates.append(("family", ctx.ceiling(r.scores, r.shares), p, r.stats))
    if ctx.space.spectrogram_in_space() or not candidates:
        p = ctx.space.constant(base.spectrogram_time_spread_s)
        r = ctx.evaluator("full").score([p], want_stats=want)[0]
        candidates.append(("spectrogram", ctx.ceiling(r.scores, r.shares), p, r.stats))
    name, _, p, stats = min(candidates, key=lambda c: c[1])
    if stats is None and want:
        stats = ctx.evaluator("full").stats(p)
    return name, p, stats


# ---------------------------------------------------------------------------------------------
# The stage
# ---------------------------------------------------------------------------------------------

def _new_refine(ctx) -> RefineState:
    s = ctx.s
    start, p, stats = start_params(ctx)
    params = [np.array(a, dtype=np.float64) for a in p[1:]]
    status = "running" if ctx.criterion.separable else \
        "skipped: the Gini index is not separable by channel"
    ref = RefineState(start=start, params=params, stats=stats, status=status)
    if stats is not None:
        value = objective(ctx, stats, params)
        shares = channel_shares(ctx, stats)
        active = [int(c) for c in np.flatnonzero(shares >= s["refine_min_share"] / len(shares))]
        ref.objective, ref.active = value, active
        for c in range(len(shares)):
            ref.records[c] = ChannelRecord(
                channel=c, center_hz=float(ctx.space.centers_hz[c]),
                status="unchanged" if c in active else "skipped: low energy",
                objective_before=value, objective_after=value)
    return ref


def run(ctx) -> None:
    """Stage 2: coordinate sweeps, one coordinate of every channel at a time.

    Each channel's coordinate is minimised by bounded Brent (:func:`bounded_brent`) on the
    objective with only that channel changed. The channels' searches run in lockstep: one
    transform call computes the next trial row of every channel still searching, and each
    trial is scored by replacing only its own row in the cached per-(window, channel) sums.
    The improvements are then applied greedily, best first, each kept only if the whole
    objective (criterion + penalty) still decreases, so every round lowers the objective.
    """
    st, s = ctx.state, ctx.s
    if ctx.spec["name"] == "detection":
        # a corpus-level objective has no per-row statistics to refine by: the family's best
        # is the result
        st.phase = "judge"
        return
    if st.refine is None:
        st.refine = _new_refine(ctx)
    ref = st.refine
    if ref.status != "running":
        st.phase = "judge"
        return
    st.best = ref.objective
    names = coords(ctx.space)
    stop = None
    while ref.sweep < s["refine_sweeps"]:
        while ref.coord < len(names):
            if ctx.cancelled():
                raise Cancelled()
            if ctx.out_of_time():
                stop = "time_limit"
                break
            changed = _round(ctx, names[ref.coord])
            ref.changed_in_sweep += changed
            ref.coord += 1
            st.round += 1
            st.best = ref.objective
            frac = (ref.sweep + ref.coord / len(names)) / s["refine_sweeps"]
            ctx.report("refine", frac, coordinate=names[ref.coord - 1])
        if stop is not None:
            break
        converged = ref.changed_in_sweep == 0
        ref.sweep += 1
        ref.coord = 0
        ref.changed_in_sweep = 0
        if converged:
            ref.status = "converged"
            break
    if stop is not None:
        ref.status = f"stopped: {stop}"
        st.stop_reason = stop
    elif ref.status == "running":
        ref.status = "sweeps done"
    st.phase = "judge"


def _round(ctx, coord: str) -> int:
    """One coordinate for every active channel; returns the number of channels changed."""
    ref, log = ctx.state.refine, ctx.state.log
    params, stats, current = ref.params, ref.stats, ref.objective
    half, tol = coord_setup(ctx.space, coord)[2:]
    glo, ghi = channel_limits(ctx.space, coord, params)
    x0 = coord_values(coord, params)
    gens, pending, best = {}, {}, {}
    for c in ref.active:
        lo, hi = max(glo[c], x0[c] - half), min(ghi[c], x0[c] + half)
        if hi - lo <= tol:
            continue
        gen = bounded_brent(lo, hi, float(x0[c]), current, tol, ctx.s["refine_maxiter"])
        try:
            pending[c] = next(gen)
        except StopIteration:
            continue
        gens[c] = gen
        best[c] = (current, float(x0[c]), None)
    full = ctx.evaluator("full")
    centers = ctx.space.centers_hz
    while pending:
        if ctx.cancelled():
            raise Cancelled()
        chans = np.array(sorted(pending), dtype=np.int64)
        values = np.array([pending[c] for c in chans])
        trial = with_coord(coord, params, chans, values)
        t0 = time.perf_counter()
        rows = full.stats((centers[chans], trial[0][chans], trial[1][chans], trial[2][chans]),
                          chans)
        objs = ctx.ceiling(*one_changed_scores(ctx, stats, chans, rows))
        for i, c in enumerate(chans):   # the penalty with channel c changed alone
            one = with_coord(coord, params, [c], [values[i]])
            objs[i] += penalty(ctx, *one)
        log.add("refine", ctx.state.round,
                {"coordinate": coord, "channels": len(chans),
                 "best_channel": int(chans[int(np.argmin(objs))])},
                float(np.min(objs)), time.perf_counter() - t0)
        for i, c in enumerate(chans):
            c = int(c)
            y = float(objs[i])
            if y < best[c][0]:
                best[c] = (y, float(values[i]), rows[:, i].copy())
            try:
                pending[c] = gens[c].send(y if np.isfinite(y) else 1e300)
            except StopIteration:
                del pending[c]
        if ctx.out_of_time():
            for g in gens.values():
                g.close()
            break
    # Combine the channels' own improvements. Moving every channel to its own optimum at
    # once can overshoot (they share each window's normalisation), so the full step is
    # compared with moving only the even or only the odd improving channels (a red-black
    # split, halving the coupling) and with a greedy sequence of single changes, best first,
    # each kept only if the whole objective still drops. Every option reuses rows already
    # computed, so this costs no transform. The lowest objective wins and the round never
    # raises the objective (parallel coordinate descent with a safeguarded step, cf.
    # Richtárik & Takáč, Math. Program. 156, 2016).
    margin = 1e-12 * max(1.0, abs(current))
    improving = sorted(c for c, b in best.items() if b[2] is not None and b[0] < current - margin)
    if not improving:
        return 0
    options = []
    greedy_stats, greedy_params, greedy_obj, greedy_set = stats.copy(), params, current, []
    for _, c in sorted((best[c][0], c) for c in improving):
        trial_stats = greedy_stats.copy()
        trial_stats[:, c] = best[c][2]
        trial_params = with_coord(coord, greedy_params, [c], [best[c][1]])
        y_all = objective(ctx, trial_stats, trial_params)
        if y_all < greedy_obj - margin:
            greedy_stats, greedy_params, greedy_obj = trial_stats, trial_params, y_all
            greedy_set.append(c)
    options.append((greedy_obj, "greedy", greedy_stats, greedy_params, greedy_set))
    rows = {c: best[c][2] for c in improving}
    for label, subset in (("full step", improving), ("even channels", improving[0::2]),
                          ("odd channels", improving[1::2])):
        if not subset:
            continue
        sub = np.array(subset, dtype=np.int64)
        trial_stats = stats.copy()
        trial_stats[:, sub] = np.stack([rows[c] for c in subset], axis=1)
        trial_params = with_coord(coord, params, sub, np.array([best[c][1] for c in subset]))
        options.append((objective(ctx, trial_stats, trial_params), label, trial_stats,
                        trial_params, subset))
    y_best, how, new_stats, new_params, moved = min(options, key=lambda o: o[0])
    if not y_best < current - margin:
        return 0
    for c in moved:
        rec = ref.records[int(c)]
        if rec.status != "improved":
            rec.objective_before = current
        rec.status = "improved"
        rec.objective_after = y_best
    ref.params, ref.stats, ref.objective = new_params, new_stats, y_best
    ref.steps.append(RefineStep(coordinate=coord, sweep=ref.sweep, step=how,
                                channels=len(moved), objective=y_best))
    return len(moved)
