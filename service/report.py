"""One self-contained HTML report per tuned filterbank (DESIGN §8), and its PNG plots.

``render_report(filterbank_json, diagnostics, windows, sampling_rate_hz)`` returns a complete
HTML page: inline CSS, every plot embedded as a base64 ``data:`` PNG with a text alternative, no
script and no external asset (a Content-Security-Policy meta tag forbids loading any), so the file
works offline, opened from disk. ``report_plots(...)`` returns the same plots as PNG bytes by name
for the service's PNG routes. All text that comes from data is escaped with ``html.escape``.

Inputs: ``filterbank_json`` is the filterbank JSON of DESIGN §8 (``Filterbank.to_json()``),
``diagnostics`` the ``FilterbankSearch.diagnostics_`` dict (DEVELOPERS.md lists its keys),
``windows`` the corpus windows ``(M, N)`` float in window order (or None: the example-burst plot
is then omitted with a note), ``sampling_rate_hz`` their rate in Hz (None: the filterbank's).

The page leads with the gain on held-out windows and, when any applies, a box of warnings; both
come from ``service.verdict`` so the page and the command line never disagree.
"""
from __future__ import annotations

import base64
import html
import json
import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass

import numpy as np

from burstlens.search.documents import DiagnosticsDocument, FilterbankDocument
from burstlens.search.safe_io import finite_or_none
from burstlens.service import palette, plots, verdict

PLOT_NAMES = ("tiling", "examples", "convergence", "channels", "baselines")
CHANNEL_FIELDS = ("center_hz", "time_spread_s", "cell_area", "chirp_hz_per_s")
EXAMPLE_ROWS = 3

CAUTIONS = (
    "burstlens is an analysis aid for choosing a signal representation. It is not a certified "
    "safety, monitoring or early-warning system, and its output is not a hazard assessment.",
    "Decisions about ground control, re-entry after blasting or seismic events, injection rates, "
    "traffic-light protocols or public safety follow local regulations and the judgement of "
    "licensed professionals.",
    "Check any tuned filterbank on your own data before you rely on it.",
)

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


# ---------------------------------------------------------------------------------------------
# Reading the inputs
# ---------------------------------------------------------------------------------------------

def channel_rows(filterbank_json: Mapping) -> list[dict]:
    """The filterbank's channels as dicts, checked to carry the four fields the report draws."""
    channels = filterbank_json.get("channels") if isinstance(filterbank_json, Mapping) else None
    if not isinstance(channels, list) or not channels:
        raise ValueError("filterbank_json['channels']: expected a non-empty list of channels")
    for index, channel in enumerate(channels):
        for field in CHANNEL_FIELDS:
            value = channel.get(field) if isinstance(channel, Mapping) else None
            if not isinstance(value, (int, float)) or not math.isfinite(value):
                raise ValueError(f"filterbank_json['channels'][{index}]['{field}']: expected a "
                                 f"finite number, got {value!r}")
    return channels


def _column(channels: list[dict], field: str) -> np.ndarray:
    return np.array([float(c[field]) for c in channels])


def _criterion(filterbank_json: Mapping, diagnostics: Mapping) -> dict:
    criterion = filterbank_json.get("criterion")
    if criterion is None:
        criterion = (diagnostics.get("settings") or {}).get("criterion")
    if isinstance(criterion, str):
        return {"name": criterion}
    return dict(criterion) if isinstance(criterion, Mapping) else {"name": "renyi"}


def objective_label(criterion: Mapping) -> str:
    """Axis label for the corpus objective of a criterion (DESIGN §4)."""
    name = str(criterion.get("name", "renyi"))
    if name == "renyi":
        alpha = criterion.get("alpha", 3.0)
        return f"Rényi entropy H$_{{{float(alpha):g}}}$ (bits on the grid)"
    if name == "concentration":
        return "concentration objective (lower is sharper)"
    if name == "sparsity":
        return "negative sparsity (lower is sharper)"
    return f"{plots.literal(name)} objective (lower is sharper)"


def _count(value) -> int | None:
    if isinstance(value, bool):
        return None
    if isinstance(value, int):
        return value
    if isinstance(value, (list, tuple)):
        return len(value)
    return None


# ---------------------------------------------------------------------------------------------
# Plots
# ---------------------------------------------------------------------------------------------

