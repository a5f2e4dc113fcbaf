"""Each report plot draws what it claims from the data it is given (service/plots.py).

These tests check drawing, not science: the inputs are small hand-made arrays that follow the
shapes and units of the filterbank JSON and the diagnostics (DEVELOPERS.md).
"""
import io

import matplotlib
import numpy as np
import pytest
from matplotlib.collections import PolyCollection, QuadMesh
from matplotlib.colors import to_rgba

from burstlens.service import plots

CENTER_HZ = np.array([40.0, 80.0, 160.0, 320.0, 640.0, 1280.0, 1800.0])
TIME_SPREAD_S = np.array([0.020, 0.012, 0.008, 0.005, 0.003, 0.002, 0.0015])
CELL_AREA = np.array([0.5, 0.8, 1.0, 1.0, 1.6, 2.5, 0.3])
CHIRP_HZ_PER_S = np.array([0.0, 500.0, -800.0, 0.0, 2000.0, 0.0, -3000.0])


def _patches(fig, gid):
    return [p for ax in fig.axes for p in ax.patches if p.get_gid() == gid]


def test_kernel_covariance_reproduces_cell_area_and_chirp():
    """The kernel covariance has 4π√det Σ = a and conditional-mean slope Σ_tf/Σ_tt = β, as the
    definitions a = 4π σ_t σ_f √(1−ρ²), β = ρ σ_f/σ_t require (docs/design.md §3; Gaussian conditioning,
    common practice)."""
    for st, a, beta in zip(TIME_SPREAD_S, CELL_AREA, CHIRP_HZ_PER_S, strict=True):
        cov = plots.kernel_covariance(st, a, beta)
        assert 4 * np.pi * np.sqrt(np.linalg.det(cov)) == pytest.approx(a, rel=1e-9)
        assert cov[0, 1] / cov[0, 0] == pytest.approx(beta, rel=1e-12, abs=1e-9)
        assert np.sqrt(cov[0, 0]) == pytest.approx(st, rel=1e-12)


def test_sigma_ellipse_lies_on_the_one_sigma_contour():
    """Every outline point x (relative to the centre) satisfies xᵀ Σ⁻¹ x = 1, the 1-σ contour of
    a bivariate Gaussian (common practice)."""
    st, a, beta, fc = 0.004, 0.7, 1500.0, 300.0
    outline = plots.sigma_ellipse(fc, st, a, beta, points=64)
    rel = outline - np.array([0.0, fc])
    inv = np.linalg.inv(plots.kernel_covariance(st, a, beta))
    mahalanobis = np.einsum("ni,ij,nj->n", rel, inv, rel)
    np.testing.assert_allclose(mahalanobis, 1.0, rtol=1e-9)


def test_tiling_draws_one_ellipse_per_channel_coloured_by_area():
    """The tiling has exactly one ellipse per channel at its centre frequency, filled with the
    cividis colour of its cell area, a single dashed a = 1 reference, and axes with units
    (common practice for labelled scientific plots)."""
    fig = plots.tiling_figure(CENTER_HZ, TIME_SPREAD_S, CELL_AREA, CHIRP_HZ_PER_S)
    ellipses = _patches(fig, plots.CHANNEL_GID)
    assert len(ellipses) == CENTER_HZ.size
    assert len(_patches(fig, plots.REFERENCE_GID)) == 1
    centres = sorted(float(np.mean(p.get_xy()[:-1, 1])) for p in ellipses)
    np.testing.assert_allclose(centres, np.sort(CENTER_HZ), rtol=1e-9)
    norm = plots.area_norm(CELL_AREA)
    cmap = matplotlib.colormaps[plots.AREA_CMAP]
    by_centre = {round(float(np.mean(p.get_xy()[:-1, 1])), 6): p for p in ellipses}
    for fc, a in zip(CENTER_HZ, CELL_AREA, strict=True):
        edge = by_centre[round(fc, 6)].get_edgecolor()
        np.testing.assert_allclose(edge[:3], cmap(norm(a))[:3], atol=1e-6)
    # a = 1 maps to the middle of the colour scale whatever the spread of areas
    assert norm(1.0) == pytest.approx(0.5)
    ax = fig.axes[0]
    assert "(ms)" in ax.get_xlabel() and "(Hz)" in ax.get_ylabel()
    assert "cell area" in fig.axes[1].get_ylabel()
    assert fig.axes[0].get_legend() is not None


