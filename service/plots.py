"""Report plots: pure functions from data to a matplotlib ``Figure``, and a PNG encoder.

Every function here takes plain arrays and dicts (no files, no global pyplot state) and returns
a new ``matplotlib.figure.Figure`` drawn with the Agg canvas, so it is safe to call from worker
threads of the service. ``figure_png(fig)`` turns a figure into PNG bytes and releases it.

Units on every axis: time in milliseconds (ms) or seconds (s) as labelled, frequency in hertz
(Hz), chirp rate in hertz per second (Hz/s), entropies in bits. Colour maps are the
perceptually uniform, colour-vision-deficiency-safe ``viridis`` (images) and ``cividis``
(cell-area colouring); categorical colours come from the Okabe & Ito palette ("Color Universal
Design", 2008).
"""
from __future__ import annotations

import io
import math
from collections.abc import Mapping, Sequence

import matplotlib
import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.cm import ScalarMappable
from matplotlib.colors import LogNorm
from matplotlib.figure import Figure
from matplotlib.patches import Polygon
from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter

# Okabe & Ito (2008) categorical palette, distinguishable under the common colour-vision deficiencies.
PALETTE = ("#0072B2", "#E69F00", "#009E73", "#CC79A7", "#56B4E9", "#D55E00", "#F0E442", "#000000")
IMAGE_CMAP = "viridis"
AREA_CMAP = "cividis"
GRID_COLOUR = "#d9d9d9"
TEXT_COLOUR = "#222222"
DYNAMIC_RANGE_DB = 30.0

CHANNEL_GID = "channel-ellipse"
REFERENCE_GID = "heisenberg-reference"


def figure_png(fig: Figure, dpi: int = 110) -> bytes:
    """Render ``fig`` to PNG bytes with the Agg canvas (white background) and release it.

    Calls the canvas directly: ``Figure.savefig`` would draw a figure with a layout engine twice.
    """
    canvas = fig.canvas if isinstance(fig.canvas, FigureCanvasAgg) else FigureCanvasAgg(fig)
    fig.set_dpi(dpi)
    fig.patch.set_facecolor("white")
    buffer = io.BytesIO()
    canvas.print_png(buffer)
    fig.clear()
    return buffer.getvalue()