def _tiling(channels: list[dict]) -> Plot:
    fc, st = _column(channels, "center_hz"), _column(channels, "time_spread_s")
    area, beta = _column(channels, "cell_area"), _column(channels, "chirp_hz_per_s")
    png = plots.figure_png(plots.tiling_figure(fc, st, area, beta))
    alt = (f"Tiling of the time–frequency plane: {len(channels)} ellipses, one per channel, "
           f"centred at 0 ms and at each centre frequency from {fc.min():.4g} to {fc.max():.4g} Hz; "
           f"time spread {1e3 * st.min():.3g} to {1e3 * st.max():.3g} ms, cell area "
           f"{area.min():.3g} to {area.max():.3g}, chirp rate {beta.min():.4g} to {beta.max():.4g} "
           f"Hz/s; a dashed Heisenberg cell (a = 1) for reference.")
    caption = ("Each ellipse is the 1-σ contour of one channel's Gaussian kernel, sheared by its "
               "chirp rate and coloured by its cell area; the dashed ellipse is the Heisenberg cell "
               "(cell area 1) with the median channel's time spread.")
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
    baseline = Filterbank.constant_window(filterbank.center_hz, spread, fs)
    spectrograms = transform(chosen, baseline)
    learned = transform(chosen, filterbank)
    meta = (diagnostics.get("corpus") or {}).get("window_meta")
    labels = []
    for label, index, gain in picks:
        where = ""
        if isinstance(meta, list) and index < len(meta) and isinstance(meta[index], Mapping):
            names = [str(meta[index][k]) for k in ("file", "trace_id") if meta[index].get(k)]
            offset = finite_or_none(meta[index].get("offset_s"))
            where = (f", {' '.join(names)}" if names else "") + \
                (f" at {offset:.3f} s" if offset is not None else "")
        labels.append(f"{label}: window {index}{where} ({gain:+.2f} bits)")
    times = np.arange(windows.shape[1]) / fs
    figure = plots.example_figure(times, chosen, spectrograms, learned, filterbank.center_hz, labels,
                                  spectrogram_label=f"best spectrogram (σ_t = {1e3 * spread:.3g} ms)")
    alt = ("Example windows, one row each (" + "; ".join(labels) + "). Columns: the waveform "
           f"against time in ms; the best plain spectrogram (Gaussian window, time spread "
           f"{1e3 * spread:.3g} ms); the learned filterbank output. Both images share the time "
           "and frequency axes and one 30 dB colour range.")
    caption = ("Rows: the window where the learned filterbank gains most over the best "
               "spectrogram, the median window and the window where it gains least. Images are "
               "normalised to unit sum and drawn in dB re. the row's peak.")
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
    fc = _column(channels, "center_hz")
    figure = plots.channel_parameters_figure(fc, _column(channels, "time_spread_s"),
                                             _column(channels, "cell_area"),
                                             _column(channels, "chirp_hz_per_s"), bands)
    resamples = (diagnostics.get("bootstrap") or {}).get("resamples")
    band_text = (f"shaded stability intervals (refits on {resamples} resamples of the fit "
                 f"windows) for {', '.join(sorted(bands))}" if bands
                 else "no stability intervals recorded")
    alt = (f"Per-channel parameters against centre frequency ({fc.min():.4g} to {fc.max():.4g} Hz)"
           f" in three panels: time spread in ms, cell area (dashed line at 1), chirp rate in Hz/s;"
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
        return f"σ_t = {1e3 * value:.3g} ms"
    return f"{key} = {value:.3g}"


def baseline_entries(diagnostics: Mapping) -> list[dict]:
    """Baselines and the result as plot entries (label, objective, low, high, is_result)."""
    entries = []
    for key, value in (diagnostics.get("baselines") or {}).items():
        objective = finite_or_none(value.get("objective")) if isinstance(value, Mapping) else None
        if objective is None:
            continue
        label = BASELINE_NAMES.get(key, key.replace("_", " "))
        detail = _parameter_text(key, value.get("parameters"))
        entries.append({"label": f"{label} ({detail})" if detail else label,
                        "objective": objective, "low": finite_or_none(value.get("low")),
                        "high": finite_or_none(value.get("high"))})
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

    alt = ("Baselines and result, objective with interval: "
           + "; ".join(f"{e['label']} {e['objective']:.4g}{interval(e)}" for e in entries)
           + (f". Gain over the best spectrogram {gain:+.3f} bits." if gain is not None else "."))
    judged = verdict.judgement(diagnostics)
    held_out = judged is not None and judged.get("in_sample") is not True
    where = "the held-out windows the fit never saw" if held_out else "the same windows"
    caption = f"Points: objective over {where}; bars: intervals where recorded."
    missing = [BASELINE_NAMES.get(k, k) for k, v in (diagnostics.get("baselines") or {}).items()
               if not (isinstance(v, Mapping) and finite_or_none(v.get("objective")) is not None)]
    if missing:
        caption += f" Not shown, no finite score (an invalid image): {', '.join(missing)}."
    return Plot("baselines", plots.figure_png(figure), alt, caption)


def _check_windows(filterbank_json: Mapping, windows, sampling_rate_hz) -> None:
    """Windows must be (M, N) with M ≥ 1, at the filterbank's sampling rate when one is given."""
    if windows is None:
        return
    shape = np.shape(windows)
    if len(shape) != 2 or shape[0] == 0 or shape[1] == 0:
        raise ValueError(f"windows: expected a (M, N) array of windows, got shape {shape}")
    fs = FilterbankDocument(filterbank_json).sampling_rate_hz
    if sampling_rate_hz is not None and fs is not None \
            and not math.isclose(float(sampling_rate_hz), fs, rel_tol=1e-9):
        raise ValueError(f"sampling_rate_hz: the windows are at {float(sampling_rate_hz):g} Hz but "
                         f"the filterbank at {fs:g} Hz")


def build_plots(filterbank_json: Mapping, diagnostics: Mapping, windows=None,
                sampling_rate_hz: float | None = None) -> list[Plot]:
    """All report plots in page order (omitted ones carry ``png=None`` and an explanatory note)."""
    if not isinstance(diagnostics, Mapping):
        raise ValueError(f"diagnostics: expected a dict, got {type(diagnostics).__name__}")
    channels = channel_rows(filterbank_json)
    _check_windows(filterbank_json, windows, sampling_rate_hz)
    label = objective_label(_criterion(filterbank_json, diagnostics))
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


# ---------------------------------------------------------------------------------------------
# HTML
# ---------------------------------------------------------------------------------------------

def _e(value) -> str:
    return html.escape(str(value), quote=True)


def _fmt(value) -> str:
    """Numbers for people: integers as is, floats to 5 significant digits; others as JSON."""
    if isinstance(value, bool) or value is None:
        return json.dumps(value)
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        return f"{value:.5g}" if math.isfinite(value) else str(value)
    if isinstance(value, str):
        return value
    return json.dumps(value, ensure_ascii=False, default=str)


def _kv_table(mapping) -> str:
    if not isinstance(mapping, Mapping) or not mapping:
        return '<p class="muted">none recorded</p>'
    rows = "".join(f"<tr><th scope=\"row\">{_e(k)}</th><td>{_e(_fmt(v))}</td></tr>"
                   for k, v in mapping.items())
    return f'<table class="kv">{rows}</table>'


def equivalent_text(equivalent) -> str:
    """The channel's ``equivalent`` reading as one line of text for people."""
    if isinstance(equivalent, str):
        return equivalent
    if isinstance(equivalent, Mapping):
        for key in ("text", "description", "summary", "reading"):
            if isinstance(equivalent.get(key), str):
                return equivalent[key]
        return "; ".join(f"{k} {_fmt(v)}" for k, v in equivalent.items())
    return "" if equivalent is None else _fmt(equivalent)


def _resolution_text(area: float) -> str:
    """Cell area a as a geophysicist reads it: ×1/a finer (super-resolution) or ×a coarser."""
    if math.isclose(area, 1.0, rel_tol=5e-3):
        return "as a spectrogram (a = 1)"
    if area < 1:
        return f"super-resolution ×{1 / area:.2f}"
    return f"smoothing ×{area:.2f}"


def _stability_text(entry) -> str:
    """The bootstrap interval of one channel's window σ_t (ms) and cell area, or why none."""
    if not isinstance(entry, Mapping):
        return "not recorded"
    method = str(entry.get("method") or "")
    if method.startswith(("skipped", "not determined")):
        return method.replace("_", " ")
    parts = []
    spread, area = entry.get("time_spread_s"), entry.get("cell_area")
    if isinstance(spread, (list, tuple)) and len(spread) == 2 and None not in spread:
        parts.append(f"σ_t {1e3 * spread[0]:.3g}–{1e3 * spread[1]:.3g} ms")
    if isinstance(area, (list, tuple)) and len(area) == 2 and None not in area:
        parts.append(f"a {area[0]:.2f}–{area[1]:.2f}")
    return ", ".join(parts) or "not recorded"


# (header, unit, data-field of the exact JSON value or None, text of one channel)
CHANNEL_COLUMNS = (
    ("centre", "Hz", "center_hz", lambda c: f"{c['center_hz']:.5g}"),
    ("Gaussian window σ_t", "ms", "time_spread_s", lambda c: f"{1e3 * c['time_spread_s']:.3g}"),
    ("window FWHM", "ms", None, lambda c: f"{FWHM_PER_STD * 1e3 * c['time_spread_s']:.3g}"),
    ("resolution against a spectrogram", "cell area a", "cell_area",
     lambda c: _resolution_text(float(c["cell_area"]))),
    ("matched sweep", "Hz/s", "chirp_hz_per_s", lambda c: f"{c['chirp_hz_per_s']:,.0f}"),
)
FWHM_PER_STD = 4 * math.sqrt(math.log(2))  # FWHM of the window amplitude exp(−u²/4σ_t²)


def _channel_table(channels: list[dict], diagnostics: Mapping) -> str:
    boot = (diagnostics.get("bootstrap") or {}).get("channels")
    boot = boot if isinstance(boot, list) and len(boot) == len(channels) else [None] * len(channels)
    head = '<th scope="col">#</th>' + "".join(
        '<th scope="col"' + (f' data-field="{field}"' if field else "") + f">{_e(title)}</th>"
        for title, _, field, _ in CHANNEL_COLUMNS) + \
        '<th scope="col">stability interval</th><th scope="col" data-field="equivalent">reading</th>'
    units = ("", *(u for _, u, _, _ in CHANNEL_COLUMNS), "refits on resampled windows", "")
    body = []
    for index, (channel, entry) in enumerate(zip(channels, boot, strict=True)):
        cells = [f"<td>{index}</td>"]
        for _, _, field, text in CHANNEL_COLUMNS:
            exact = f' data-field="{field}" data-value="{float(channel[field])!r}"' if field else ""
            cells.append(f'<td class="num"{exact}>{_e(text(channel))}</td>')
        cells.append(f"<td>{_e(_stability_text(entry))}</td>")
        cells.append(f'<td data-field="equivalent">{_e(equivalent_text(channel.get("equivalent")))}</td>')
        body.append(f'<tr data-channel="{index}">{"".join(cells)}</tr>')
    unit_row = "".join(f"<td>{_e(u)}</td>" for u in units)
    return (f'<div class="scroll tall"><table id="channel-table" class="grid"><thead><tr>{head}</tr>'
            f'<tr class="units">{unit_row}</tr></thead><tbody>{"".join(body)}</tbody></table></div>')


REJECTION_LIST_LIMIT = 200


def _window_counts(windows_info: Mapping) -> dict:
    """``used`` / ``rejected`` (and any other scalar) as counts; lists count their items."""
    return {k: len(v) if isinstance(v, list) else v for k, v in windows_info.items()
            if k != "rejected_by_reason" and not isinstance(v, Mapping)}


def _rejections(windows_info: Mapping, corpus: Mapping) -> str:
    """Counts by reason, then each rejection (file, trace, offset, reason, detail) folded away."""
    reasons = windows_info.get("rejected_by_reason")
    if not (isinstance(reasons, Mapping) and reasons):
        return '<p class="muted">no window was rejected</p>'
    rows = "".join(f"<tr><td>{_e(k)}</td><td class=\"num\">{_e(_fmt(v))}</td></tr>"
                   for k, v in sorted(reasons.items(), key=lambda kv: str(kv[0])))
    out = ('<table class="grid small"><thead><tr><th scope="col">reason</th>'
           f'<th scope="col">windows</th></tr></thead><tbody>{rows}</tbody></table>')
    each = corpus.get("rejections") if isinstance(corpus, Mapping) else None
    if isinstance(each, list) and each:
        keys = ("file", "trace_id", "offset_s", "reason", "detail")
        head = "".join(f'<th scope="col">{k}</th>' for k in keys)
        body = "".join("<tr>" + "".join(f"<td>{_e(_fmt(r.get(k, '')))}</td>" for k in keys) + "</tr>"
                       for r in each[:REJECTION_LIST_LIMIT] if isinstance(r, Mapping))
        more = (f'<p class="muted">{len(each) - REJECTION_LIST_LIMIT} more not listed</p>'
                if len(each) > REJECTION_LIST_LIMIT else "")
        out += (f"<details><summary>each rejection ({len(each)})</summary><div class=\"scroll\">"
                f'<table class="grid small"><thead><tr>{head}</tr></thead><tbody>{body}</tbody>'
                f"</table></div>{more}</details>")
    return out


def _percent(value) -> str:
    number = finite_or_none(value)
    return "not recorded" if number is None else f"{100 * number:.3g} %"


def _onset_text(onset) -> str:
    """'result m / p ms · spectrogram m / p ms (n windows)' from ``judgement['onset']``."""
    if not isinstance(onset, Mapping):
        return "not measured (no trigger offsets)"
    parts, counts = [], set()
    for name in ("result", "spectrogram"):
        entry = onset.get(name) if isinstance(onset.get(name), Mapping) else {}
        median, p90 = finite_or_none(entry.get("median_ms")), finite_or_none(entry.get("p90_ms"))
        shown = [f"{v:.3g}" if v is not None else "?" for v in (median, p90)]
        parts.append(f"{name} {shown[0]} / {shown[1]} ms")
        if _count(entry.get("windows")) is not None:
            counts.add(entry["windows"])
    windows = f" ({', '.join(map(str, sorted(counts)))} windows)" if counts else ""
    return " · ".join(parts) + windows


def _headline(filterbank_json: Mapping, diagnostics: Mapping, channels: list[dict]) -> str:
    gain = finite_or_none(diagnostics.get("gain_bits"))
    result = diagnostics.get("result") or {}
    objective = finite_or_none(result.get("objective"))
    low, high = finite_or_none(result.get("low")), finite_or_none(result.get("high"))
    windows_info = diagnostics.get("windows") or {}
    used, rejected = _count(windows_info.get("used")), _count(windows_info.get("rejected"))
    judged = verdict.judgement(diagnostics)
    held_out = judged is not None and judged.get("in_sample") is not True
    negative = (judged or {}).get("negative_share")
    negative = negative if isinstance(negative, Mapping) else {}
    ceiling = finite_or_none(negative.get("max_allowed"))
    fs = FilterbankDocument(filterbank_json).sampling_rate_hz
    cards = [
        ("gain over the best spectrogram" + (", held-out" if held_out else ""),
         f"{gain:+.3f} bits" if gain is not None else "not recorded"),
        (("held-out objective" if held_out else "objective") + " of the result",
         (f"{objective:.4g}" if objective is not None else "not recorded")
         + (f" [{low:.4g}, {high:.4g}]" if low is not None and high is not None else "")),
        ("negative share of the image", _percent(negative.get("overall"))
         + (f" (ceiling {100 * ceiling:.2g} %)" if ceiling is not None else "")),
        ("onset timing, median / p90", _onset_text((judged or {}).get("onset"))
         if judged is not None else "not recorded"),
        ("stop reason", str(diagnostics.get("stop_reason", "not recorded"))),
        ("windows used / rejected", f"{'?' if used is None else used} / "
                                     f"{'?' if rejected is None else rejected}"),
        ("channels", str(len(channels))),
        ("sampling rate", f"{fs:g} Hz" if fs else "not recorded"),
    ]
    return '<div class="cards">' + "".join(
        f'<div class="card"><div class="label">{_e(k)}</div><div class="value">{_e(v)}</div></div>'
        for k, v in cards) + "</div>"


def _verdict(diagnostics: Mapping) -> str:
    """The lead under the title: the held-out gain sentence, how it was measured, and a warnings
    box only when some warning applies."""
    judged = verdict.judgement(diagnostics)
    kind = "lead note" if judged is None else "lead"
    lead = f'<p class="{kind}" id="gain">{_e(verdict.gain_words(diagnostics))}</p>'
    if judged is not None:
        gain = judged.get("gain_bits")
        gain = gain if isinstance(gain, Mapping) else {}
        level, resamples = finite_or_none(gain.get("level")), _count(gain.get("resamples"))
        judged_on = "fitted" if judged.get("in_sample") is True else "held-out"
        interval = f"{100 * level:.0f} % interval" if level is not None else "interval"
        if resamples:
            interval += f" from {resamples} resamples of the {judged_on} windows"
        how = [interval,
               f"{judged['fit_windows']} windows fitted" if _count(judged.get("fit_windows"))
               is not None else None,
               f"{judged['guard_windows']} left out of the fit because they overlap held-out ones"
               if _count(judged.get("guard_windows")) else None]
        lead += f'<p class="muted">{_e("; ".join(h for h in how if h))}.</p>'
    found = verdict.warnings(diagnostics)
    if found:
        items = "".join(f"<li>{_e(w)}</li>" for w in found)
        lead += (f'<div class="warnings" id="warnings" role="note"><h2>Warnings</h2>'
                 f"<ul>{items}</ul></div>")
    return f'<section id="verdict">{lead}</section>'


def _judgement_table(diagnostics: Mapping) -> str:
    """The held-out judgement in numbers, or a note when the diagnostics carry none."""
    judged = verdict.judgement(diagnostics)
    if judged is None:
        return ('<p class="muted">no judgement on held-out windows recorded (an older run or a '
                "cancelled one): objectives and gain here were measured on the windows the fit "
                "used</p>")

    def objective(entry) -> str:
        entry = entry if isinstance(entry, Mapping) else {}
        value, low, high = (finite_or_none(entry.get(k)) for k in ("objective", "low", "high"))
        if value is None:
            return "not recorded"
        return f"{value:.4g}" + (f" [{low:.4g}, {high:.4g}]" if low is not None and high is not None
                                 else "")

    negative = judged.get("negative_share")
    negative = negative if isinstance(negative, Mapping) else {}
    per_channel = [finite_or_none(v) for v in negative.get("per_channel") or []]
    worst = max((v for v in per_channel if v is not None), default=None)
    rows = {
        "judged in-sample": judged.get("in_sample"),
        "held-out share": judged.get("held_out_share"),
        "windows held out / fitted / guard": " / ".join(
            "?" if _count(judged.get(k)) is None else str(judged[k])
            for k in ("held_out_windows", "fit_windows", "guard_windows")),
        "result objective, judged windows": objective(judged.get("result")),
        "best spectrogram objective, judged windows": objective(judged.get("spectrogram")),
        "negative share, largest channel": _percent(worst),
        "negative share allowed": _percent(negative.get("max_allowed")),
        "settings on a search bound": ", ".join(map(str, judged.get("bounds_hit") or [])) or "none",
    }
    if judged.get("grouping"):  # how windows were kept apart, as the search words it
        rows["held-out grouping"] = judged["grouping"]
    return _kv_table(rows)


def _corpus_summary(corpus: Mapping) -> str:
    if not isinstance(corpus, Mapping) or not corpus:
        return '<p class="muted">no corpus summary recorded</p>'
    scalars = {k: v for k, v in corpus.items()
               if not isinstance(v, (list, dict)) and k != "defaults"}
    files = corpus.get("files")
    if isinstance(files, list) and files:
        scalars["files"] = len(files)
    traces = corpus.get("traces")
    if isinstance(traces, list):
        scalars["traces"] = len(traces)
    return _kv_table(scalars)


TRACE_LIST_LIMIT = 200


def _trace_table(corpus: Mapping) -> str:
    """Every trace segment read (file, SEED id, rate, start, duration, windows it gave)."""
    traces = corpus.get("traces") if isinstance(corpus, Mapping) else None
    if not isinstance(traces, list) or not traces:
        return ""
    keys = [k for k in ("file", "trace_id", "sampling_rate_hz", "start", "duration_s", "windows")
            if any(isinstance(t, Mapping) and k in t for t in traces)]
    head = "".join(f'<th scope="col">{_e(k)}</th>' for k in keys)
    rows = "".join("<tr>" + "".join(f"<td>{_e(_fmt(t.get(k, '')))}</td>" for k in keys) + "</tr>"
                   for t in traces[:TRACE_LIST_LIMIT] if isinstance(t, Mapping))
    more = (f'<p class="muted">{len(traces) - TRACE_LIST_LIMIT} more traces not listed</p>'
            if len(traces) > TRACE_LIST_LIMIT else "")
    return (f'<h3>Traces read ({len(traces)})</h3><div class="scroll"><table class="grid traces">'
            f"<thead><tr>{head}</tr></thead><tbody>{rows}</tbody></table></div>{more}")


# The job settings of DESIGN §7 (what a person sets); everything else the engine resolved is a
# default it chose, shown apart with the corpus reader's choices.
JOB_SETTINGS = ("channels", "band_hz", "spacing", "window_s", "criterion", "cell_area", "chirp",
                "refine", "evaluations", "time_limit_s", "bootstrap", "seed", "windowing",
                "max_windows", "held_out", "max_negative_share", "subset", "n_jobs")


# resolved name -> the job settings' name for it
SETTING_ALIASES = {"n_jobs": "jobs"}
_UNSET = object()


# Words for setting names whose spelling out is not enough; the rest are spelled out from the key.
LABELS = {"sta": "STA length", "lta": "LTA length", "window": "window length",
          "n_jobs": "parallel jobs", "max_windows": "most windows kept", "band": "channel band",
          "bandpass": "band-pass", "chirp": "chirped channels", "refine": "per-channel refinement",
          "held_out": "share of windows held out", "max_negative_share": "negative share allowed",
          "subset": "windows in the family search", "cell_area": "cell area range",
          "trigger_on": "trigger-on STA/LTA ratio", "trigger_off": "trigger-off STA/LTA ratio",
          "pre_trigger": "share of the window before the trigger", "eps": "kernel truncation"}
# unit suffix of a key -> (unit shown, factor); seconds shorter than one are shown in ms
UNITS = (("_hz_per_s", "Hz/s", 1.0), ("_hz", "Hz", 1.0), ("_samples", "samples", 1.0),
         ("_s", "s", 1.0))


def _number_text(value, unit: str) -> str:
    if unit == "s" and abs(value) < 1:
        return f"{1e3 * value:.4g} ms"
    return f"{value:.5g}" + (f" {unit}" if unit else "") if isinstance(value, float) \
        else f"{value}" + (f" {unit}" if unit else "")


def _value_text(value, unit: str = "") -> str:
    """A setting's value in words and units: ranges as 'low–high', parts as 'name value'."""
    if isinstance(value, bool) or value is None:
        return {True: "yes", False: "no", None: "not set"}[value]
    if isinstance(value, (int, float)):
        return _number_text(value, unit)
    if isinstance(value, (list, tuple)) and len(value) == 2 and \
            all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in value):
        return f"{_number_text(value[0], unit)}–{_number_text(value[1], unit)}"
    if isinstance(value, (list, tuple)):
        return ", ".join(_value_text(v, unit) for v in value)
    if isinstance(value, Mapping):
        return "; ".join(f"{str(k).replace('_', ' ')} {_value_text(v, unit)}" for k, v in value.items())
    return str(value)


