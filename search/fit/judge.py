"""Stage 3: the judgement on the held-out windows and the diagnostics record.

The result and every baseline are scored per window on the held-out windows only (the fit
windows when ``held_out`` is 0); the gain over the best plain spectrogram gets a paired
bootstrap interval; the fallback to the best spectrogram window on the channel grid is decided
there; negative shares, bounds hit and onset timing are recorded; parameter stability intervals
come from one-step refits of each channel on resamples of the fit windows. :func:`run` returns
the filterbank, the ``diagnostics_`` dict (keys in DEVELOPERS.md) and the objective.
Interval arithmetic: ``search.diagnostics``.
"""
from __future__ import annotations

import math

import numpy as np

from burstlens.search import __version__
from burstlens.search import diagnostics as dg
from burstlens.search import scorecard as sc
from burstlens.search.compare import parse_compare_to
from burstlens.search.criteria import L1, NEGATIVE
from burstlens.search.fit import refine
from burstlens.search.fit.baselines import pseudo_wvd, scalogram
from burstlens.search.fit.evaluate import CHUNK, Scored, make_filterbank, scores_from_stats
from burstlens.search.fit.state import ChannelRecord
from burstlens.search.onset import error_summary_ms, image_onsets
from burstlens.search.safe_io import finite_or_none
from burstlens.search.spectrogram import spectrogram_representation
from burstlens.search.tfd import transform

RESAMPLES = 2000               # the scorecard's paired bootstrap (held-out windows)
GUARD_WINDOWS = 64             # fit windows the pipeline guard measures on
GUARD_RESAMPLES = 200          # its paired bootstrap
DETECTION_TOLERANCE_DB = 0.5   # half the 1 dB step of the injected gains
ONSET_TOLERANCE_SAMPLES = 2.0  # AIC onsets of two images differ by this much on one burst


def _result_params(ctx) -> tuple:
    """(per-channel parameters, origin) of the run's result before the judgement."""
    st, space = ctx.state, ctx.space
    fam, ref, base = st.family, st.refine, st.baselines
    if ref is not None:
        p = (space.centers_hz, *[np.asarray(a) for a in ref.params])
        origin = "refinement" if ref.status in ("converged", "sweeps done") \
            or ref.status.startswith("stopped") else ref.start
    elif fam is not None and fam.best_x is not None:
        p, origin = space.family(fam.best_x), "family"
    else:   # cancelled before the family search had a result
        sigma = None if base.spectrogram is None else base.spectrogram_time_spread_s
        p = space.family(space.point(sigma or math.exp(np.mean(space.bounds("log_sigma_ref")))))
        origin = "spectrogram"
    return p, origin


