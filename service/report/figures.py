"""The report's PNG figures with their alt text and captions, built from the two documents.

``build_plots(filterbank_json, diagnostics, windows, sampling_rate_hz)`` returns every plot in
page order as a ``Plot``; one the documents cannot support carries ``png=None`` and a note saying
why. ``report_plots(...)`` gives the same PNG bytes by name for the service's PNG routes. The
drawing itself is ``service.plots``; this module picks the data and says in words what is drawn.
"""
from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass

import numpy as np

from burstlens.service.report.wording import utc_text

from burstlens.search.safe_io import finite_or_none
from burstlens.service import plots, verdict
from burstlens.service.report.inputs import channel_column, channel_rows, check_windows, criterion_of

PLOT_NAMES = ("tiling", "examples", "convergence", "channels", "baselines")
SQRT2 = math.sqrt(2.0)  # window std s = √2·σ_t (service.report.terms)
# What the reader knows of the waveforms' units: it keeps samples as recorded (counts for
# integer miniSEED and SAC), and no instrument response is removed.
AMPLITUDE_LABEL = "amplitude (as recorded)"
AMPLITUDE_NOTE = ("Waveform amplitudes are as the files store them: counts for integer miniSEED "
                  "and SAC data; no instrument response was removed.")
EXAMPLE_ROWS = 3

BASELINE_NAMES = {
    "spectrogram": "best plain spectrogram (own FFT grid)",
    "spectrogram_on_grid": "best spectrogram window on the channel grid",
    "scalogram": "best constant-Q scalogram",
    "pseudo_wvd": "pseudo-Wigner–Ville",
}


@dataclass(frozen=True)
class Plot:
    """One report plot: its route name, PNG bytes (None when omitted), alt text and caption."""

    name: str
    png: bytes | None
    alt: str
    caption: str


def objective_label(criterion: Mapping) -> str:
    """Axis label for the corpus objective of a criterion (docs/design.md §4)."""
    name = str(criterion.get("name", "renyi"))
    if name == "renyi":
        alpha = criterion.get("alpha", 3.0)
        return f"Rényi entropy H$_{{{float(alpha):g}}}$ (bits on the grid)"
    if name == "concentration":
        return "concentration objective (lower is sharper)"
    if name == "sparsity":
        return "negative sparsity (lower is sharper)"
    return f"{plots.literal(name)} objective (lower is sharper)"


def _tiling(channels: list[dict]) -> Plot:
    fc, st = channel_column(channels, "center_hz"), channel_column(channels, "time_spread_s")
    area, beta = channel_column(channels, "cell_area"), channel_column(channels, "chirp_hz_per_s")
    png = plots.figure_png(plots.tiling_figure(fc, st, area, beta))
    alt = (f"Tiling of the time–frequency plane: {len(channels)} ellipses, one per channel, "
           f"centred at 0 ms and at each centre frequency from {fc.min():.4g} to {fc.max():.4g} Hz; "
           f"Gaussian window std {1e3 * SQRT2 * st.min():.3g} to {1e3 * SQRT2 * st.max():.3g} ms, "
           f"cell area "
           f"{area.min():.3g} to {area.max():.3g}, chirp rate {beta.min():.4g} to {beta.max():.4g} "
           f"Hz/s; a dashed Heisenberg cell (a = 1) for reference.")
    caption = ("Each ellipse is the 1-σ contour of one channel's Gaussian kernel on the "
               "time–frequency plane, sheared by its chirp rate and coloured by its cell area; its "
               "half-width in time is the kernel's time spread σ_t = s/√2 (s the window std of the "
               "channel table). The dashed ellipse is the Heisenberg cell (cell area 1) of the "
               "median channel's window.")
    return Plot("tiling", png, alt, caption)