def _stem(key: str) -> tuple[str, str]:
    for suffix, unit, _ in UNITS:
        if key.endswith(suffix) and len(key) > len(suffix):
            return key[:-len(suffix)], unit
    return key, ""


def people_items(mapping) -> list[tuple[str, str]]:
    """(label, value text) for a dict of settings or defaults: units from the key's suffix, and
    each ``<name>_source`` folded into its value in brackets ("STA length 6.25 ms (4 dominant
    periods)") instead of a row of its own."""
    if not isinstance(mapping, Mapping):
        return []
    sources = {k[:-len("_source")]: v for k, v in mapping.items() if k.endswith("_source")}
    items = []
    for key, value in mapping.items():
        if key.endswith("_source"):
            continue
        stem, unit = _stem(str(key))
        label = LABELS.get(stem) or LABELS.get(str(key)) or stem.replace("_", " ")
        text = _value_text(value, unit)
        if stem in sources:
            text += f" ({_value_text(sources[stem])})"
        items.append((label[0].upper() + label[1:], text))
    return items


def _setting_cells(items) -> str:
    """Cells of (label, text, tag); the tag says whether the job gave the setting."""
    cells = []
    for label, text, tag in items:
        badge = f' <span class="tag">{_e(tag)}</span>' if tag else ""
        cells.append(f'<div class="setting"><span class="key">{_e(label)}{badge}</span> '
                     f'<span class="value">{_e(text)}</span></div>')
    return f'<div class="settings">{"".join(cells)}</div>'