def run(ctx) -> tuple:
    """Stage 3, then the record: returns ``(filterbank, diagnostics, objective)`` (objective
    None when cancelled). Skips the judgement when the run was cancelled."""
    st, s, space = ctx.state, ctx.s, ctx.space
    fam, ref = st.family, st.refine
    p, origin = _result_params(ctx)
    cancelled = st.stop_reason == "cancelled"
    ctx.report("judge", 0.0)     # a checkpoint: a worker told to stop leaves here, not mid-judge
    d = {"stop_reason": st.stop_reason or "budget",
         "evaluations": st.log.evaluations, "best_so_far": st.log.best_so_far,
         "refinement": refinement_records(ctx)}
    fallback = judgement = None
    result = None
    if cancelled:
        d.update(bootstrap=None, baselines=None, result=None, gain_bits=None, per_window=None)
    else:
        p, origin, fallback, judgement, parts = held_out_judgement(ctx, p, origin)
        result = judgement["result"]["objective"]
        d["result"] = judgement["result"]
        d["baselines"] = parts["baselines"]
        d["gain_bits"] = judgement["gain_bits"]["estimate"]
        d["per_window"] = parts["per_window"]
        d["bootstrap"] = stability(ctx, p, origin)
    d["judgement"] = judgement
    d["fallback"] = fallback
    d["origin"] = origin
    d["spectrogram_in_search_space"] = space.spectrogram_in_space()
    d["family"] = None if fam is None else {
        "stop_reason": fam.stop_reason, "rounds": fam.round,
        "evaluations": st.log.count("family"),
        "best_objective_subset": finite_or_none(fam.best_y),
        "best": space.describe(fam.best_x) if fam.best_x is not None else None,
        "dimensions": list(space.dims), "reference_hz": space.f_ref_hz}
    d["refine"] = None if ref is None else {
        "start": ref.start, "status": ref.status, "sweeps": ref.sweep,
        "objective": finite_or_none(ref.objective),
        "channels_refined": len(ref.active or []),
        "changed_channels": sorted(c for c, r in ref.records.items() if r.status == "improved")}
    d["noise"] = noise_record(ctx)
    d["subset"] = [int(i) for i in ctx.split.fit[np.asarray(st.subset, dtype=np.int64)]]
    d["split"] = ctx.split.to_json()
    rejections = list(getattr(ctx.corpus, "rejections", []) or [])
    d["windows"] = {"used": int(len(ctx.all_windows)), "rejected": len(rejections),
                    "rejected_by_reason": dg.rejected_by_reason(rejections)}
    d["corpus"] = ctx.corpus.to_json() if hasattr(ctx.corpus, "to_json") else None
    settings = dict(s)
    settings["n_jobs"] = settings.pop("jobs")
    d["settings"] = settings
    d["seed"] = s["seed"]
    d["elapsed_s"] = ctx.elapsed() + 0.0
    d["version"] = __version__
    st.phase = "done"
    objective = None if result is None else float(result)
    filterbank = make_filterbank(
        *p, space.fs, steady_lines_hz=ctx.lines.lines_hz, provenance={
            "window_samples": int(ctx.windows.shape[1]),
            "criterion": {k: v for k, v in ctx.spec.items()},
            "objective": finite_or_none(result), "gain_bits": d["gain_bits"],
            "judged_on": None if judgement is None else (
                "the fitted windows (held_out = 0)" if judgement["in_sample"]
                else f"{judgement['held_out_windows']} held-out windows"),
            "corpus_hash": getattr(ctx.corpus, "source_hash", None),
            "settings": settings, "burstlens_version": __version__})
    if ctx.progress_cb:
        ctx.progress_cb({"stage": "judge", "round": st.round,
                         "evaluations": st.log.count("family"),
                         "evaluations_total": st.log.count(), "budget": s["evaluations"],
                         "best_objective": finite_or_none(result if result is not None
                                                          else st.best),
                         "fraction": 1.0})
    return filterbank, d, objective


def noise_record(ctx) -> dict:
    """The site's noise model as the run used it: the steady lines removed from every window
    (search.noise), the noise windows (count, duration, rms level with the lines removed, and
    the reader's record of them) and the floor the criterion scores each burst against."""
    k, n = ctx.noise_windows.shape
    read = (getattr(ctx.corpus, "defaults", None) or {}).get("noise")
    floor = ("each channel's level over time in each window (its time median); the criterion "
             "scores the bursts' excess over it" if ctx.criterion.excess
             else "none: windows scored whole (criterion excess off)")
    # the noise windows' level, lines removed, in the input's units: what a later drift check
    # compares (search.drift)
    rms = float(np.sqrt(np.mean(ctx.noise_windows ** 2))) if k else None
    return {"lines": ctx.lines.to_json(), "noise_windows": int(k),
            "noise_duration_s": float(k * n / ctx.space.fs), "rms": rms, "reader": read,
            "floor": floor}