def example_indices(per_window: Mapping, available: int) -> list[tuple[str, int, float]]:
    """(label, window index, gain in bits) for the sharpest gain, the median and the worst window.

    Gain per window = spectrogram score − result score (both lower-is-sharper), from
    ``diagnostics['per_window']``: scores of the judged (held-out) windows, whose corpus indices
    are ``per_window['windows']`` (absent in older files: the scores are in corpus order). Only
    corpus windows below ``available`` are candidates (a caller may hand over the leading part
    of a large corpus); windows whose scores are not finite are left out; duplicates are dropped.
    """
    result = np.asarray(per_window.get("result") or [], dtype=float)
    spectrogram = np.asarray(per_window.get("spectrogram") or [], dtype=float)
    if result.size != spectrogram.size:
        raise ValueError(f"diagnostics['per_window']: result has {result.size} scores but "
                         f"spectrogram {spectrogram.size}")
    where = per_window.get("windows")
    where = np.arange(result.size) if where is None else np.asarray(where, dtype=np.int64)
    if where.size != result.size:
        raise ValueError(f"diagnostics['per_window']: {where.size} window indices for "
                         f"{result.size} scores")
    gain = np.where(where < available, spectrogram - result, np.nan)
    valid = np.flatnonzero(np.isfinite(gain))
    if valid.size == 0:
        raise ValueError("diagnostics['per_window']: no window has finite scores")
    order = valid[np.argsort(gain[valid], kind="stable")]
    picks = [("sharpest gain", int(order[-1])), ("median gain", int(order[(order.size - 1) // 2])),
             ("smallest gain", int(order[0]))]
    chosen, seen = [], set()
    for label, index in picks:
        if index not in seen:
            seen.add(index)
            chosen.append((label, int(where[index]), float(gain[index])))
    return chosen[:EXAMPLE_ROWS]


def _spectrogram_spread(diagnostics: Mapping) -> float:
    parameters = ((diagnostics.get("baselines") or {}).get("spectrogram") or {}).get("parameters")
    recorded = parameters.get("time_spread_s") if isinstance(parameters, Mapping) else None
    spread = finite_or_none(recorded)
    if spread is None or spread <= 0:
        raise ValueError("diagnostics['baselines']['spectrogram']['parameters']['time_spread_s']: "
                         f"expected a positive number, got {recorded!r}")
    return spread


def window_place(meta: Mapping, index: int) -> str:
    """Where a window lies, for a title: its SEED id and start in UTC ("XX.S01..HHZ from
    2026-03-17 02:00:12.265 UTC"), or its offset in the trace when the start time is not
    recorded; never a file path."""
    trace = str(meta.get("trace_id") or "").strip()
    start = meta.get("start")
    offset = finite_or_none(meta.get("offset_s"))
    if isinstance(start, str) and start.strip():
        when = f"from {utc_text(start)}"
    elif offset is not None:
        when = f"{offset:.3f} s into the trace"
    else:
        when = f"window {index}"
    return f"{trace} {when}" if trace else when


def _examples(filterbank_json: Mapping, diagnostics: Mapping, windows, fs: float | None) -> Plot:
    omitted = "Example bursts are not shown: "
    if windows is None:
        note = omitted + "the report was made without the corpus windows."
        return Plot("examples", None, note, note)
    from burstlens.search import Filterbank, transform  # heavy: only when examples are drawn

    windows = np.asarray(windows, dtype=float)
    filterbank = Filterbank.from_json(filterbank_json)
    fs = filterbank.sampling_rate_hz
    try:  # the diagnostics may lack what the examples need (e.g. a cancelled run)
        picks = example_indices(diagnostics.get("per_window") or {}, windows.shape[0])
        spread = _spectrogram_spread(diagnostics)
    except ValueError as exc:
        note = omitted + str(exc)
        return Plot("examples", None, note, note)
    chosen = windows[[index for _, index, _ in picks]]
    # the site's steady lines leave both panels, as they left every window the search scored
    baseline = Filterbank(Filterbank.constant_window(filterbank.center_hz, spread, fs).channels,
                          fs, steady_lines_hz=filterbank.steady_lines_hz)
    spectrograms = transform(chosen, baseline)
    learned = transform(chosen, filterbank)
    meta = (diagnostics.get("corpus") or {}).get("window_meta")
    labels, triggers = [], []
    for label, index, gain in picks:
        entry = meta[index] if isinstance(meta, list) and index < len(meta) \
            and isinstance(meta[index], Mapping) else {}
        labels.append(f"{label} ({gain:+.2f} bits): " + window_place(entry, index))
        triggers.append(finite_or_none(entry.get("trigger_offset_s")))
    times = np.arange(windows.shape[1]) / fs
    window_std = f"window std {1e3 * SQRT2 * spread:.3g} ms"
    figure = plots.example_figure(times, chosen, spectrograms, learned, filterbank.center_hz, labels,
                                  spectrogram_label=f"best spectrogram ({window_std})",
                                  trigger_s=triggers, amplitude_label=AMPLITUDE_LABEL)
    alt = ("Example windows, one row each (" + "; ".join(labels) + "). Columns: the waveform "
           "against time in ms with its trigger onset dashed where known; the best plain "
           f"spectrogram (Gaussian window, {window_std}); the learned filterbank output. Both "
           "images share the time and frequency axes and one 30 dB colour range, each with its "
           "own colour bar.")
    caption = (" ".join(f"Row {k}, {text}." for k, text in enumerate(labels, start=1))
               + " Rows: the window where the learned filterbank gains most over the best "
               "spectrogram, the median window and the window where it gains least. Images are "
               "normalised to unit sum and drawn in dB re. the row's peak; the dashed line on the "
               "waveform is the STA/LTA trigger. " + AMPLITUDE_NOTE)
    return Plot("examples", plots.figure_png(figure), alt, caption)


def _convergence(diagnostics: Mapping, label: str) -> Plot:
    evaluations = diagnostics.get("evaluations") or []
    best = diagnostics.get("best_so_far") or []
    stop = str(diagnostics.get("stop_reason", "not recorded"))
    if not evaluations:
        note = "Convergence is not shown: the diagnostics record no evaluations."
        return Plot("convergence", None, note, note)
    figure = plots.convergence_figure(evaluations, best, stop, objective_label=label)
    stages = list(dict.fromkeys(str(e["stage"]) for e in evaluations))
    finite = [v for v in (finite_or_none(e.get("objective")) for e in evaluations) if v is not None]
    best_text = f"; best objective {min(finite):.4g}" if finite else ""
    alt = (f"Convergence: objective of each of {len(evaluations)} evaluations in order, stages "
           f"{', '.join(stages)}, with the best so far per stage as a step line{best_text}; the "
           f"search stopped by {stop}.")
    caption = ("Markers: every candidate scored; lines: best so far within each stage. Stages "
               "score different window sets (the family search uses a fixed subset), so levels "
               "are compared within a stage, not across stages.")
    return Plot("convergence", plots.figure_png(figure), alt, caption)


def _or_nan(value) -> float:
    number = finite_or_none(value)
    return math.nan if number is None else number


def _bootstrap_bands(diagnostics: Mapping, count: int) -> dict[str, np.ndarray]:
    """(C, 2) [low, high] per field from ``diagnostics['bootstrap']['channels']``; channels without
    an interval (None, e.g. skipped for low energy) are NaN rows, drawn as gaps."""
    per_channel = (diagnostics.get("bootstrap") or {}).get("channels")
    if not isinstance(per_channel, list) or len(per_channel) != count:
        return {}
    bands = {}
    for field in ("time_spread_s", "cell_area", "chirp_hz_per_s"):
        rows = []
        for entry in per_channel:
            pair = entry.get(field) if isinstance(entry, Mapping) else None
            if isinstance(pair, (list, tuple)) and len(pair) == 2:
                rows.append([_or_nan(pair[0]), _or_nan(pair[1])])
            else:
                rows.append([math.nan, math.nan])
        band = np.array(rows, dtype=float)
        if np.isfinite(band).all(axis=1).any():
            bands[field] = band
    return bands


def _channels(channels: list[dict], diagnostics: Mapping) -> Plot:
    bands = _bootstrap_bands(diagnostics, len(channels))
    fc = channel_column(channels, "center_hz")
    figure = plots.channel_parameters_figure(fc, channel_column(channels, "time_spread_s"),
                                             channel_column(channels, "cell_area"),
                                             channel_column(channels, "chirp_hz_per_s"), bands)
    resamples = (diagnostics.get("bootstrap") or {}).get("resamples")
    band_text = (f"shaded stability intervals (refits on {resamples} resamples of the fit "
                 f"windows) for {', '.join(sorted(bands))}" if bands
                 else "no stability intervals recorded")
    alt = (f"Per-channel parameters against centre frequency ({fc.min():.4g} to {fc.max():.4g} Hz)"
           f" in three panels: Gaussian window std in ms, cell area (dashed line at 1), chirp rate"
           f" in Hz/s;"
           f" {band_text}.")
    caption = ("Fitted value per channel (line) and its stability interval from refits on "
               "resampled windows (band and bars).")
    skipped = [i for i, e in enumerate((diagnostics.get("bootstrap") or {}).get("channels") or [])
               if isinstance(e, Mapping) and str(e.get("method", "")).startswith("skipped")]
    if skipped:
        caption += (f" {len(skipped)} of {len(channels)} channels carry too little of the image "
                    "energy for an interval and show none.")
    return Plot("channels", plots.figure_png(figure), alt, caption)


# The one parameter that names each baseline in the plot (others stay in the diagnostics).
BASELINE_PARAMETER = {"spectrogram": "time_spread_s", "scalogram": "cycles"}


def _parameter_text(name: str, parameters) -> str:
    key = BASELINE_PARAMETER.get(name)
    value = finite_or_none(parameters.get(key)) if isinstance(parameters, Mapping) and key else None
    if value is None:
        return ""
    if key == "time_spread_s":
        return f"window std {1e3 * SQRT2 * value:.3g} ms"
    return f"{value:.3g} cycles"


def negative_ceiling(diagnostics: Mapping) -> float | None:
    """The negative share a representation may have (``max_negative_share``, the positivity
    ceiling of docs/design.md §4.3): the judgement's record, else the run's settings."""
    judged = verdict.judgement(diagnostics) or {}
    share = judged.get("negative_share") if isinstance(judged.get("negative_share"), Mapping) else {}
    recorded = finite_or_none(share.get("max_allowed"))
    if recorded is not None:
        return recorded
    return finite_or_none((diagnostics.get("settings") or {}).get("max_negative_share"))


def exclusion(baseline: Mapping, ceiling: float | None) -> str | None:
    """Why a baseline was not eligible as a result, or None: its negative share of the image's
    absolute mass above the positivity ceiling (docs/design.md §4.3)."""
    share = finite_or_none(baseline.get("negative_share"))
    if share is None or ceiling is None or share <= ceiling:
        return None
    return f"{100 * share:.0f} % of its mass is negative (at most {100 * ceiling:g} % allowed)"


def baseline_entries(diagnostics: Mapping) -> list[dict]:
    """Baselines and the result as plot entries (label, objective, low, high, is_result, and
    ``excluded``: the reason a baseline was not eligible, or None)."""
    entries = []
    ceiling = negative_ceiling(diagnostics)
    for key, value in (diagnostics.get("baselines") or {}).items():
        objective = finite_or_none(value.get("objective")) if isinstance(value, Mapping) else None
        if objective is None:
            continue
        label = BASELINE_NAMES.get(key, key.replace("_", " "))
        detail = _parameter_text(key, value.get("parameters"))
        entries.append({"label": f"{label} ({detail})" if detail else label,
                        "objective": objective, "low": finite_or_none(value.get("low")),
                        "high": finite_or_none(value.get("high")),
                        "excluded": exclusion(value, ceiling)})
    result = diagnostics.get("result") or {}
    objective = finite_or_none(result.get("objective"))
    if objective is not None:
        entries.append({"label": "learned filterbank", "objective": objective,
                        "low": finite_or_none(result.get("low")), "high": finite_or_none(result.get("high")),
                        "is_result": True})
    return entries


def _baselines(diagnostics: Mapping, label: str) -> Plot:
    entries = baseline_entries(diagnostics)
    if not entries:
        note = "Baselines are not shown: the diagnostics record no finite baseline objective."
        return Plot("baselines", None, note, note)
    gain = finite_or_none(diagnostics.get("gain_bits"))
    figure = plots.baselines_figure(entries, objective_label=label, gain_bits=gain)

    def interval(e):
        return f" [{e['low']:.4g}, {e['high']:.4g}]" if e["low"] is not None and e["high"] is not None else ""

    def excluded(e):
        return f" (excluded: {e['excluded']})" if e.get("excluded") else ""

    alt = ("Baselines and result, objective with interval: "
           + "; ".join(f"{e['label']} {e['objective']:.4g}{interval(e)}{excluded(e)}"
                       for e in entries)
           + (f". Gain over the best spectrogram {gain:+.3f} bits." if gain is not None else "."))
    judged = verdict.judgement(diagnostics)
    held_out = judged is not None and judged.get("in_sample") is not True
    where = "the held-out windows the fit never saw" if held_out else "the same windows"
    caption = f"Points: objective over {where}; bars: intervals where recorded."
    out = [e for e in entries if e.get("excluded")]
    if out:
        caption += (" Open grey points are excluded: they score sharp only through Wigner–Ville "
                    "interference, which a representation may not use beyond the positivity "
                    "ceiling (" + "; ".join(f"{e['label']}: {e['excluded']}" for e in out) + ").")
    missing = [BASELINE_NAMES.get(k, k) for k, v in (diagnostics.get("baselines") or {}).items()
               if not (isinstance(v, Mapping) and finite_or_none(v.get("objective")) is not None)]
    if missing:
        caption += f" Not shown, no finite score (an invalid image): {', '.join(missing)}."
    return Plot("baselines", plots.figure_png(figure), alt, caption)


def build_plots(filterbank_json: Mapping, diagnostics: Mapping, windows=None,
                sampling_rate_hz: float | None = None) -> list[Plot]:
    """All report plots in page order (omitted ones carry ``png=None`` and an explanatory note)."""
    if not isinstance(diagnostics, Mapping):
        raise ValueError(f"diagnostics: expected a dict, got {type(diagnostics).__name__}")
    channels = channel_rows(filterbank_json)
    check_windows(filterbank_json, windows, sampling_rate_hz)
    label = objective_label(criterion_of(filterbank_json, diagnostics))
    builders: list[Callable[[], Plot]] = [
        lambda: _tiling(channels),
        lambda: _examples(filterbank_json, diagnostics, windows, sampling_rate_hz),
        lambda: _convergence(diagnostics, label),
        lambda: _channels(channels, diagnostics),
        lambda: _baselines(diagnostics, label),
    ]
    return [build() for build in builders]


def report_plots(filterbank_json: Mapping, diagnostics: Mapping, windows=None,
                 sampling_rate_hz: float | None = None) -> dict[str, bytes]:
    """The report's plots as ``{name: PNG bytes}`` (names from ``PLOT_NAMES``; omitted ones absent)."""
    return {p.name: p.png for p in build_plots(filterbank_json, diagnostics, windows,
                                               sampling_rate_hz) if p.png is not None}