def _settings_section(resolved, given, reader_defaults) -> str:
    """Settings as run (tagged 'given' or 'default' when the job's own settings are known), then
    the defaults the engine and the corpus reader chose from the data."""
    resolved = resolved if isinstance(resolved, Mapping) else {}
    chosen = []
    for key in JOB_SETTINGS:
        if key not in resolved:
            continue
        asked = None if given is None else next(
            (given[k] for k in (key, SETTING_ALIASES.get(key)) if k in given), _UNSET)
        tag = None if given is None else ("default" if asked is _UNSET else "given")
        value = resolved[key]
        if value is None and asked not in (None, _UNSET):  # applied elsewhere (e.g. the reader)
            value = asked
        if value is None and isinstance(reader_defaults, Mapping):  # the reader's choice
            value = reader_defaults.get(key)
        chosen.extend((label, text, tag) for label, text in people_items({key: value}))
    engine = people_items({k: v for k, v in resolved.items() if k not in JOB_SETTINGS})
    record = dict(reader_defaults) if isinstance(reader_defaults, Mapping) else {}
    asked = record.pop("given", None)
    asked = asked if isinstance(asked, Mapping) else {}
    # the reader records every option's value; those the caller set are tagged "given"
    reader = []
    for key, value in record.items():
        if str(key).endswith("_source"):
            continue
        source = f"{_stem(str(key))[0]}_source"
        one = {key: value, **({source: record[source]} if source in record else {})}
        reader += [(*item, "given" if key in asked else None) for item in people_items(one)]
    none = '<p class="muted">none recorded</p>'
    return ("<h3>Settings of the run</h3>" + (_setting_cells(chosen) if chosen else none)
            + "<h3>Corpus reading: options given, and defaults chosen from the data</h3>"
            + (_setting_cells(reader) if reader else none)
            + "<h3>Defaults the search derived</h3>"
            + (_setting_cells((*i, None) for i in engine) if engine else none))