def held_out_judgement(ctx, p, origin):
    """Score the result and the baselines on the held-out windows (the fit windows when
    ``held_out`` is 0) and decide the fallback there. Returns (parameters, origin, fallback,
    the ``judgement`` record, {"baselines", "per_window"})."""
    s, space, base = ctx.s, ctx.space, ctx.state.baselines
    in_sample = ctx.split.held_out.size == 0
    judged = ctx.split.fit if in_sample else ctx.split.held_out
    ev = ctx.evaluator("full" if in_sample else "held")
    sigma = base.spectrogram_time_spread_s
    on_grid = space.constant(sigma)
    reference = {"spectrogram_on_grid": on_grid,
                 "scalogram": scalogram(space, base.scalogram_time_spread_s),
                 "pseudo_wvd": pseudo_wvd(space, ctx.windows.shape[1])}
    scored = ev.score([p, *reference.values()], want_stats=True)
    r, refs = scored[0], dict(zip(reference, scored[1:], strict=True))
    refs["spectrogram"] = ev.spectrogram(sigma, s["band_hz"])
    ctx.report("judge", 0.5, save=False)

    def draws():   # the same draws for every quantity, so intervals are paired
        return np.random.default_rng(np.random.SeedSequence([s["seed"], 5]))

    fallback = None
    mine, grid_spec = (ctx.ceiling(x.scores, x.shares) for x in (r, refs["spectrogram_on_grid"]))
    by_sharpness = ctx.spec["name"] != "detection"   # the detection criterion is its own judge
    if space.spectrogram_in_space() and by_sharpness and not mine <= grid_spec:
        where = "the fitted windows" if in_sample else "the held-out windows"
        fallback = {"to": "spectrogram", "from": origin,
                    "objective_before": finite_or_none(mine),
                    "gain_before": dg.paired_gain(r.scores, refs["spectrogram"].scores,
                                                  draws(), ctx.how),
                    "reason": f"the searched filterbank scored worse than the best "
                              f"spectrogram window on the channel grid on {where}"}
    elif space.spectrogram_in_space() and by_sharpness and s["guard"] and origin != "spectrogram":
        fallback = pipeline_guard(ctx, p, sigma, origin)
    if fallback is not None:
        p, r, origin = on_grid, refs["spectrogram_on_grid"], "spectrogram"
    gain = dg.paired_gain(r.scores, refs["spectrogram"].scores, draws(), ctx.how)
    # per baseline: its parameters, and how it was fitted (None: not fitted, only judged)
    described = {
        "spectrogram": (dict(base.spectrogram.parameters), base.spectrogram),
        "spectrogram_on_grid": (
            {"time_spread_s": sigma, "cell_area": 1.0, "chirp_hz_per_s": 0.0,
             "capped_channels": int(np.sum(on_grid[1] < sigma)),
             "note": "the best spectrogram window on the channel grid, shortened where the "
                     "grid cannot sample it; the fallback"}, None),
        "scalogram": (dict(base.scalogram.parameters), base.scalogram),
        "pseudo_wvd": (
            {"time_spread_s": float(reference["pseudo_wvd"][1][0]),
             "cell_area": float(reference["pseudo_wvd"][2][0]),
             "note": "kernel limit: quarter-sample time spread, lag window 1000x the "
                     "window; far narrower than the channel spacing"}, None)}
    baselines = {}
    for name, (parameters, fitted) in described.items():
        baselines[name] = {
            **dg.interval_on(refs[name].scores, draws(), ctx.how),
            "parameters": parameters,
            "evaluations": fitted.evaluations if fitted is not None else 1,
            "objective_fit": finite_or_none(fitted.objective) if fitted is not None else None,
            "negative_share": finite_or_none(np.mean(refs[name].shares))}
    result = dg.interval_on(r.scores, draws(), ctx.how)
    judgement = {
        "in_sample": in_sample, "held_out_share": s["held_out"],
        "held_out_windows": int(ctx.split.held_out.size),
        "fit_windows": int(ctx.split.fit.size), "guard_windows": int(ctx.split.guard.size),
        "grouping": ctx.split.grouping,
        "gain_bits": gain, "result": result,
        "spectrogram": {k: baselines["spectrogram"][k] for k in ("objective", "low", "high")},
        "negative_share": negative_shares(ctx, r),
        **bounds_hit(ctx, p, float(np.mean(r.shares))),
        "onset": onset_timing(ctx, judged, p, space.centers_hz, sigma),
        "scorecard": scorecard(ctx, ctx.all_windows[judged], p, sigma, resamples=RESAMPLES)}
    per_window = {"result": [finite_or_none(v) for v in r.scores],
                  "spectrogram": [finite_or_none(v) for v in refs["spectrogram"].scores],
                  "windows": [int(i) for i in judged]}
    return p, origin, fallback, judgement, {"baselines": baselines, "per_window": per_window}