def test_tiling_shears_chirped_channels():
    """A chirped channel's ellipse leans with slope β: the frequency offset at the outline's
    extreme time equals β·σ_t (docs/design.md §3 kernel shear)."""
    fig = plots.tiling_figure([500.0], [0.005], [1.0], [4000.0])
    (ellipse,) = _patches(fig, plots.CHANNEL_GID)
    xy = ellipse.get_xy()[:-1]
    right = xy[np.argmax(xy[:, 0])]
    assert right[0] == pytest.approx(5.0, rel=1e-6)  # ms
    assert right[1] - 500.0 == pytest.approx(4000.0 * 0.005, rel=1e-6)


def test_tiling_rejects_mismatched_or_non_positive_input():
    """Bad arrays give a ValueError naming the field (project rule: clear errors)."""
    with pytest.raises(ValueError, match="time_spread_s"):
        plots.tiling_figure(CENTER_HZ, TIME_SPREAD_S[:-1], CELL_AREA, CHIRP_HZ_PER_S)
    with pytest.raises(ValueError, match="cell_area"):
        plots.tiling_figure([100.0], [0.01], [0.0], [0.0])


def _evaluations():
    rng = np.random.default_rng(3)
    evaluations = [{"stage": "family", "objective": float(v)} for v in 10 + rng.random(14)]
    evaluations += [{"stage": "refine", "objective": float(v)} for v in 9 + rng.random(9)]
    evaluations[4]["objective"] = None  # an invalid candidate, stored as JSON null
    best, so_far = [], {}
    for i, e in enumerate(evaluations):
        if e["objective"] is not None and e["objective"] < so_far.get(e["stage"], np.inf):
            so_far[e["stage"]] = e["objective"]
            best.append({"evaluation": i, "stage": e["stage"], "objective": e["objective"]})
    return evaluations, best


def test_convergence_draws_every_evaluation_and_best_so_far_per_stage():
    """Per-stage evaluation lines hold exactly the evaluation count in total, each stage has a
    best-so-far step line through its records (0-based evaluation index, drawn at index + 1),
    invalid (null) scores are marked, and the stop reason is annotated (common practice for
    optimisation traces)."""
    evaluations, best = _evaluations()
    fig = plots.convergence_figure(evaluations, best, "stall", objective_label="entropy (bits)")
    ax = fig.axes[0]
    lines = {line.get_gid(): line for line in ax.get_lines()}
    stage_lines = [line for gid, line in lines.items() if gid and gid.startswith("evaluations:")]
    assert len(stage_lines) == 2
    assert sum(len(line.get_xdata()) for line in stage_lines) == len(evaluations)
    family_x = lines["evaluations:family"].get_xdata()
    np.testing.assert_array_equal(family_x, np.arange(1, 15))
    last = {"family": 14, "refine": 23}  # 1-based x of each stage's last evaluation
    for stage in ("family", "refine"):
        records = [b for b in best if b["stage"] == stage]
        step = lines[f"best:{stage}"]
        levels = [b["objective"] for b in records]
        starts = [b["evaluation"] + 1 for b in records]
        if starts[-1] < last[stage]:  # the final level is held to the stage's end
            levels, starts = levels + levels[-1:], starts + [last[stage]]
        np.testing.assert_allclose(step.get_ydata(), levels)
        np.testing.assert_allclose(step.get_xdata(), starts)
    assert len(lines["invalid"].get_xdata()) == 1
    assert lines["stop"].get_xdata()[0] == pytest.approx(len(evaluations) + 0.5)
    assert any("stop: stall" in t.get_text() for t in ax.texts)
    assert ax.get_xlabel() == "evaluation (count)" and "(bits)" in ax.get_ylabel()


def test_convergence_requires_evaluations():
    """An empty evaluation list is refused with a message naming it (project rule)."""
    with pytest.raises(ValueError, match="evaluations"):
        plots.convergence_figure([], [], "budget")