def _figure_html(plot: Plot) -> str:
    if plot.png is None:
        return (f'<figure class="plot omitted" id="plot-{plot.name}"><p class="note">'
                f"{_e(plot.caption)}</p></figure>")
    data = base64.b64encode(plot.png).decode("ascii")
    return (f'<figure class="plot" id="plot-{plot.name}"><img src="data:image/png;base64,{data}" '
            f'alt="{_e(plot.alt)}"><figcaption>{_e(plot.caption)}</figcaption></figure>')


def _what_was_tuned(filterbank_json: Mapping, diagnostics: Mapping, channels: list[dict]) -> str:
    """One line: the site (stations), the files, the channels and band, the windows."""
    corpus = diagnostics.get("corpus") if isinstance(diagnostics.get("corpus"), Mapping) else {}
    traces = [t for t in corpus.get("traces") or [] if isinstance(t, Mapping)]
    stations = list(dict.fromkeys(".".join(str(t["trace_id"]).split(".")[:2]) for t in traces
                                  if t.get("trace_id")))
    site = (", ".join(stations[:SITES_NAMED]) + (f" and {len(stations) - SITES_NAMED} more"
                                                  if len(stations) > SITES_NAMED else "")
            if stations else "corpus " + str(corpus.get("source_hash") or
                                             filterbank_json.get("corpus_hash") or "?")[:12])
    files = corpus.get("files")
    site += f" ({len(files)} files, {len(traces)} traces)" if isinstance(files, list) else ""
    fc = _column(channels, "center_hz")
    settings = diagnostics.get("settings") if isinstance(diagnostics.get("settings"), Mapping) else {}
    spacing = f", {settings['spacing']} spacing" if settings.get("spacing") else ""
    parts = [site, f"{len(channels)} channels at {fc.min():.4g}–{fc.max():.4g} Hz{spacing}"]
    used = _count((diagnostics.get("windows") or {}).get("used"))
    fs = FilterbankDocument(filterbank_json).sampling_rate_hz
    samples = filterbank_json.get("window_samples")
    if used is not None and fs and isinstance(samples, int):
        kind = "burst windows" if DiagnosticsDocument(diagnostics).windowing == "bursts" \
            else "windows"
        parts.append(f"{used} {kind} of {1e3 * samples / fs:.4g} ms at {fs:g} Hz")
    return " · ".join(parts)


