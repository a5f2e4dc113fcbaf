"""Tests of search.filterbank: parameters, derived spreads, validation, JSON, families, grids."""
from __future__ import annotations

import json
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from burstlens.search import Channel, Filterbank, center_grid

FS = 4000.0


@settings(max_examples=60, deadline=None, derandomize=True)
@given(
    sigma=st.floats(1e-4, 1.0),
    area=st.floats(0.05, 20.0),
    chirp=st.floats(-1e5, 1e5),
)
def test_derived_spreads_invert(sigma, area, chirp):
    """σ_f, ρ derived from (σ_t, a, β) satisfy a = 4πσ_tσ_f√(1−ρ²), β = ρσ_f/σ_t and
    σ_f√(1−ρ²) = a/(4πσ_t), and from_spreads(σ_t, σ_f, ρ) gives back the same channel.
    Source: the parametrisation of a 2-D Gaussian by its covariance (docs/design.md §3; common practice)."""
    c = Channel(100.0, sigma, area, chirp)
    rho, sigma_f = c.correlation, c.freq_spread_hz
    assert abs(rho) < 1.0
    root = math.sqrt((1 - rho) * (1 + rho))
    tol = 1e-9 + 1e-14 / (1 - abs(rho))  # √(1−ρ²) is ill-conditioned as |ρ| → 1
    assert math.isclose(4 * math.pi * sigma * sigma_f * root, area, rel_tol=tol)
    assert math.isclose(rho * sigma_f / sigma, chirp, rel_tol=1e-9, abs_tol=1e-9)
    assert math.isclose(c.conditional_freq_spread_hz, sigma_f * root, rel_tol=tol)
    back = Channel.from_spreads(100.0, sigma, sigma_f, rho)
    assert math.isclose(back.cell_area, area, rel_tol=tol)
    assert math.isclose(back.chirp_hz_per_s, chirp, rel_tol=1e-9, abs_tol=1e-6)


@pytest.mark.parametrize(
    "make, field, value",
    [
        (lambda: Channel(float("nan"), 0.01), "center_hz", "nan"),
        (lambda: Channel(100.0, -0.01), "time_spread_s", "-0.01"),
        (lambda: Channel(100.0, 0.01, 0.0), "cell_area", "0.0"),
        (lambda: Channel(100.0, 0.01, -2.0), "cell_area", "-2.0"),
        (lambda: Channel(100.0, 0.01, 1.0, float("inf")), "chirp_hz_per_s", "inf"),
        (lambda: Channel.from_spreads(100.0, 0.01, 20.0, 1.0), "correlation", "1.0"),
        (lambda: Channel.from_spreads(100.0, 0.01, 20.0, -1.5), "correlation", "-1.5"),
        (lambda: Channel(2500.0, 0.01).validate(FS), "center_hz", "2500.0"),
        (lambda: Channel(2000.0, 0.01).validate(FS), "center_hz", "2000.0"),
        (lambda: Channel(0.0, 0.01), "center_hz", "0.0"),
    ],
)
def test_validation_names_field_and_value(make, field, value):
    """NaN centre, negative spread, cell area ≤ 0, |ρ| ≥ 1 and a centre at or above fs/2 each
    raise ValueError naming the field and the value. Common practice."""
    with pytest.raises(ValueError) as info:
        make()
    assert f"{field}={value}" in str(info.value)


def test_nyquist_message_and_channel_index():
    """A centre above fs/2 names the Nyquist frequency and, in a filterbank, the channel index.
    Common practice."""
    with pytest.raises(ValueError, match=r"channel 1: center_hz=2500.0 is at or above the "
                                         r"Nyquist frequency fs/2=2000.0"):
        Filterbank([Channel(100.0, 0.01), Channel(2500.0, 0.01)], FS)
    with pytest.raises(ValueError, match="sampling_rate_hz"):
        Filterbank([Channel(100.0, 0.01)], -1.0)
    with pytest.raises(ValueError, match="at least one channel"):
        Filterbank([], FS)


