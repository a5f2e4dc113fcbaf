"""Stage 1: the family search over σ_t(f) = σ_ref·(f/f_ref)^q, a(f) = a0, β(f) = β0.

scikit-optimize's ``Optimizer`` (ask/tell, a Gaussian process with a Matérn kernel, a batch of
points per round, a maximin Latin-hypercube initial design, expected improvement maximised over
random candidates) in the coordinates (log σ_ref, q ∈ [−1, 0.5], log a0, β0) of
:class:`~search.fit.space.SearchSpace` (the a0 dimension is dropped when the cell-area bounds
are equal and β0 when chirps are off). The first two points are the fitted spectrogram and
scalogram. Each point is scored on the fixed seeded subset of the fit windows (by the
criterion, or for the detection criterion by its threshold: ``search.fit.detect``). Stops on the
evaluation budget, the time limit, a stall (no relative improvement above ``stall_tol`` over
``stall_rounds`` rounds after the initial design) or a cancel. The optimizer lives in the
state, so a checkpoint resumes it exactly.
"""
from __future__ import annotations


import numpy as np
from threadpoolctl import threadpool_limits

from burstlens.search.fit import detect
from burstlens.search.fit.context import Cancelled
from burstlens.search.fit.state import FamilyState


def _new_family(ctx) -> FamilyState:
    # scikit-optimize (and scikit-learn under it) loads only when a family search starts
    from skopt import Optimizer
    from skopt.sampler import Lhs
    from skopt.utils import cook_estimator

    s, space = ctx.s, ctx.space
    seed_int = int(np.random.SeedSequence([s["seed"], 3]).generate_state(1)[0] % (2**31 - 1))
    dims = space.skopt_dimensions()
    # GP with a Matérn kernel (skopt's default for "GP"), hyper-parameters fitted once per tell;
    # a maximin Latin hypercube for the initial design; expected improvement maximised over
    # random candidates (cheap and deterministic for a given seed).
    gp = cook_estimator("GP", space=dims, random_state=seed_int, n_restarts_optimizer=0)
    opt = Optimizer(dims, base_estimator=gp, n_initial_points=s["initial_points"],
                    initial_point_generator=Lhs(criterion="maximin", iterations=100),
                    acq_func="EI", acq_optimizer="sampling",
                    acq_optimizer_kwargs={"n_points": 2000}, random_state=seed_int)
    base = ctx.state.baselines
    seeds = [space.point(base.spectrogram_time_spread_s, 0.0, 1.0, 0.0),
             space.point(base.scalogram_time_spread_s, -1.0, 1.0, 0.0)]
    return FamilyState(optimizer=opt, pending_seeds=seeds[:s["evaluations"]])


def run(ctx) -> None:
    """Rounds of ask / score on the subset / tell until a stop rule fires; the record goes to
    ``ctx.state.family``, the next phase is ``refine`` (or ``judge`` when refinement is off
    or time ran out)."""
    st, s, space = ctx.state, ctx.s, ctx.space
    log = st.log
    if st.family is None:
        st.family = _new_family(ctx)
    fam = st.family
    opt = fam.optimizer
    sub = ctx.evaluator("subset")
    while True:
        done = log.count("family")
        if ctx.cancelled():
            raise Cancelled()
        if done >= s["evaluations"]:
            fam.stop_reason = "budget"
            break
        if ctx.out_of_time():
            fam.stop_reason = "time_limit"
            break
        if fam.stall >= s["stall_rounds"]:
            fam.stop_reason = "stall"
            break
        n = min(s["batch"], s["evaluations"] - done)
        if fam.pending_seeds:
            xs = fam.pending_seeds[:n]
            fam.pending_seeds = fam.pending_seeds[n:]
        else:
            # one BLAS thread: the GP's matrices are tiny, and threads only contend
            with threadpool_limits(1):
                xs = opt.ask(n_points=n) if n > 1 else [opt.ask()]
        xs = [[float(v) for v in x] for x in xs]
        params = [space.family(x) for x in xs]
        results = sub.score(params)
        ys = detect.objectives(ctx, params, results) if detect.applies(ctx) \
            else [ctx.ceiling(r.scores, r.shares) for r in results]
        for x, y, r in zip(xs, ys, results, strict=True):
            log.add("family", fam.round, space.describe(x), y, r.seconds)
        worst = max([y for y in (e["objective"] for e in log.evaluations if e["stage"] == "family")
                     if y is not None] or [0.0])
        with threadpool_limits(1):
            opt.tell(xs, [y if np.isfinite(y) else worst + 1.0 for y in ys])
        previous = fam.best_y
        for x, y in zip(xs, ys, strict=True):
            if y < fam.best_y:
                fam.best_x, fam.best_y = x, y
        st.best = fam.best_y
        fam.round_best.append(fam.best_y)
        after_design = log.count("family") > s["initial_points"]
        if after_design and np.isfinite(previous):
            gain = (previous - fam.best_y) / max(abs(previous), 1e-12)
            fam.stall = fam.stall + 1 if gain <= s["stall_tol"] else 0
        fam.round += 1
        st.round += 1
        ctx.report("family", log.count("family") / s["evaluations"])
    st.stop_reason = fam.stop_reason
    st.phase = "refine" if (s["refine"] and fam.stop_reason != "time_limit") else "judge"
    if st.phase == "judge":
        st.refine = None