SITES_NAMED = 4

STYLE = palette.css_variables() + """
* { box-sizing: border-box; }
body { margin: 0; color: var(--ink); background: var(--paper);
       font: 15px/1.5 system-ui, -apple-system, "Segoe UI", Roboto, "DejaVu Sans", sans-serif; }
header { padding: 14px 32px 10px; border-bottom: 3px solid var(--accent); }
header h1 { margin: 0; font-size: 1.2rem; }
header p { margin: 2px 0 0; }
header p.tuned { font-size: 1rem; }
header p.aid { color: var(--muted); font-size: .85rem; }
nav { padding: 6px 32px; background: var(--band); border-bottom: 1px solid var(--line); }
nav a { margin-right: 18px; color: var(--accent); }
main { max-width: 1240px; padding: 0 32px 40px; }
h2 { margin: 28px 0 10px; font-size: 1.25rem; border-bottom: 1px solid var(--line); padding-bottom: 4px; }
h3 { margin: 20px 0 6px; font-size: 1.05rem; }
h4 { margin: 14px 0 4px; font-size: .95rem; }
.cards { display: grid; grid-template-columns: repeat(auto-fit, minmax(160px, 1fr)); gap: 10px; }
.card { border: 1px solid var(--line); border-radius: 6px; padding: 10px 12px; background: var(--paper); }
.card .label { color: var(--muted); font-size: .82rem; }
.card .value { font-size: 1.1rem; font-weight: 600; overflow-wrap: anywhere; }
.settings { display: grid; grid-template-columns: repeat(auto-fill, minmax(340px, 1fr)); gap: 4px 24px; }
.setting { border-bottom: 1px solid var(--band); padding: 2px 0; font-size: .88rem; }
.setting .key { color: var(--muted); }
.setting .value { overflow-wrap: anywhere; }
.tag { font-size: .72rem; padding: 0 5px; border-radius: 8px; background: var(--band); border: 1px solid var(--line); }
.columns { display: grid; grid-template-columns: repeat(auto-fit, minmax(420px, 1fr)); gap: 0 28px; }
table { border-collapse: collapse; font-size: .88rem; }
table.kv th { text-align: left; font-weight: 500; color: var(--muted); padding: 2px 14px 2px 0;
              vertical-align: top; white-space: nowrap; }
table.kv td { padding: 2px 0; overflow-wrap: anywhere; }
table.grid { width: 100%; }
table.grid th, table.grid td { border-bottom: 1px solid var(--line); padding: 4px 8px; text-align: left; }
table.grid thead th { background: var(--band); position: sticky; top: 0; }
table.grid tbody tr:nth-child(even) { background: var(--stripe); }
table.grid td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
tr.units td { color: var(--muted); font-size: .78rem; background: var(--band); position: sticky; top: 31px; }
table.small { width: auto; }
.scroll { max-height: 360px; overflow: auto; border: 1px solid var(--line); }
.scroll.tall { max-height: 560px; }
.scroll table.small { width: 100%; }
table.traces td { white-space: nowrap; }
details summary { cursor: pointer; color: var(--accent); margin: 6px 0; }
details#details > summary { font-size: 1.15rem; font-weight: 600; }
figure.plot { margin: 14px 0 22px; }
figure.plot img { max-width: 100%; height: auto; border: 1px solid var(--line); }
figcaption { color: var(--muted); font-size: .88rem; margin-top: 4px; }
.note, .muted { color: var(--muted); }
.note { border-left: 3px solid var(--line); padding: 6px 12px; background: var(--band); }
section#verdict { padding: 12px 32px 6px; }
p.lead { margin: 0 0 2px; font-size: 1.45rem; font-weight: 650; line-height: 1.3; }
p.lead.note { font-size: 1.15rem; font-weight: 500; }
.warnings { border: 1px solid var(--warn-line); border-left-width: 5px; background: var(--warn-bg);
            border-radius: 6px; padding: 2px 18px 6px; margin: 8px 0 4px; }
.warnings h2 { border: none; margin: 6px 0 2px; font-size: 1.05rem; color: var(--bad); }
.warnings ul { margin: 2px 0; padding-left: 20px; font-size: .92rem; }
section#cautions { border: 1px solid var(--caution-line); background: var(--caution-bg);
                   padding: 4px 18px 10px; margin-top: 30px; border-radius: 6px; }
section#cautions h2 { border: none; }
footer { color: var(--muted); font-size: .82rem; padding: 0 32px 24px; }
"""