def test_equivalent_reading():
    """The reading for people: kind by cell area (|a−1| < 0.05 spectrogram, > 1 smoothed, < 1
    super-resolved by 1/a), window length = FWHM of h(u) = exp(−u²/4σ_t²) = 4√(ln 2)·σ_t, and a
    one-line text; a channel of chirp +β matches arrivals sweeping upward at β Hz/s (docs/design.md §3;
    test_transform checks it on a chirp). Source: Gaussian window conventions (common
    practice)."""
    e = Channel(100.0, 0.00375, 0.5, 800.0).equivalent()
    assert e["kind"] == "super-resolved"
    assert e["super_resolution"] == pytest.approx(2.0)
    assert e["window_ms"] == pytest.approx(4 * math.sqrt(math.log(2)) * 3.75)
    assert e["window_std_ms"] == pytest.approx(3.75)
    assert e["gaussian_std_ms"] == pytest.approx(3.75 * math.sqrt(2))
    assert e["text"] == ("Gaussian spectrogram window 12.5 ms, super-resolved ×2.0, chirp +800 Hz/s "
                         "(matches arrivals sweeping upward at 800 Hz/s)")
    assert e["matched_sweep_hz_per_s"] == 800.0
    assert Channel(100.0, 0.01, 1.03).equivalent()["kind"] == "spectrogram"
    smoothed = Channel(100.0, 0.01, 1.5, -2.5).equivalent()
    assert smoothed["kind"] == "smoothed spectrogram"
    assert smoothed["text"].endswith(
        "smoothed ×1.5, chirp -2.5 Hz/s (matches arrivals sweeping downward at 2.5 Hz/s)")
    assert smoothed["matched_sweep_hz_per_s"] == -2.5
    # the window really is the one whose |h|² has std σ_t: FWHM of h from its samples
    sigma = 0.01
    u = np.linspace(-0.05, 0.05, 200001)
    h = np.exp(-(u**2) / (4 * sigma**2))
    fwhm = u[h >= 0.5][-1] - u[h >= 0.5][0]
    assert Channel(100.0, sigma).equivalent()["window_ms"] == pytest.approx(fwhm * 1e3, rel=1e-4)


def test_json_round_trip():
    """to_json → json text → from_json gives an equal filterbank with its provenance, and the
    document carries format, version, derived spreads and the reading. Common practice."""
    fb = Filterbank([Channel(30.0, 0.02, 1.0), Channel(300.0, 0.004, 0.4, 1234.5),
                     Channel(1900.0, 0.002, 3.0, -50.0)], FS)
    doc = fb.to_json(window_samples=1024, criterion={"name": "renyi", "alpha": 3.0},
                     objective=7.25)
    text = json.dumps(doc)
    back = Filterbank.from_json(json.loads(text))
    assert back == fb and hash(back) == hash(fb)
    assert back.provenance == {"window_samples": 1024,
                               "criterion": {"name": "renyi", "alpha": 3.0}, "objective": 7.25}
    assert doc["format"] == "burstlens-filterbank" and doc["version"] == 3
    assert doc["steady_lines_hz"] == []
    assert "converted_from_version" not in back.provenance
    assert doc["sampling_rate_hz"] == FS
    assert doc["channels"][1]["correlation"] == pytest.approx(fb[1].correlation)
    assert doc["channels"][1]["equivalent"]["kind"] == "super-resolved"
    np.testing.assert_allclose(back.freq_spread_hz, fb.freq_spread_hz)
    # a channel may be given by its spreads instead of (cell_area, chirp)
    spread_only = {k: doc["channels"][1][k]
                   for k in ("center_hz", "time_spread_s", "freq_spread_hz", "correlation")}
    one = Filterbank.from_json({**doc, "channels": [spread_only]})
    assert one[0].cell_area == pytest.approx(0.4) and one[0].chirp_hz_per_s == pytest.approx(1234.5)


def _version_1(doc):
    """A version-1 document with the same channels as ``doc`` (version 2): version 1 stored
    chirp_hz_per_s and correlation with the opposite sign."""
    old = json.loads(json.dumps(doc))
    old["version"] = 1
    for channel in old["channels"]:
        channel["chirp_hz_per_s"] = -channel["chirp_hz_per_s"]
        channel["correlation"] = -channel["correlation"]
        channel["equivalent"]["matched_sweep_hz_per_s"] = -channel["chirp_hz_per_s"]
    return old