def representations(ctx, p, sigma: float, envelope: bool = True) -> dict:
    """The scorecard's representations (``search.representation``): the result (filterbank of
    ``p``, on the windows the lines already left), the best plain spectrogram (time spread
    ``sigma`` on its own FFT grid, as the gain is measured), the user's own spectrogram
    (``compare_to``) and the raw envelope."""
    s, fs = ctx.s, ctx.space.fs
    out = {"result": sc.filterbank_representation("result", make_filterbank(*p, fs), s["eps"]),
           "spectrogram": spectrogram_representation(sigma, fs, s["band_hz"],
                                                     ctx.all_windows.shape[1], s["eps"])}
    if s.get("compare_to"):
        out["yours"] = parse_compare_to(s["compare_to"]).representation(fs, s["band_hz"])
    if envelope:
        out["envelope"] = sc.envelope_representation(fs)
    return out


def scorecard(ctx, bursts, p, sigma: float, *, resamples: int, envelope: bool = True) -> dict:
    """``search.scorecard.scorecard`` of the result, the best plain spectrogram, the user's own
    and the raw envelope on ``bursts`` (M, N) and the corpus's noise windows."""
    return sc.scorecard(representations(ctx, p, sigma, envelope), bursts, ctx.noise_windows, ctx.space.fs,
                ctx.criterion, resamples=resamples, seed=ctx.s["seed"])


def pipeline_guard(ctx, p, sigma: float, origin: str) -> dict | None:
    """The fallback that keeps a sharpness fit from making the pipeline worse: on (up to
    ``GUARD_WINDOWS`` of) the fit windows, the result's detection threshold and median onset
    error are compared with the best plain spectrogram's (``search.scorecard``, paired bootstrap
    of ``GUARD_RESAMPLES``); the result is not kept when one of them is worse beyond the
    measurements' resolution (``DETECTION_TOLERANCE_DB``, ``ONSET_TOLERANCE_SAMPLES``) and its
    whole interval lies on the worse side of zero. Returns the fallback record, or None when
    the result passes."""
    fit = ctx.windows[:GUARD_WINDOWS]
    card = scorecard(ctx, fit, p, sigma, resamples=GUARD_RESAMPLES, envelope=False)
    rows = card["rows"]

    def worse(row: str, tolerance: float) -> float | None:
        entry = (rows.get(row) or {}).get("result") or {}
        estimate, high = entry.get("estimate"), entry.get("high")
        surely = high is None or high < 0   # one window gives no interval: take the estimate
        return -estimate if estimate is not None and estimate < -tolerance and surely else None

    reasons = []
    db = worse("detection_db", DETECTION_TOLERANCE_DB)
    if db is not None:
        reasons.append(f"it needs bursts {db:.1f} dB stronger than the best plain spectrogram "
                       "does to find them")
    ms = worse("onset_ms", 1e3 * ONSET_TOLERANCE_SAMPLES / ctx.space.fs)
    if ms is not None:
        reasons.append(f"its onsets lie {ms:.1f} ms further from the waveform's than the best "
                       "plain spectrogram's")
    if not reasons:
        return None
    return {"to": "spectrogram", "from": origin, "fit_windows_checked": int(len(fit)),
            "scorecard_on_fit_windows": card,
            "reason": "on the fitted windows " + " and ".join(reasons)
                      + ": a sharper image that serves detection or picking worse is not kept"}


def negative_shares(ctx, r: Scored) -> dict:
    """Negative share of the judged images: the mean over windows (what the ceiling bounds)
    and per channel (pooled over windows, in window order). ``r.stats``: row stats, or for a
    non-separable criterion the rows' (negative, absolute) masses (evaluate.row_masses)."""
    x = np.asarray(r.stats, dtype=np.float64)
    if ctx.criterion.separable:
        neg, l1 = x[:, :, NEGATIVE].sum(axis=0), x[:, :, L1].sum(axis=0)
    else:
        neg, l1 = x[:, :, 0].sum(axis=0), x[:, :, 1].sum(axis=0)
    per_channel = np.where(l1 > 0, neg / np.where(l1 > 0, l1, 1.0), 0.0)
    return {"overall": finite_or_none(np.mean(r.shares)),
            "per_channel": [float(v) for v in per_channel],
            "max_allowed": ctx.s["max_negative_share"]}


