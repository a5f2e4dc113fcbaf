"""The report's PNG figures with their alt text and captions, built from the two documents
(the filterbank JSON and the diagnostics, read as ``search.diagnostics_doc.Diagnostics``).

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

from burstlens.search.diagnostics_doc import Baseline, Diagnostics, PerWindow
from burstlens.search.safe_io import finite_or_none
from burstlens.service import plots
from burstlens.service.report.inputs import channel_column, channel_rows, check_windows, criterion_of
from burstlens.service.report.wording import utc_text

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


def example_indices(per_window: PerWindow | Mapping, available: int) -> list[tuple[str, int, float]]:
    """(label, window index, gain in bits) for the sharpest gain, the median and the worst window.

    Gain per window = spectrogram score − result score (both lower-is-sharper), from
    ``Diagnostics.per_window`` (or its JSON object): scores of the judged (held-out) windows,
    whose corpus indices are ``windows`` (absent in older files: the scores are in corpus
    order). Only corpus windows below ``available`` are candidates (a caller may hand over the
    leading part of a large corpus); windows whose scores are not finite are left out;
    duplicates are dropped.
    """
    if not isinstance(per_window, PerWindow):
        per_window = PerWindow.from_json(per_window)
    result = np.array([np.nan if v is None else v for v in per_window.result], dtype=float)
    spectrogram = np.array([np.nan if v is None else v for v in per_window.spectrogram],
                           dtype=float)
    if result.size != spectrogram.size:
        raise ValueError(f"diagnostics['per_window']: result has {result.size} scores but "
                         f"spectrogram {spectrogram.size}")
    where = per_window.windows
    where = np.arange(result.size) if where is None else np.array(where, dtype=np.int64)
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


def _spectrogram_spread(diagnostics: Diagnostics) -> float:
    baseline = diagnostics.spectrogram or Baseline()
    recorded = baseline.parameters.get("time_spread_s")  # as written, for the message
    spread = baseline.time_spread_s
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


def _examples(filterbank_json: Mapping, diagnostics: Diagnostics, windows, fs: float | None) -> Plot:
    omitted = "Example bursts are not shown: "
    if windows is None:
        note = omitted + "the report was made without the corpus windows."
        return Plot("examples", None, note, note)
    from burstlens.search import Filterbank, transform  # heavy: only when examples are drawn

    windows = np.asarray(windows, dtype=float)
    filterbank = Filterbank.from_json(filterbank_json)
    fs = filterbank.sampling_rate_hz
    try:  # the diagnostics may lack what the examples need (e.g. a cancelled run)
        picks = example_indices(diagnostics.per_window, windows.shape[0])
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
    labels, triggers = [], []
    for label, index, gain in picks:
        entry = diagnostics.corpus.meta_of(index)
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


def _convergence(diagnostics: Diagnostics, label: str) -> Plot:
    evaluations = diagnostics.evaluations
    stop = diagnostics.stop_reason or "not recorded"
    if not evaluations:
        note = "Convergence is not shown: the diagnostics record no evaluations."
        return Plot("convergence", None, note, note)
    figure = plots.convergence_figure([e.to_json() for e in evaluations],
                                      [b.to_json() for b in diagnostics.best_so_far], stop,
                                      objective_label=label)
    stages = list(dict.fromkeys(e.stage for e in evaluations))
    finite = [e.objective for e in evaluations if e.objective is not None]
    best_text = f"; best objective {min(finite):.4g}" if finite else ""
    alt = (f"Convergence: objective of each of {len(evaluations)} evaluations in order, stages "
           f"{', '.join(stages)}, with the best so far per stage as a step line{best_text}; the "
           f"search stopped by {stop}.")
    caption = ("Markers: every candidate scored; lines: best so far within each stage. Stages "
               "score different window sets (the family search uses a fixed subset), so levels "
               "are compared within a stage, not across stages.")
    return Plot("convergence", plots.figure_png(figure), alt, caption)


def _bootstrap_bands(diagnostics: Diagnostics, count: int) -> dict[str, np.ndarray]:
    """(C, 2) [low, high] per field from ``Diagnostics.bootstrap.channels``; channels without
    an interval (None, e.g. skipped for low energy) are NaN rows, drawn as gaps."""
    per_channel = None if diagnostics.bootstrap is None else diagnostics.bootstrap.channels
    if per_channel is None or len(per_channel) != count:
        return {}
    bands = {}
    for field in ("time_spread_s", "cell_area", "chirp_hz_per_s"):
        rows = []
        for entry in per_channel:
            pair = None if entry is None else getattr(entry, field)
            rows.append([math.nan, math.nan] if pair is None
                        else [math.nan if v is None else v for v in pair])
        band = np.array(rows, dtype=float)
        if np.isfinite(band).all(axis=1).any():
            bands[field] = band
    return bands


def _channels(channels: list[dict], diagnostics: Diagnostics) -> Plot:
    bands = _bootstrap_bands(diagnostics, len(channels))
    fc = channel_column(channels, "center_hz")
    figure = plots.channel_parameters_figure(fc, channel_column(channels, "time_spread_s"),
                                             channel_column(channels, "cell_area"),
                                             channel_column(channels, "chirp_hz_per_s"), bands)
    boot = diagnostics.bootstrap
    resamples = None if boot is None else boot.resamples
    band_text = (f"shaded stability intervals (refits on {resamples} resamples of the fit "
                 f"windows) for {', '.join(sorted(bands))}" if bands
                 else "no stability intervals recorded")
    alt = (f"Per-channel parameters against centre frequency ({fc.min():.4g} to {fc.max():.4g} Hz)"
           f" in three panels: Gaussian window std in ms, cell area (dashed line at 1), chirp rate"
           f" in Hz/s;"
           f" {band_text}.")
    caption = ("Fitted value per channel (line) and its stability interval from refits on "
               "resampled windows (band and bars).")
    skipped = [i for i, e in enumerate((boot.channels if boot else None) or ())
               if e is not None and (e.method or "").startswith("skipped")]
    if skipped:
        caption += (f" {len(skipped)} of {len(channels)} channels carry too little of the image "
                    "energy for an interval and show none.")
    return Plot("channels", plots.figure_png(figure), alt, caption)


# The one parameter that names each baseline in the plot (others stay in the diagnostics).
BASELINE_PARAMETER = {"spectrogram": "time_spread_s", "scalogram": "cycles"}


def _parameter_text(name: str, baseline: Baseline) -> str:
    key = BASELINE_PARAMETER.get(name)
    value = {"time_spread_s": baseline.time_spread_s, "cycles": baseline.cycles}.get(key)
    if value is None:
        return ""
    if key == "time_spread_s":
        return f"window std {1e3 * SQRT2 * value:.3g} ms"
    return f"{value:.3g} cycles"


def negative_ceiling(diagnostics: Diagnostics) -> float | None:
    """The negative share a representation may have (``max_negative_share``, the positivity
    ceiling of docs/design.md §4.3): the judgement's record, else the run's settings."""
    judged = diagnostics.judgement
    recorded = None if judged is None else judged.negative_share.max_allowed
    return diagnostics.settings.max_negative_share if recorded is None else recorded


def exclusion(baseline: Baseline, ceiling: float | None) -> str | None:
    """Why a baseline was not eligible as a result, or None: its negative share of the image's
    absolute mass above the positivity ceiling (docs/design.md §4.3)."""
    share = baseline.negative_share
    if share is None or ceiling is None or share <= ceiling:
        return None
    return f"{100 * share:.0f} % of its mass is negative (at most {100 * ceiling:g} % allowed)"


def baseline_entries(diagnostics: Diagnostics | Mapping) -> list[dict]:
    """Baselines and the result as plot entries (label, objective, low, high, is_result, and
    ``excluded``: the reason a baseline was not eligible, or None)."""
    diagnostics = Diagnostics.of(diagnostics)
    entries = []
    ceiling = negative_ceiling(diagnostics)
    for key, baseline in diagnostics.baselines.items():
        if baseline.objective is None:
            continue
        label = BASELINE_NAMES.get(key, key.replace("_", " "))
        detail = _parameter_text(key, baseline)
        entries.append({"label": f"{label} ({detail})" if detail else label,
                        "objective": baseline.objective, "low": baseline.low,
                        "high": baseline.high, "excluded": exclusion(baseline, ceiling)})
    result = diagnostics.result
    if result is not None and result.objective is not None:
        entries.append({"label": "learned filterbank", "objective": result.objective,
                        "low": result.low, "high": result.high, "is_result": True})
    return entries


def _baselines(diagnostics: Diagnostics, label: str) -> Plot:
    entries = baseline_entries(diagnostics)
    if not entries:
        note = "Baselines are not shown: the diagnostics record no finite baseline objective."
        return Plot("baselines", None, note, note)
    gain = diagnostics.gain_bits
    figure = plots.baselines_figure(entries, objective_label=label, gain_bits=gain)

    def interval(e):
        return f" [{e['low']:.4g}, {e['high']:.4g}]" if e["low"] is not None and e["high"] is not None else ""

    def excluded(e):
        return f" (excluded: {e['excluded']})" if e.get("excluded") else ""

    alt = ("Baselines and result, objective with interval: "
           + "; ".join(f"{e['label']} {e['objective']:.4g}{interval(e)}{excluded(e)}"
                       for e in entries)
           + (f". Gain over the best spectrogram {gain:+.3f} bits." if gain is not None else "."))
    judged = diagnostics.judgement
    held_out = judged is not None and judged.in_sample is not True
    where = "the held-out windows the fit never saw" if held_out else "the same windows"
    caption = f"Points: objective over {where}; bars: intervals where recorded."
    out = [e for e in entries if e.get("excluded")]
    if out:
        caption += (" Open grey points are excluded: they score sharp only through Wigner–Ville "
                    "interference, which a representation may not use beyond the positivity "
                    "ceiling (" + "; ".join(f"{e['label']}: {e['excluded']}" for e in out) + ").")
    missing = [BASELINE_NAMES.get(k, k) for k, v in diagnostics.baselines.items()
               if v.objective is None]
    if missing:
        caption += f" Not shown, no finite score (an invalid image): {', '.join(missing)}."
    return Plot("baselines", plots.figure_png(figure), alt, caption)


def build_plots(filterbank_json: Mapping, diagnostics: Diagnostics | Mapping, windows=None,
                sampling_rate_hz: float | None = None) -> list[Plot]:
    """All report plots in page order (omitted ones carry ``png=None`` and an explanatory note).
    ``diagnostics``: typed, or the JSON object (read by ``Diagnostics.from_json``)."""
    if not isinstance(diagnostics, Diagnostics):
        diagnostics = Diagnostics.from_json(diagnostics)  # ValueError: not a JSON object
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


def report_plots(filterbank_json: Mapping, diagnostics: Diagnostics | Mapping, windows=None,
                 sampling_rate_hz: float | None = None) -> dict[str, bytes]:
    """The report's plots as ``{name: PNG bytes}`` (names from ``PLOT_NAMES``; omitted ones absent)."""
    return {p.name: p.png for p in build_plots(filterbank_json, diagnostics, windows,
                                               sampling_rate_hz) if p.png is not None}