def render_report(filterbank_json: Mapping, diagnostics: Mapping, windows=None,
                  sampling_rate_hz: float | None = None) -> str:
    """The complete, self-contained HTML report of one tuned filterbank (see module docstring)."""
    channels = channel_rows(filterbank_json)
    figures = {p.name: p for p in build_plots(filterbank_json, diagnostics, windows,
                                              sampling_rate_hz)}
    corpus = diagnostics.get("corpus") or {}
    windows_info = diagnostics.get("windows") or {}
    recorded_run = DiagnosticsDocument(diagnostics)
    # the job's own settings, as the service records them beside the resolved ones (None for
    # a filterbank from `burstlens tune`: settings then carry no given/default tag)
    given = FilterbankDocument(filterbank_json).job_settings
    run = {k: diagnostics.get(k) for k in ("stop_reason", "origin", "seed", "elapsed_s", "version")
           if diagnostics.get(k) is not None}
    fallback = diagnostics.get("fallback")
    if isinstance(fallback, Mapping) and fallback.get("reason"):
        run["fallback"] = f"{fallback.get('to', '')}: {fallback['reason']}"
    recorded = people_items({k: v for k, v in filterbank_json.items()
                             if k not in ("channels", "settings", "job")})
    tuned = _what_was_tuned(filterbank_json, diagnostics, channels)
    body = f"""
<header><h1>burstlens report: tuned time–frequency filterbank</h1>
<p class="tuned" id="tuned">{_e(tuned)}</p>
<p class="aid">An analysis aid, not a safety or warning system: see the cautions below.</p></header>
{_verdict(diagnostics)}
<nav><a href="#examples">Example bursts</a><a href="#channels">Channels</a>\
<a href="#tiling">Tiling and convergence</a><a href="#judgement">Judgement in numbers</a>\
<a href="#cautions">Cautions</a><a href="#details">Settings and files</a></nav>
<main>
<section id="examples"><h2>Example bursts: best plain spectrogram against the tuned filterbank</h2>
{_figure_html(figures["examples"])}</section>
<section id="channels"><h2>Channels</h2>
<p class="muted">One row per channel: the Gaussian window each channel amounts to, how much finer
(super-resolution) or coarser (smoothing) than a spectrogram its time–frequency cell is, the
sweep rate it is matched to, and how stable its window and cell area were when refitted on
resampled windows.</p>
{_channel_table(channels, diagnostics)}
{_figure_html(figures["channels"])}</section>
<section id="tiling"><h2>Tiling and convergence</h2>
{_figure_html(figures["tiling"])}{_figure_html(figures["convergence"])}</section>
<section id="judgement"><h2>Judgement in numbers</h2>
{_headline(filterbank_json, diagnostics, channels)}
<div class="columns">
<div><h3>On held-out windows</h3>{_judgement_table(diagnostics)}</div>
<div>{_figure_html(figures["baselines"])}</div>
</div></section>
<section id="cautions"><h2>Cautions</h2>{"".join(f"<p>{_e(c)}</p>" for c in CAUTIONS)}</section>
<details id="details"><summary>Settings, defaults chosen from the data, and files</summary>
<div class="columns">
<div><h3>Site corpus</h3>{_corpus_summary(corpus)}
<h3>Run</h3>{_kv_table(run)}</div>
<div><h3>Windows</h3>{_kv_table(_window_counts(windows_info))}
<h4>Rejected windows by reason</h4>{_rejections(windows_info, corpus)}</div>
</div>
{_settings_section(recorded_run.settings, given, recorded_run.reader_defaults)}
{_trace_table(corpus)}
<h3>Recorded in the filterbank file</h3>
{_setting_cells((*i, None) for i in recorded)}
</details>
</main>
<footer>Generated by burstlens {_e(diagnostics.get("version", ""))}. \
This page is self-contained: it loads nothing from the network.</footer>"""
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
            "<meta http-equiv=\"Content-Security-Policy\" content=\"default-src 'none'; "
            "img-src data:; style-src 'unsafe-inline'\">"
            "<link rel=\"icon\" href=\"data:,\">"  # no favicon request when served over HTTP
            f"<title>burstlens report: {_e(tuned)}</title><style>{STYLE}</style></head>"
            f"<body>{body}\n</body></html>\n")