def bounds_hit(ctx, p, negative_share: float) -> dict:
    """Which settings' bounds the result's parameters sit on (relative tolerance 1e-6):
    ``bounds_hit`` the setting names, ``bounds_detail`` the bound, value and channels. The
    positivity ceiling counts as hit when the judged negative share is within 10 % of it
    (the search then stopped there, not at an optimum of the criterion)."""
    space = ctx.space
    _, sigma, area, beta = (np.asarray(a, dtype=np.float64) for a in p)
    cap = space.grid_cap_s(area)
    checks = [("time_spread_s", "lower", space.sigma_bounds_s[0], sigma, sigma < cap),
              ("time_spread_s", "upper", space.sigma_bounds_s[1], sigma, sigma < cap),
              ("channels", "grid spacing caps time_spread_s", None, sigma, None)]
    if space.area_bounds[1] > space.area_bounds[0]:
        checks += [("cell_area", "lower", space.area_bounds[0], area, None),
                   ("cell_area", "upper", space.area_bounds[1], area, None)]
    if space.beta_bound > 0:
        checks += [("chirp_hz_per_s", "lower", -space.beta_bound, beta, None),
                   ("chirp_hz_per_s", "upper", space.beta_bound, beta, None)]
    detail = []
    for setting, bound, value, values, where in checks:
        target = cap if value is None else np.full(values.shape, value)
        on = np.isclose(values, target, rtol=1e-6, atol=0.0)
        if where is not None:    # a kernel held by the grid cap is reported as such
            on &= where
        if np.any(on):
            detail.append({"setting": setting, "bound": bound,
                           "value": None if value is None else float(value),
                           "channels": [int(c) for c in np.flatnonzero(on)]})
    ceiling = ctx.s["max_negative_share"]
    if ceiling < 1 and negative_share >= 0.9 * ceiling:
        detail.append({"setting": "max_negative_share", "bound": "upper", "value": ceiling,
                       "channels": []})
    return {"bounds_hit": sorted({e["setting"] for e in detail}), "bounds_detail": detail}


def onset_timing(ctx, judged, p, centers, sigma) -> dict | None:
    """AIC onsets of the channel-summed image energy against the trigger onsets of the
    judged burst windows (search.onset), for the result and the best plain spectrogram
    (window std ``sigma`` on the channel ``centers``; the channel sum is its band energy
    envelope, whatever the grid samples)."""
    meta = getattr(ctx.corpus, "window_meta", None) or []
    offsets = [meta[i].get("trigger_offset_s") if i < len(meta) and isinstance(meta[i], dict)
               else None for i in judged]
    keep = np.array([i for i, o in zip(judged, offsets, strict=True) if o is not None],
                    dtype=np.int64)
    if keep.size == 0:
        return None
    trigger = np.array([o for o in offsets if o is not None], dtype=np.float64)
    out = {}
    plain = (centers, np.full(centers.shape, sigma), np.ones(centers.shape),
             np.zeros(centers.shape))
    for name, params in (("result", p), ("spectrogram", plain)):
        fb = make_filterbank(*params, ctx.space.fs)
        onsets = np.concatenate([image_onsets(transform(ctx.all_windows[keep[k:k + CHUNK]],
                                                        fb, eps=ctx.s["eps"]), ctx.space.fs)
                                 for k in range(0, keep.size, CHUNK)])
        out[name] = error_summary_ms(onsets, trigger)
    return out


def refinement_records(ctx) -> list:
    """Per channel: the refinement's record, or why it has none."""
    ref = ctx.state.refine
    f = ctx.space.centers_hz
    out = []
    for c in range(len(f)):
        rec = None if ref is None else ref.records.get(c)
        if rec is None:
            status = ("disabled" if not ctx.s["refine"] else
                      ref.status if ref is not None else "not reached")
            rec = ChannelRecord(c, float(f[c]), status, None, None)
        out.append({"channel": rec.channel, "center_hz": rec.center_hz, "status": rec.status,
                    "objective_before": finite_or_none(rec.objective_before),
                    "objective_after": finite_or_none(rec.objective_after)})
    return out


# ---------------------------------------------------------------------------------------------
# Parameter stability
# ---------------------------------------------------------------------------------------------