def _new_figure(width_in: float, height_in: float) -> Figure:
    fig = Figure(figsize=(width_in, height_in), layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def _plain(ax) -> None:
    """Our plain axes style: light grid behind the data, no top/right frame."""
    ax.grid(True, color=GRID_COLOUR, linewidth=0.6)
    ax.set_axisbelow(True)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    ax.tick_params(labelsize=8.5, colors=TEXT_COLOUR)
    ax.xaxis.label.set_size(9.5)
    ax.yaxis.label.set_size(9.5)


def _plain_log_ticks(axis) -> None:
    """Log axis labelled 1, 2, 5, 10, 20, … in plain numbers instead of powers of ten."""
    label = FuncFormatter(lambda value, _pos: f"{value:g}")
    axis.set_major_locator(LogLocator(base=10.0, subs=(1.0, 2.0, 5.0)))
    axis.set_major_formatter(label)
    axis.set_minor_formatter(NullFormatter())


def literal(text) -> str:
    """Caller text shown as is: a ``$`` would otherwise start matplotlib mathtext."""
    return str(text).replace("$", r"\$")


def _as_1d(name: str, values, length: int | None = None) -> np.ndarray:
    array = np.asarray(values, dtype=float).reshape(-1)
    if length is not None and array.size != length:
        raise ValueError(f"{name}: expected {length} values, got {array.size}")
    if not np.all(np.isfinite(array)):
        raise ValueError(f"{name}: values must be finite, got {array.tolist()}")
    return array


# ---------------------------------------------------------------------------------------------
# Tiling of the time-frequency plane
# ---------------------------------------------------------------------------------------------

def kernel_covariance(time_spread_s: float, cell_area: float, chirp_hz_per_s: float) -> np.ndarray:
    """Covariance (2 × 2, units s², s·Hz, Hz²) of a channel's Gaussian kernel in the t–f plane.

    From docs/design.md §3: a = 4π σ_t σ_f √(1−ρ²) and β = ρ σ_f / σ_t, so the covariance
    [[σ_t², ρσ_tσ_f], [ρσ_tσ_f, σ_f²]] equals [[σ_t², βσ_t²], [βσ_t², (a/4πσ_t)² + β²σ_t²]].
    """
    s2 = time_spread_s**2
    conditional = cell_area / (4.0 * np.pi * time_spread_s)  # σ_f √(1−ρ²), Hz
    return np.array([[s2, chirp_hz_per_s * s2],
                     [chirp_hz_per_s * s2, conditional**2 + chirp_hz_per_s**2 * s2]])


def sigma_ellipse(center_hz: float, time_spread_s: float, cell_area: float,
                  chirp_hz_per_s: float, points: int = 96) -> np.ndarray:
    """(points, 2) outline (t in s, f in Hz) of the 1-σ ellipse {x : xᵀ Σ⁻¹ x = 1} at (0, f_c).

    Uses the Cholesky factor of the kernel covariance: x = L·(cos φ, sin φ), with
    L = [[σ_t, 0], [β σ_t, a/(4π σ_t)]] — exact, no eigen-decomposition of badly scaled units.
    """
    phi = np.linspace(0.0, 2.0 * np.pi, points, endpoint=False)
    conditional = cell_area / (4.0 * np.pi * time_spread_s)
    t = time_spread_s * np.cos(phi)
    f = chirp_hz_per_s * time_spread_s * np.cos(phi) + conditional * np.sin(phi)
    return np.column_stack([t, center_hz + f])


def area_norm(cell_area: np.ndarray) -> LogNorm:
    """Log colour scale symmetric about a = 1, so the Heisenberg cell is always the middle colour."""
    reach = max(float(np.max(np.abs(np.log(cell_area)))), np.log(2.0))
    return LogNorm(vmin=np.exp(-reach), vmax=np.exp(reach))


def tiling_figure(center_hz, time_spread_s, cell_area, chirp_hz_per_s) -> Figure:
    """One 1-σ ellipse per channel in the t–f plane, coloured by cell area, with a = 1 reference.

    Inputs are (C,) arrays in Hz, s, dimensionless and Hz/s. Each channel's kernel is centred at
    t = 0 and its centre frequency; the dashed reference to the right is the Heisenberg cell
    (a = 1, no chirp) at the median channel's time spread and frequency. The frequency axis is
    log or linear by :func:`frequency_scale`. Channel patches carry gid ``channel-ellipse``, the
    reference ``heisenberg-reference``.
    """
    fc = _as_1d("center_hz", center_hz)
    count = fc.size
    st = _as_1d("time_spread_s", time_spread_s, count)
    area = _as_1d("cell_area", cell_area, count)
    beta = _as_1d("chirp_hz_per_s", chirp_hz_per_s, count)
    if count == 0:
        raise ValueError("center_hz: a filterbank needs at least one channel")
    for name, values in (("time_spread_s", st), ("cell_area", area)):
        if np.any(values <= 0):
            bad = int(np.flatnonzero(values <= 0)[0])
            raise ValueError(f"{name}[{bad}]={values[bad]!r} must be > 0")

    fig = _new_figure(7.2, 5.0)
    ax = fig.add_subplot()
    norm = area_norm(area)
    colours = matplotlib.colormaps[AREA_CMAP](norm(area))
    # Draw the widest kernels first so narrow ones stay visible on top.
    for c in np.argsort(-st * area):
        outline = sigma_ellipse(fc[c], st[c], area[c], beta[c])
        outline[:, 0] *= 1e3  # s -> ms
        ax.add_patch(Polygon(outline, closed=True, facecolor=(*colours[c][:3], 0.42),
                             edgecolor=colours[c], linewidth=1.0, gid=CHANNEL_GID))

    t_reach_ms = 1e3 * float(np.max(st))
    ref_st = float(np.median(st))
    ref_fc = float(fc[np.argmin(np.abs(fc - np.median(fc)))])
    reference = sigma_ellipse(ref_fc, ref_st, 1.0, 0.0)
    reference[:, 0] = reference[:, 0] * 1e3 + 2.4 * t_reach_ms
    ax.add_patch(Polygon(reference, closed=True, fill=False, edgecolor="black", linestyle="--",
                         linewidth=1.3, gid=REFERENCE_GID,
                         label=f"Heisenberg cell a = 1 (window std {1e3 * math.sqrt(2.0) * ref_st:.3g} ms)"))

    half_f = np.array([np.sqrt(kernel_covariance(s, a, b)[1, 1]) for s, a, b in zip(st, area, beta, strict=True)])
    ax.set_xlim(-1.4 * t_reach_ms, 2.4 * t_reach_ms + 1.4 * 1e3 * ref_st)
    low, high = float(np.min(fc - 1.3 * half_f)), float(np.max(fc + 1.3 * half_f))
    if frequency_scale(fc) == "log":  # the same frequency axis as the report's other plots
        ax.set_yscale("log")
        ax.set_ylim(max(low, 0.5 * float(np.min(fc))), high)
        _plain_log_ticks(ax.yaxis)
    else:
        ax.set_ylim(max(0.0, low), high)
    ax.axvline(0.0, color="#999999", linewidth=0.8, zorder=0)
    ax.set_xlabel("time relative to the kernel centre (ms)")
    ax.set_ylabel("frequency (Hz)")
    ax.set_title(f"Tiling of the time–frequency plane: {count} channels, 1-σ kernels",
                 fontsize=10.5, loc="left")
    ax.legend(loc="upper right", fontsize=8.5, frameon=False)
    _plain(ax)
    mappable = ScalarMappable(norm=norm, cmap=AREA_CMAP)
    bar = fig.colorbar(mappable, ax=ax, pad=0.01)
    bar.set_label("cell area a (1 = Heisenberg cell, < 1 super-resolved)", fontsize=8.5)
    bar.ax.tick_params(labelsize=8)
    _plain_log_ticks(bar.ax.yaxis)
    return fig


# ---------------------------------------------------------------------------------------------
# Example bursts: waveform, best spectrogram, learned representation
# ---------------------------------------------------------------------------------------------

def _to_db(image: np.ndarray, peak: float) -> np.ndarray:
    """Power re. ``peak`` in dB, floored at −DYNAMIC_RANGE_DB (negative values go to the floor)."""
    floor = peak * 10.0 ** (-DYNAMIC_RANGE_DB / 10.0)
    return 10.0 * np.log10(np.maximum(image, floor) / peak)


def example_figure(times_s, waveforms, spectrograms, learned, center_hz,
                   labels: Sequence[str], spectrogram_label: str = "best spectrogram",
                   trigger_s: Sequence[float | None] | None = None,
                   amplitude_label: str = "amplitude (as recorded)") -> Figure:
    """K example windows as rows of (waveform, best spectrogram, learned representation).

    ``times_s`` (N,) s; ``waveforms`` (K, N) in the recorded amplitude units, named by
    ``amplitude_label``; ``spectrograms`` and ``learned`` (K, C, N) channel outputs at
    ``center_hz`` (C,) Hz. In each row both images are normalised to unit sum (as the sharpness
    criteria see them) and drawn in dB re. the larger of the two peaks with one 30 dB colour
    range, on identical time and frequency axes, each panel with its own colour bar; values
    below the range, including the negative values of super-resolved channels, take the lowest
    colour. The frequency axis is log or linear by :func:`frequency_scale`, as in every plot
    of the report. ``labels`` (K,) name the rows; ``trigger_s`` (K,) the trigger onset of each
    row in s from the window start (None: unknown), drawn on the waveform as a dashed line
    (gid ``trigger``). Image meshes carry gid ``image:spectrogram`` and ``image:learned``.
    """
    t = _as_1d("times_s", times_s)
    fc = _as_1d("center_hz", center_hz)
    wave = np.asarray(waveforms, dtype=float)
    spec = np.asarray(spectrograms, dtype=float)
    mine = np.asarray(learned, dtype=float)
    rows = wave.shape[0]
    if wave.ndim != 2 or wave.shape[1] != t.size:
        raise ValueError(f"waveforms: expected shape (K, {t.size}), got {wave.shape}")
    for name, image in (("spectrograms", spec), ("learned", mine)):
        if image.shape != (rows, fc.size, t.size):
            raise ValueError(f"{name}: expected shape {(rows, fc.size, t.size)}, got {image.shape}")
    if len(labels) != rows or rows == 0:
        raise ValueError(f"labels: expected {rows} row labels, got {len(labels)}")
    triggers = [None] * rows if trigger_s is None else list(trigger_s)
    if len(triggers) != rows:
        raise ValueError(f"trigger_s: expected {rows} onsets (or None), got {len(triggers)}")

    fig = _new_figure(10.5, 2.75 * rows)
    rows_of = fig.subfigures(rows, 1, squeeze=False)[:, 0]
    t_ms = 1e3 * t
    log = frequency_scale(fc) == "log"
    for r, row in enumerate(rows_of):
        row.suptitle(literal(labels[r]), x=0.01, ha="left", fontsize=9.5, fontweight="bold")
        ax_w, ax_s, ax_l = row.subplots(1, 3, width_ratios=[1.0, 1.2, 1.2])
        ax_w.plot(t_ms, wave[r], color=PALETTE[0], linewidth=0.8)
        onset = triggers[r]
        if onset is not None and math.isfinite(float(onset)):
            ax_w.axvline(1e3 * float(onset), color=PALETTE[5], linestyle="--", linewidth=1.2,
                         label="trigger", gid="trigger")
            ax_w.legend(loc="upper right", fontsize=7.5, frameon=False)
        ax_w.set_xlim(t_ms[0], t_ms[-1])
        ax_w.set_title("waveform", fontsize=9.5, loc="left")
        ax_w.set_ylabel(literal(amplitude_label))
        ax_w.set_xlabel("time in window (ms)")
        _plain(ax_w)
        pair = []
        for image in (spec[r], mine[r]):
            total = float(np.sum(image))
            pair.append(image / total if total > 0 else image)
        peak = max(float(np.max(pair[0])), float(np.max(pair[1])))
        if not peak > 0:
            peak = 1.0
        for ax, image, title, kind in zip((ax_s, ax_l), pair,
                                          (literal(spectrogram_label), "learned filterbank"),
                                          ("spectrogram", "learned"), strict=True):
            mesh = ax.pcolormesh(t_ms, fc, _to_db(image, peak), shading="nearest",
                                 cmap=IMAGE_CMAP, vmin=-DYNAMIC_RANGE_DB, vmax=0.0,
                                 rasterized=True, gid=f"image:{kind}")
            ax.set_xlim(t_ms[0], t_ms[-1])
            ax.set_title(title, fontsize=9.5, loc="left")
            ax.set_xlabel("time in window (ms)")
            ax.set_ylabel("frequency (Hz)")
            ax.tick_params(labelsize=8.5)
            if log:
                ax.set_yscale("log")
                _plain_log_ticks(ax.yaxis)
            bar = row.colorbar(mesh, ax=ax, pad=0.01, fraction=0.06)
            bar.set_label("dB re. row peak", fontsize=8)
            bar.ax.tick_params(labelsize=7.5)
        ax_l.sharey(ax_s)
    return fig


def frequency_scale(center_hz) -> str:
    """The frequency axis of every report plot: "log" when the channels span more than a
    decade (log-spaced grids), else "linear" — one choice for one filterbank."""
    fc = np.asarray(center_hz, dtype=float)
    return "log" if np.min(fc) > 0 and np.max(fc) / np.min(fc) > 10.0 else "linear"


# ---------------------------------------------------------------------------------------------
# Convergence
# ---------------------------------------------------------------------------------------------

def _objective(value) -> float:
    """A recorded objective as float; None (how JSON stores an invalid +inf score) is +inf."""
    return math.inf if value is None else float(value)


def convergence_figure(evaluations: Sequence[Mapping], best_so_far: Sequence[Mapping],
                       stop_reason: str, objective_label: str = "objective (bits)") -> Figure:
    """Objective of every evaluation (markers, one line per stage) and best so far per stage.

    ``evaluations``: dicts with ``stage`` and ``objective`` (None or +inf for an invalid
    candidate), in evaluation order, drawn at x = 1..E. ``best_so_far``: dicts with
    ``evaluation`` (0-based index into ``evaluations``), ``stage`` and ``objective``, drawn as a
    step line per stage that runs on to the stage's last evaluation. Invalid evaluations are
    drawn as open triangles on the top edge. The stop reason is a dotted vertical line after the
    last evaluation. Gids: ``evaluations:<stage>``, ``best:<stage>``, ``invalid``, ``stop``.
    """
    if not evaluations:
        raise ValueError("evaluations: the search recorded no evaluations to plot")
    stage_of = [str(e["stage"]) for e in evaluations]
    stages = list(dict.fromkeys(stage_of))
    objective = np.array([_objective(e.get("objective")) for e in evaluations])
    x = np.arange(1, objective.size + 1)
    finite = np.isfinite(objective)
    fig = _new_figure(9.0, 4.0)
    ax = fig.add_subplot()
    for s, stage in enumerate(stages):
        colour = PALETTE[s % len(PALETTE)]
        mask = np.array([name == stage for name in stage_of])
        y = np.where(finite, objective, np.nan)[mask]
        ax.plot(x[mask], y, linestyle="none", marker="o", markersize=3.2, alpha=0.6,
                color=colour, label=f"evaluations, {literal(stage)} ({int(mask.sum())})",
                gid=f"evaluations:{stage}")
        best = [b for b in best_so_far if str(b["stage"]) == stage]
        if best:
            bx = [float(b["evaluation"]) + 1.0 for b in best]
            by = [float(b["objective"]) for b in best]
            last = float(x[mask][-1])
            if last > bx[-1]:  # hold the final level to the end of the stage
                bx.append(last)
                by.append(by[-1])
            ax.step(bx, by, where="post", color=colour, linewidth=1.8,
                    label=f"best so far, {literal(stage)}", gid=f"best:{stage}")
    if np.any(finite):
        lo, hi = float(np.min(objective[finite])), float(np.max(objective[finite]))
        pad = 0.05 * (hi - lo) if hi > lo else 0.5
        ax.set_ylim(lo - pad, hi + 3 * pad)
    if not np.all(finite):
        top = ax.get_ylim()[1]
        ax.plot(x[~finite], np.full(int((~finite).sum()), top), linestyle="none", marker="^",
                markerfacecolor="none", color="#555555", clip_on=False,
                label=f"invalid (+inf), {int((~finite).sum())}", gid="invalid")
    ax.axvline(objective.size + 0.5, color="black", linestyle=":", linewidth=1.2, gid="stop")
    ax.annotate(f"stop: {literal(stop_reason)}", xy=(objective.size + 0.5, 1.0),
                xycoords=("data", "axes fraction"), xytext=(-4, -4), textcoords="offset points",
                ha="right", va="top", fontsize=9, color=TEXT_COLOUR)
    ax.set_xlim(0.5, objective.size + 1.0)
    ax.set_xlabel("evaluation (count)")
    ax.set_ylabel(objective_label)
    ax.set_title("Convergence of the search (lower is sharper)", fontsize=10.5, loc="left")
    ax.legend(fontsize=8, frameon=False, loc="upper left", bbox_to_anchor=(1.01, 1.0))
    _plain(ax)
    return fig


# ---------------------------------------------------------------------------------------------
# Per-channel parameters against frequency
# ---------------------------------------------------------------------------------------------

def channel_parameters_figure(center_hz, time_spread_s, cell_area, chirp_hz_per_s,
                              bands: Mapping[str, np.ndarray] | None = None) -> Figure:
    """Window std (ms), cell area and chirp rate (Hz/s) of each channel against frequency (Hz).

    Arrays are (C,); the time spread σ_t (s) is drawn as the Gaussian window's std s = √2·σ_t
    in ms, bands too. ``bands`` maps ``time_spread_s`` / ``cell_area`` / ``chirp_hz_per_s`` to a
    (C, 2) array of [low, high] bootstrap limits, drawn as a shaded band (gid ``band:<field>``)
    around the fitted line (gid ``value:<field>``) with a bar per channel (gid
    ``interval:<field>``); NaN rows (channels without an interval) leave a gap. Missing bands
    are simply not drawn.
    """
    fc = _as_1d("center_hz", center_hz)
    count = fc.size
    fields = (
        # the Gaussian window's std s = √2·σ_t, the one window spread of the report
        ("time_spread_s", _as_1d("time_spread_s", time_spread_s, count), 1e3 * math.sqrt(2.0),
         "Gaussian window std s (ms)"),
        ("cell_area", _as_1d("cell_area", cell_area, count), 1.0, "cell area a"),
        ("chirp_hz_per_s", _as_1d("chirp_hz_per_s", chirp_hz_per_s, count), 1.0, r"chirp rate $\beta$ (Hz/s)"),
    )
    bands = bands or {}
    fig = _new_figure(7.6, 6.4)
    axes = fig.subplots(3, 1, sharex=True)
    for s, (ax, (field, values, scale, label)) in enumerate(zip(axes, fields, strict=True)):
        colour = PALETTE[s]
        band = bands.get(field)
        if band is not None:
            band = np.asarray(band, dtype=float)
            if band.shape != (count, 2):
                raise ValueError(f"bands[{field!r}]: expected shape ({count}, 2), got {band.shape}")
            known = np.isfinite(band).all(axis=1)  # channels without an interval leave a gap
            ax.fill_between(fc, scale * np.where(known, band[:, 0], np.nan),
                            scale * np.where(known, band[:, 1], np.nan), where=known,
                            color=colour, alpha=0.22, linewidth=0, label="bootstrap interval",
                            gid=f"band:{field}")
            # a bar per channel too, so an interval between two gaps stays visible
            ax.vlines(fc[known], scale * band[known, 0], scale * band[known, 1], color=colour,
                      alpha=0.55, linewidth=1.0, gid=f"interval:{field}")
        ax.plot(fc, scale * values, color=colour, marker="o", markersize=2.8, linewidth=1.2,
                label="fitted", gid=f"value:{field}")
        if field == "cell_area":
            ax.axhline(1.0, color="black", linestyle="--", linewidth=0.9,
                       label="Heisenberg minimum (a = 1)")
        if field == "chirp_hz_per_s":
            ax.axhline(0.0, color="#777777", linewidth=0.8)
        if field in ("time_spread_s", "cell_area") and np.all(values > 0):
            low = np.min(values) if band is None else min(np.min(values), np.nanmin(band[:, 0]))
            if low > 0:
                ax.set_yscale("log")
                _plain_log_ticks(ax.yaxis)
        ax.set_ylabel(label)
        if field != "chirp_hz_per_s":  # one key for the line and band, one for the a = 1 line
            handles, names = ax.get_legend_handles_labels()
            keep = [(h, n) for h, n in zip(handles, names, strict=True) if s == 0 or n.startswith("Heisenberg")]
            ax.legend(*zip(*keep, strict=True), fontsize=8, loc="best", frameon=True, framealpha=0.85,
                      edgecolor="none")
        _plain(ax)
    if frequency_scale(fc) == "log":
        axes[-1].set_xscale("log")
        _plain_log_ticks(axes[-1].xaxis)
    axes[-1].set_xlabel("channel centre frequency (Hz)")
    axes[0].set_title("Per-channel parameters with bootstrap intervals", fontsize=10.5, loc="left")
    return fig


# ---------------------------------------------------------------------------------------------
# Baselines
# ---------------------------------------------------------------------------------------------

def baselines_figure(entries: Sequence[Mapping], objective_label: str = "objective (bits)",
                     gain_bits: float | None = None) -> Figure:
    """Objective of each baseline and of the result, as a point with its interval.

    ``entries``: dicts with ``label``, ``objective`` and optional ``low``/``high`` (same units
    as the objective), ``is_result`` (bool, drawn in the highlight colour) and ``excluded`` (the
    reason a baseline was not eligible, e.g. its negative mass: drawn as an open grey marker,
    labelled "excluded: <reason>", gid ``excluded``). One error-bar container per entry, top to
    bottom in the given order.
    """
    if not entries:
        raise ValueError("entries: no baselines to plot")
    fig = _new_figure(8.4, 0.55 * len(entries) + 0.3 * sum(bool(e.get("excluded")) for e in entries)
                      + 1.6)
    ax = fig.add_subplot()
    rows = np.arange(len(entries))[::-1]
    for y, entry in zip(rows, entries, strict=True):
        value = float(entry["objective"])
        low = entry.get("low")
        high = entry.get("high")
        excluded = entry.get("excluded")
        colour = "#767676" if excluded else PALETTE[5] if entry.get("is_result") else PALETTE[0]
        err = None
        if low is not None and high is not None and np.isfinite([low, high]).all():
            err = np.array([[max(value - float(low), 0.0)], [max(float(high) - value, 0.0)]])
        ax.errorbar([value], [y], xerr=err, fmt="D" if entry.get("is_result") else "o",
                    color=colour, capsize=4, markersize=6, linewidth=1.4,
                    markerfacecolor="white" if excluded else colour,
                    gid="excluded" if excluded else None)
    labels = [literal(e["label"]) + (f"\nexcluded: {literal(e['excluded'])}" if e.get("excluded")
                                     else "") for e in entries]
    ax.set_yticks(rows, labels, fontsize=8.5)
    ax.set_xlabel(objective_label)
    ax.set_ylim(-0.7, len(entries) - 0.3)
    title = "Baselines scored on the same windows (lower is sharper)"
    if gain_bits is not None and np.isfinite(gain_bits):
        title += f"\ngain of the result over the best spectrogram: {gain_bits:+.3f} bits"
    ax.set_title(title, fontsize=10.5, loc="left")
    _plain(ax)
    ax.grid(False, axis="y")
    return fig