def test_channel_parameters_draw_values_and_bootstrap_bands():
    """Three panels against frequency (Hz): the Gaussian window's std √2·σ_t in ms (docs/design.md §3:
    |h|² has time std σ_t), cell area with the a = 1 line, chirp in Hz/s; each with its fitted
    line and a band spanning the given [low, high] (common practice for interval plots)."""
    bands = {
        "time_spread_s": np.column_stack([TIME_SPREAD_S * 0.9, TIME_SPREAD_S * 1.2]),
        "cell_area": np.column_stack([CELL_AREA * 0.8, CELL_AREA * 1.1]),
        "chirp_hz_per_s": np.column_stack([CHIRP_HZ_PER_S - 200, CHIRP_HZ_PER_S + 300]),
    }
    fig = plots.channel_parameters_figure(CENTER_HZ, TIME_SPREAD_S, CELL_AREA, CHIRP_HZ_PER_S, bands)
    axes = fig.axes
    assert len(axes) == 3
    scales = {"time_spread_s": 1e3 * np.sqrt(2.0), "cell_area": 1.0, "chirp_hz_per_s": 1.0}
    values = {"time_spread_s": TIME_SPREAD_S, "cell_area": CELL_AREA, "chirp_hz_per_s": CHIRP_HZ_PER_S}
    for ax, field in zip(axes, scales, strict=True):
        (band,) = [c for c in ax.collections if c.get_gid() == f"band:{field}"]
        assert isinstance(band, PolyCollection)
        y = band.get_paths()[0].vertices[:, 1]
        assert y.min() == pytest.approx(scales[field] * bands[field][:, 0].min())
        assert y.max() == pytest.approx(scales[field] * bands[field][:, 1].max())
        (line,) = [ln for ln in ax.get_lines() if ln.get_gid() == f"value:{field}"]
        np.testing.assert_allclose(line.get_ydata(), scales[field] * values[field])
        np.testing.assert_allclose(line.get_xdata(), CENTER_HZ)
    assert "window std" in axes[0].get_ylabel() and "(ms)" in axes[0].get_ylabel()
    assert "cell area" in axes[1].get_ylabel()
    assert "(Hz/s)" in axes[2].get_ylabel()
    assert "(Hz)" in axes[2].get_xlabel()
    assert any(np.allclose(ln.get_ydata(), 1.0) for ln in axes[1].get_lines() if ln.get_gid() is None)


def test_channel_parameters_leave_gaps_for_channels_without_interval():
    """A channel with no interval (NaN, e.g. skipped for low energy) splits the band in two and
    gets no bar; the other channels keep theirs (nothing is invented)."""
    band = np.column_stack([TIME_SPREAD_S * 0.9, TIME_SPREAD_S * 1.1])
    band[3] = np.nan
    fig = plots.channel_parameters_figure(CENTER_HZ, TIME_SPREAD_S, CELL_AREA, CHIRP_HZ_PER_S,
                                          {"time_spread_s": band})
    ax = fig.axes[0]
    (fill,) = [c for c in ax.collections if c.get_gid() == "band:time_spread_s"]
    assert len(fill.get_paths()) == 2
    (bars,) = [c for c in ax.collections if c.get_gid() == "interval:time_spread_s"]
    assert len(bars.get_segments()) == CENTER_HZ.size - 1


def test_channel_parameters_without_bands_draw_no_band():
    """With no bootstrap record no band is drawn (nothing is invented), and a wrong band shape is
    refused naming the field (project rule)."""
    fig = plots.channel_parameters_figure(CENTER_HZ, TIME_SPREAD_S, CELL_AREA, CHIRP_HZ_PER_S)
    assert not [c for ax in fig.axes for c in ax.collections if str(c.get_gid()).startswith("band:")]
    with pytest.raises(ValueError, match="cell_area"):
        plots.channel_parameters_figure(CENTER_HZ, TIME_SPREAD_S, CELL_AREA, CHIRP_HZ_PER_S,
                                        {"cell_area": np.ones((3, 2))})