def stability(ctx, p, origin) -> dict:
    """Parameter stability intervals: one-step refits of each channel's parameters on
    resamples of the fit windows (``bootstrap`` resamples; no refit of the whole search)."""
    s = ctx.s
    boot_rng = np.random.default_rng(np.random.SeedSequence([s["seed"], 2]))
    indices = dg.bootstrap_indices(len(ctx.windows), s["bootstrap"], boot_rng)
    channels = None
    if len(indices) and ctx.criterion.separable:
        ref = ctx.state.refine
        stats = ref.stats if origin == "refinement" and ref is not None and ref.stats is not None \
            else ctx.evaluator("full").stats(p)
        channels = channel_intervals(ctx, p, stats, indices)
    return {"resamples": int(s["bootstrap"]),
            "purpose": "parameter stability intervals (refits on resamples of the fit windows)",
            "level": dg.INTERVAL_LEVEL,
            "method": "channel intervals by a one-step parabolic refit of each parameter on "
                      "each resample, the other channels held at their fitted values, hulled "
                      "with the estimate (at_optimum false: all refits on one side of it)",
            "channels": channels}


def channel_intervals(ctx, p, stats, indices) -> list | None:
    """Per-channel bootstrap intervals by one-step refits (search.diagnostics.one_step_refits).

    For each coordinate, two transform calls give every determined channel's row at −h and
    +h (h = 0.1 in log σ_t and log a, 2 % of the chirp bound in β); the per-window criterion
    with only that row changed feeds the parabola of each resample. Channels with too little
    energy to be determined (below ``refine_min_share``) get the whole parameter range.
    Ignores the smoothness penalty and the coupling between channels (an approximation).
    Each interval is the hull of the estimate and the central ``INTERVAL_LEVEL`` share of
    the refits (clipped to the parameter bounds); ``at_optimum`` is False when the refits
    of some parameter all lie on one side of the estimate.
    """
    if stats is None or not ctx.criterion.separable:
        return None
    space, full = ctx.space, ctx.evaluator("full")
    params = [np.asarray(a, dtype=np.float64) for a in p[1:]]
    n_ch = len(space.centers_hz)
    zero = scores_from_stats(stats, ctx.criterion, ctx.windows.shape[1], space.cell)[0]
    shares = refine.channel_shares(ctx, stats)
    active = np.flatnonzero(shares >= ctx.s["refine_min_share"] / n_ch)
    keys = {"log_sigma": "time_spread_s", "log_area": "cell_area", "beta": "chirp_hz_per_s"}
    full_range = {"time_spread_s": list(space.sigma_bounds_s), "cell_area": list(space.area_bounds),
                  "chirp_hz_per_s": [-space.beta_bound, space.beta_bound]}
    coords = refine.coords(space)
    out = []
    for c in range(n_ch):
        entry = {key: [float(params[k][c])] * 2 for k, key in enumerate(keys.values())}
        if c in active:
            entry["method"] = "one-step refit"
        else:
            entry.update({k: list(v) for k, v in full_range.items() if k in
                          [keys[x] for x in coords]})
            entry["method"] = "not determined: low energy"
        out.append(entry)
    if active.size == 0:
        return out
    for coord in coords:
        h = 0.02 * space.beta_bound if coord == "beta" else 0.1
        x0 = refine.coord_values(coord, params)[active]
        sides = []
        for d in (-h, h):
            trial = refine.with_coord(coord, params, active, x0 + d)
            rows = full.stats((space.centers_hz[active], trial[0][active], trial[1][active],
                               trial[2][active]), active)
            sides.append(refine.one_changed_scores(ctx, stats, active, rows)[0])
        glo, ghi = (v[active] for v in refine.channel_limits(space, coord, params))
        for i, c in enumerate(active):
            steps = dg.one_step_refits(sides[0][:, i], zero, sides[1][:, i], h, 2 * h,
                                       indices, ctx.how)
            lo, hi = dg.percentile_interval(np.clip(x0[i] + steps, glo[i], max(glo[i], ghi[i])))
            # every resample moving the parameter the same way means the estimate is not a
            # local optimum of the data (pressed against a bound, or not converged)
            out[c].setdefault("at_optimum", True)
            out[c]["at_optimum"] &= bool(lo <= x0[i] <= hi)
            lo, hi = min(lo, x0[i]), max(hi, x0[i])
            if coord != "beta":
                lo, hi = math.exp(lo), math.exp(hi)
            out[c][keys[coord]] = [float(lo), float(hi)]
    return out