def test_version_1_loads_with_chirp_signs_negated():
    """A version-1 file (kernel written in lag coordinates u = t − t′, so its β and ρ carried
    the opposite sign) loads with chirp_hz_per_s and correlation negated, into the filterbank
    that sharpens the same arrivals; its provenance keeps the file's facts and adds
    converted_from_version = 1 and a note saying what was done; saving it again writes
    the current version, which reads back unchanged (no second negation). Channels given only by their
    spreads (freq_spread_hz, correlation) are converted too. Source: docs/design.md §3 and §8 (file
    versions); common practice for format migration."""
    fb = Filterbank([Channel(30.0, 0.02, 1.0), Channel(300.0, 0.004, 0.4, 1234.5),
                     Channel(1900.0, 0.002, 3.0, -50.0)], FS)
    old = _version_1(fb.to_json(window_samples=1024, objective=7.25))
    assert old["channels"][1]["chirp_hz_per_s"] == -1234.5
    assert old["channels"][1]["correlation"] < 0.0
    back = Filterbank.from_json(old)
    assert back == fb
    np.testing.assert_array_equal(back.chirp_hz_per_s, [0.0, 1234.5, -50.0])
    np.testing.assert_allclose(back.correlation, -np.array([c["correlation"]
                                                            for c in old["channels"]]))
    assert back.provenance["window_samples"] == 1024 and back.provenance["objective"] == 7.25
    assert back.provenance["converted_from_version"] == 1
    note = back.provenance["conversion_note"]
    assert "version 1" in note and "negated" in note and "chirp_hz_per_s" in note
    again = back.to_json()
    assert again["version"] == 3 and again["converted_from_version"] == 1
    assert again["channels"][1]["equivalent"]["matched_sweep_hz_per_s"] == 1234.5
    assert Filterbank.from_json(json.loads(json.dumps(again))) == fb
    spreads_only = {**old, "channels": [{k: old["channels"][1][k] for k in
                                         ("center_hz", "time_spread_s", "freq_spread_hz",
                                          "correlation")}]}
    one = Filterbank.from_json(spreads_only)[0]
    assert one.chirp_hz_per_s == pytest.approx(1234.5) and one.cell_area == pytest.approx(0.4)
    bad = _version_1(fb.to_json())
    bad["channels"][2]["chirp_hz_per_s"] = "fast"
    with pytest.raises(ValueError, match=r"channels\[2\].chirp_hz_per_s='fast'"):
        Filterbank.from_json(bad)


def test_version_3_round_trips_chirp_signs():
    """Version 3 is what to_json writes, and from_json reads it back with the same signs:
    chirp_hz_per_s, correlation and matched_sweep_hz_per_s all positive for an upward-matching
    channel, nothing converted. Source: docs/design.md §3 and §8; common practice."""
    fb = Filterbank([Channel(300.0, 0.004, 0.4, 1234.5), Channel(700.0, 0.01, 1.0, -300.0)], FS)
    doc = json.loads(json.dumps(fb.to_json()))
    assert doc["version"] == 3
    up, down = doc["channels"]
    assert up["chirp_hz_per_s"] == 1234.5 and up["correlation"] > 0.0
    assert up["equivalent"]["matched_sweep_hz_per_s"] == 1234.5
    assert down["correlation"] < 0.0 and "downward at 300 Hz/s" in down["equivalent"]["text"]
    back = Filterbank.from_json(doc)
    assert back == fb and back.provenance == {}
    np.testing.assert_array_equal(back.correlation, fb.correlation)


@pytest.mark.parametrize(
    "change, message",
    [
        (lambda d: d.update(format="other"), "format='other'"),
        (lambda d: d.update(version=4), "version=4"),
        (lambda d: d.update(steady_lines_hz=[50.0, FS]), r"steady_lines_hz\[1\]"),
        (lambda d: d.update(steady_lines_hz="50"), "steady_lines_hz must be a list"),
        (lambda d: d.update(version=True), "version=True"),
        (lambda d: d.pop("version"), "version=None"),
        (lambda d: d.pop("sampling_rate_hz"), "sampling_rate_hz is missing"),
        (lambda d: d.update(channels=[]), "channels must be a non-empty list"),
        (lambda d: d["channels"][0].pop("time_spread_s"),
         r"channels\[0\].time_spread_s is missing"),
        (lambda d: d["channels"][1].update(correlation=1.2), r"channels\[1\].correlation=1.2"),
        (lambda d: d["channels"][1].update(correlation=0.1),
         r"channels\[1\].correlation=0.1 disagrees"),
        (lambda d: d["channels"][0].update(freq_spread_hz=99.0),
         r"channels\[0\].freq_spread_hz=99.0 disagrees"),
        (lambda d: d["channels"][0].update(center_hz="x"), r"channels\[0\].center_hz='x'"),
        (lambda d: d["channels"][1].update(center_hz=2100.0),
         r"channels\[1\].center_hz=2100.0 is at or above"),
        (lambda d: d["channels"][0].update(cell_area=-1.0), r"channels\[0\].cell_area=-1.0"),
    ],
)
def test_from_json_names_bad_fields(change, message):
    """from_json rejects a wrong format or version, missing or non-finite fields, |ρ| ≥ 1 and
    derived fields that disagree with the parameters, naming the JSON path. Common practice."""
    doc = Filterbank([Channel(30.0, 0.02), Channel(300.0, 0.004, 0.4, 1234.5)], FS).to_json()
    change(doc)
    with pytest.raises(ValueError, match=message):
        Filterbank.from_json(doc)