def test_example_rows_share_axes_and_colour_limits():
    """Each row draws the waveform as given, and the spectrogram and learned images on identical
    time/frequency axes with one colour range whose top (0 dB) is the row's peak (common
    practice for side-by-side image comparison)."""
    fs, n, rows = 1000.0, 128, 2
    t = np.arange(n) / fs
    rng = np.random.default_rng(5)
    waves = rng.standard_normal((rows, n))
    spec = rng.random((rows, CENTER_HZ.size, n))
    learned = rng.random((rows, CENTER_HZ.size, n)) ** 4
    learned[1, 2, 3] = -0.5  # super-resolved channels may go negative
    fig = plots.example_figure(t, waves, spec, learned, CENTER_HZ, ["first", "second"],
                               trigger_s=[0.032, None], amplitude_label="amplitude (counts)")
    meshes = [c for ax in fig.axes for c in ax.collections
              if isinstance(c, QuadMesh) and str(c.get_gid()).startswith("image:")]
    assert len(meshes) == 2 * rows
    for r in range(rows):
        a, b = meshes[2 * r], meshes[2 * r + 1]
        assert (a.get_gid(), b.get_gid()) == ("image:spectrogram", "image:learned")
        assert a.get_clim() == b.get_clim() == (-plots.DYNAMIC_RANGE_DB, 0.0)
        assert a.axes.get_xlim() == b.axes.get_xlim()
        assert a.axes.get_ylim() == b.axes.get_ylim()
        assert max(a.get_array().max(), b.get_array().max()) == pytest.approx(0.0)
        assert min(a.get_array().min(), b.get_array().min()) >= -plots.DYNAMIC_RANGE_DB - 1e-9
        assert "(Hz)" in a.axes.get_ylabel() and "(ms)" in a.axes.get_xlabel()
        # each image panel has its own colour bar, on the same 30 dB range
        bars = [ax for ax in a.axes.figure.axes if ax not in (a.axes, b.axes)
                and ax.get_ylabel() == "dB re. row peak"]
        assert len(bars) == 2
        assert a.axes.get_yscale() == b.axes.get_yscale() == plots.frequency_scale(CENTER_HZ)
    assert [sub.get_suptitle() for sub in fig.subfigs] == ["first", "second"]
    wave_axes = [ax for ax in fig.axes if ax.get_title(loc="left") == "waveform"]
    assert len(wave_axes) == rows
    assert wave_axes[0].figure is fig.subfigs[0]
    np.testing.assert_allclose(wave_axes[0].get_lines()[0].get_ydata(), waves[0])
    np.testing.assert_allclose(wave_axes[0].get_lines()[0].get_xdata(), 1e3 * t)
    # the trigger marker where the onset is known, in ms from the window start; none elsewhere
    (trigger,) = [ln for ln in wave_axes[0].get_lines() if ln.get_gid() == "trigger"]
    assert trigger.get_xdata()[0] == pytest.approx(32.0)
    assert not [ln for ln in wave_axes[1].get_lines() if ln.get_gid() == "trigger"]
    assert wave_axes[0].get_ylabel() == "amplitude (counts)"
    with pytest.raises(ValueError, match="learned"):
        plots.example_figure(t, waves, spec, learned[:, :3], CENTER_HZ, ["first", "second"])


def test_baselines_draw_one_interval_per_entry():
    """One point with its interval per baseline and for the result, in the given order, the
    result in its own colour, the gain in the title (common practice for interval plots)."""
    entries = [
        {"label": "best spectrogram", "objective": 10.2, "low": 10.0, "high": 10.5},
        {"label": "scalogram", "objective": 10.8, "low": None, "high": None},
        {"label": "pseudo-WVD", "objective": 9.4, "low": 9.1, "high": 9.6},
        {"label": "learned filterbank", "objective": 9.7, "low": 9.6, "high": 9.9, "is_result": True},
    ]
    fig = plots.baselines_figure(entries, objective_label="entropy (bits)", gain_bits=0.5)
    ax = fig.axes[0]
    assert len(ax.containers) == len(entries)
    assert [t.get_text() for t in ax.get_yticklabels()] == [e["label"] for e in entries]
    assert ax.get_yticklabels()[0].get_text() == "best spectrogram"
    for container, entry in zip(ax.containers, entries, strict=True):
        marker_x = container.lines[0].get_xdata()[0]
        assert marker_x == pytest.approx(entry["objective"])
        if entry["low"] is not None:
            segment = container.lines[2][0].get_segments()[0]
            assert sorted(segment[:, 0]) == pytest.approx([entry["low"], entry["high"]])
        else:
            assert not container.has_xerr
    result_colour = ax.containers[-1].lines[0].get_color()
    assert to_rgba(result_colour) != to_rgba(ax.containers[0].lines[0].get_color())
    assert "+0.500 bits" in ax.get_title(loc="left")
    assert "(bits)" in ax.get_xlabel()


def test_an_excluded_baseline_is_drawn_open_and_labelled():
    """A baseline marked excluded keeps its point, drawn open in grey, and its tick label says
    "excluded" with the reason; the others are drawn filled as before."""
    entries = [{"label": "best spectrogram", "objective": 10.2},
               {"label": "pseudo-WVD", "objective": 9.0, "excluded": "46 % of its mass is negative"},
               {"label": "learned filterbank", "objective": 9.7, "is_result": True}]
    ax = plots.baselines_figure(entries).axes[0]
    labels = [t.get_text() for t in ax.get_yticklabels()]
    assert labels[1] == "pseudo-WVD\nexcluded: 46 % of its mass is negative"
    assert labels[0] == "best spectrogram"
    marker = ax.containers[1].lines[0]
    assert to_rgba(marker.get_markerfacecolor()) == to_rgba("white")
    assert to_rgba(ax.containers[0].lines[0].get_markerfacecolor()) != to_rgba("white")


def test_every_plot_uses_one_frequency_scale():
    """The tiling, the channel parameters and the examples draw frequency on the same scale:
    log for channels spanning more than a decade, linear otherwise (one choice per filterbank)."""
    for centres in (CENTER_HZ, np.linspace(100.0, 400.0, CENTER_HZ.size)):
        scale = plots.frequency_scale(centres)
        count = centres.size
        tiling = plots.tiling_figure(centres, TIME_SPREAD_S, CELL_AREA, CHIRP_HZ_PER_S)
        assert tiling.axes[0].get_yscale() == scale
        params = plots.channel_parameters_figure(centres, TIME_SPREAD_S, CELL_AREA, CHIRP_HZ_PER_S)
        assert params.axes[-1].get_xscale() == scale
        t = np.arange(64) / 1000.0
        examples = plots.example_figure(t, np.zeros((1, 64)), np.ones((1, count, 64)),
                                        np.ones((1, count, 64)), centres, ["one"])
        images = [ax for ax in examples.axes if ax.get_ylabel() == "frequency (Hz)"]
        assert len(images) == 2 and all(ax.get_yscale() == scale for ax in images)
    assert plots.frequency_scale(CENTER_HZ) == "log"
    assert plots.frequency_scale(np.linspace(100.0, 400.0, 5)) == "linear"


def test_text_from_data_is_drawn_literally():
    """A ``$`` in data-supplied text (a trace id, a stop reason) is drawn as itself instead of
    starting matplotlib mathtext, which would fail to render (matplotlib mathtext docs)."""
    evaluations, best = _evaluations()
    fig = plots.convergence_figure(evaluations, best, "odd $reason^$")
    assert any(t.get_text() == r"stop: odd \$reason^\$" for t in fig.axes[0].texts)
    assert plots.figure_png(fig)[:8] == b"\x89PNG\r\n\x1a\n"
    fig = plots.baselines_figure([{"label": "XX.$S^$..HHZ", "objective": 1.0}])
    assert plots.figure_png(fig)[:8] == b"\x89PNG\r\n\x1a\n"


def test_figure_png_encodes_the_figure_at_its_size():
    """figure_png returns a PNG (signature per the PNG specification, ISO/IEC 15948) whose pixel
    size is figure size × dpi."""
    fig = plots.baselines_figure([{"label": "x", "objective": 1.0}])
    width, height = fig.get_size_inches()
    data = plots.figure_png(fig, dpi=50)
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    image = matplotlib.image.imread(io.BytesIO(data), format="png")
    assert abs(image.shape[0] - height * 50) <= 1 and abs(image.shape[1] - width * 50) <= 1