def test_families():
    """constant_window: one σ_t, a = 1; constant_q: σ_t = cycles/f_c (σ_t·f_c constant, so the
    kernel spans the same number of periods, i.e. constant Q); constant_area: a chosen a.
    Common practice."""
    centers = center_grid((20.0, 1500.0), 12)
    window = Filterbank.constant_window(centers, 0.01, FS)
    assert np.all(window.time_spread_s == 0.01) and np.all(window.cell_area == 1.0)
    q = Filterbank.constant_q(centers, 3.0, FS)
    np.testing.assert_allclose(q.time_spread_s * q.center_hz, 3.0)
    # constant Q: bandwidth / centre frequency is the same for every channel
    np.testing.assert_allclose(q.freq_spread_hz / q.center_hz, 1 / (4 * np.pi * 3.0))
    area = Filterbank.constant_area(centers, np.linspace(0.002, 0.05, 12), 0.5, FS,
                                    chirp_hz_per_s=100.0)
    assert np.all(area.cell_area == 0.5) and np.all(area.chirp_hz_per_s == 100.0)
    assert area.center_hz.shape == area.correlation.shape == (12,)
    with pytest.raises(ValueError, match="channel 3: time_spread_s"):
        Filterbank.constant_area(centers, [0.01, 0.01, 0.01, -1.0] + [0.01] * 8, 1.0, FS)
    replaced = window.with_channel(2, Channel(50.0, 0.02))
    assert replaced[2] == Channel(50.0, 0.02) and replaced[3] == window[3]


def test_center_grid():
    """Centres include both band ends; 'log' has a constant ratio, 'linear' a constant step;
    bad bands, counts and spacings are named. Common practice."""
    log = center_grid((10.0, 1000.0), 5, "log")
    np.testing.assert_allclose(log, [10, 10**1.5, 100, 10**2.5, 1000])
    lin = center_grid((10.0, 1000.0), 4, "linear")
    np.testing.assert_allclose(np.diff(lin), 330.0)
    assert center_grid((10.0, 1000.0), 1)[0] == pytest.approx(100.0)
    with pytest.raises(ValueError, match="band_hz"):
        center_grid((100.0, 10.0), 5)
    with pytest.raises(ValueError, match="channels=0"):
        center_grid((10.0, 100.0), 0)
    with pytest.raises(ValueError, match="spacing='mel'"):
        center_grid((10.0, 100.0), 5, "mel")


def test_steady_lines_travel_with_the_filterbank_and_leave_before_the_transform():
    """A version-3 filterbank carries the site's steady lines and transform removes them first:
    a window holding a line and a burst transforms as the burst alone does (the line's fit is
    subtracted: D. E. Butler, R. D. Russell, Geophysics 58(6), 1993, from memory); the lines
    round-trip through JSON and take part in equality; a version-2 file loads with none
    (docs/design.md §8, file versions; common practice for format migration)."""
    from burstlens.search.tfd import prepare, transform

    fs, n = 2000.0, 1024
    t = np.arange(n) / fs
    burst = np.exp(-((t - 0.25) ** 2) / (4 * 0.006 ** 2)) * np.cos(2 * np.pi * 300.0 * t)
    line = 2.0 * np.cos(2 * np.pi * 50.0 * t + 0.3)
    channels = [Channel(f, 0.006) for f in np.linspace(40.0, 400.0, 12)]
    plain = Filterbank(channels, fs)
    cleaning = Filterbank(channels, fs, steady_lines_hz=[50.0])
    assert cleaning != plain
    clean = transform(burst[None] + line[None], cleaning)[0]
    alone = transform(burst[None], plain)[0]
    dirty = transform(burst[None] + line[None], plain)[0]
    assert np.abs(clean - alone).max() < 0.02 * alone.max() < np.abs(dirty - alone).max()
    doc = json.loads(json.dumps(cleaning.to_json()))
    assert doc["steady_lines_hz"] == [50.0]
    assert Filterbank.from_json(doc) == cleaning
    assert Filterbank.from_json({**doc, "version": 2}).steady_lines_hz == ()
    with pytest.raises(ValueError, match="steady lines"):
        transform(prepare(burst), cleaning)
