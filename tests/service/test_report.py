"""The job report (service/report/): self-contained HTML, escaped text, a faithful channel table.

Most tests use a small hand-built filterbank JSON and diagnostics dict that follow the documented
schema (DEVELOPERS.md, "Contracts between the pieces"); the example-burst test runs the project's
own transform on generated windows.
"""
import base64
import copy
import html
import re
from html.parser import HTMLParser

import numpy as np
import pytest

from burstlens.search import Channel, Filterbank
from burstlens.service import report

HOSTILE = '<script>alert("x")</script><img src=x onerror=alert(1)>'


class Page(HTMLParser):
    """Collects every start tag with its attributes, the channel table cells and visible text."""

    def __init__(self, text):
        super().__init__(convert_charrefs=True)
        self.tags, self.rows, self.text = [], [], []
        self._row, self._cell = None, None
        self.feed(text)

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        self.tags.append((tag, attrs))
        if tag == "tr" and "data-channel" in attrs:
            self._row = {"channel": int(attrs["data-channel"]), "cells": {}, "text": ""}
        if tag == "td" and self._row is not None and "data-field" in attrs:
            self._cell = {"field": attrs["data-field"], "value": attrs.get("data-value"), "text": ""}

    def handle_endtag(self, tag):
        if tag == "td" and self._cell is not None:
            self._row["cells"][self._cell["field"]] = self._cell
            self._cell = None
        if tag == "tr" and self._row is not None:
            self.rows.append(self._row)
            self._row = None

    def handle_data(self, data):
        self.text.append(data)
        if self._row is not None:
            self._row["text"] += data + " "
        if self._cell is not None:
            self._cell["text"] += data


def filterbank_json(channels=5):
    """A filterbank JSON written by the project's own Filterbank.to_json (docs/design.md §8)."""
    centres = np.geomspace(60.0, 900.0, channels)
    bank = Filterbank([Channel(float(fc), 0.006 * (fc / 60.0) ** -0.4, [0.6, 1.0, 1.4, 2.0, 0.8][i % 5],
                               100.0 * (i - 2)) for i, fc in enumerate(centres)], 2000.0)
    return bank.to_json(window_samples=256, criterion={"name": "renyi", "alpha": 3.0},
                        objective=9.1, corpus_hash="ab" * 32,
                        job={"id": "j-1", "settings": {"channels": channels}})


def diagnostics(channels=5, windows=6):
    rng = np.random.default_rng(11)
    evaluations = [{"stage": "family", "round": r, "params": {"q": -0.5}, "objective": 10 - 0.1 * r,
                    "seconds": 0.01} for r in range(8)]
    best = [{"evaluation": i, "stage": "family", "objective": 10 - 0.1 * i} for i in range(8)]
    result = rng.uniform(8.5, 9.5, windows)
    return {
        "stop_reason": "budget", "evaluations": evaluations, "best_so_far": best,
        "refinement": [{"channel": c, "center_hz": 100.0, "status": "converged",
                        "objective_before": 9.3, "objective_after": 9.1} for c in range(channels)],
        "bootstrap": {"resamples": 4, "objective": {"estimate": 9.1, "low": 9.0, "high": 9.3},
                      "channels": [{"time_spread_s": [0.001, 0.01], "cell_area": [0.5, 2.0],
                                    "chirp_hz_per_s": [-300.0, 300.0]} for _ in range(channels)]},
        "baselines": {"spectrogram": {"objective": 9.6, "low": 9.5, "high": 9.8,
                                      "parameters": {"time_spread_s": 0.004}},
                      "scalogram": {"objective": 9.9, "low": 9.7, "high": 10.1,
                                    "parameters": {"cycles": 5.0}},
                      "pseudo_wvd": {"objective": 8.9, "low": 8.7, "high": 9.0, "parameters": {}}},
        "result": {"objective": 9.1, "low": 9.0, "high": 9.3}, "gain_bits": 0.5,
        "per_window": {"result": result.tolist(),
                       "spectrogram": (result + rng.uniform(-0.2, 1.0, windows)).tolist()},
        "windows": {"used": windows, "rejected": 3, "rejected_by_reason": {"flat": 2, "clipped": 1}},
        "corpus": {"sampling_rate_hz": 2000.0, "n_windows": windows, "window_samples": 256,
                   "source_hash": "ab" * 32,
                   "traces": [{"file": "site-A.mseed", "trace_id": "XX.S01..HHZ", "windows": windows}],
                   "defaults": {"sta_s": 0.01, "lta_s": 0.2, "window_s": 0.128}},
        "settings": {"channels": channels, "evaluations": 8, "seed": 7},
        "seed": 7, "elapsed_s": 1.5, "version": "0.1.0",
    }


@pytest.fixture(scope="module")
def page_text():
    """The report of the hand-built filterbank and diagnostics, without windows, rendered once;
    the pseudo-WVD baseline scored invalid (null), as a search records an image with no valid
    Rényi sum."""
    diag = diagnostics(channels=7)
    diag["baselines"]["pseudo_wvd"].update(objective=None, low=None, high=None)
    return report.render_report(filterbank_json(channels=7), diag, None, None)


def test_report_is_self_contained_with_alt_text(page_text):
    """No external asset: every <img> is an inline data: PNG with alt text, no script, no link
    but the empty inline icon, no http(s) or protocol-relative src/href, and a CSP forbidding
    network loads (HTML Living Standard; CSP Level 3, W3C)."""
    page = Page(page_text)
    images = [a for t, a in page.tags if t == "img"]
    assert len(images) == 4  # tiling, convergence, channels, baselines (no windows: no examples)
    for attrs in images:
        assert attrs.get("alt", "").strip()
        assert attrs["src"].startswith("data:image/png;base64,")
        assert base64.b64decode(attrs["src"].split(",", 1)[1])[:8] == b"\x89PNG\r\n\x1a\n"
    for tag, attrs in page.tags:
        assert tag not in ("script", "iframe", "object", "embed")
        if tag == "link":  # only the empty inline icon that stops a favicon request
            assert attrs.get("href") == "data:,"
        for name in ("src", "href", "action"):
            value = (attrs.get(name) or "").strip().lower()
            assert not value.startswith(("http:", "https:", "//")), (tag, attrs)
    csp = [a for t, a in page.tags if t == "meta" and a.get("http-equiv") == "Content-Security-Policy"]
    assert csp and "default-src 'none'" in csp[0]["content"]


def test_report_escapes_hostile_strings():
    """Text from data (file names, settings, reasons, readings, provenance) is escaped, so no
    element or event handler can be injected (OWASP XSS prevention, output encoding)."""
    fb = filterbank_json()
    fb["channels"][0]["equivalent"] = {"text": HOSTILE}
    fb["job"]["settings"] = {"note": HOSTILE}
    diag = diagnostics()
    diag["stop_reason"] = HOSTILE
    diag["settings"][HOSTILE] = HOSTILE
    diag["windows"]["rejected_by_reason"] = {HOSTILE: 1}
    diag["corpus"]["traces"][0]["file"] = HOSTILE
    diag["corpus"]["defaults"]["trigger"] = HOSTILE
    text = report.render_report(fb, diag, None, None)
    page = Page(text)
    assert "<script>alert" not in text and "onerror=alert" not in text.replace("onerror=alert(1)&gt;", "")
    assert not [t for t, _ in page.tags if t == "script"]
    assert len([t for t, _ in page.tags if t == "img"]) == 4  # the hostile <img> stayed text
    assert not [a for _, attrs in page.tags for a in attrs if a.startswith("on")]
    visible = "".join(page.text)
    assert visible.count(HOSTILE) >= 6  # shown to the reader as the literal text


def test_channel_table_matches_filterbank_json(page_text):
    """One row per channel with the filterbank JSON's center_hz, time_spread_s, cell_area and
    chirp_hz_per_s (exact value in data-value) shown in the trade's terms: centre in Hz, the
    Gaussian window's std s = √2·σ_t in ms (docs/design.md §3: |h|² has time std σ_t), its FWHM
    2√(2 ln 2)·s (common practice), super-resolution or smoothing factor, matched sweep in
    Hz/s; and the equivalent reading text (docs/design.md §8 channel fields)."""
    fb = filterbank_json(channels=7)
    page = Page(page_text)
    assert [r["channel"] for r in page.rows] == list(range(7))
    for row, channel in zip(page.rows, fb["channels"], strict=True):
        for field in report.CHANNEL_FIELDS:
            assert float(row["cells"][field]["value"]) == channel[field]
        text = {f: row["cells"][f]["text"] for f in report.CHANNEL_FIELDS}
        assert float(text["center_hz"]) == pytest.approx(channel["center_hz"], rel=1e-4)
        std_ms = 1e3 * np.sqrt(2.0) * channel["time_spread_s"]
        assert float(text["time_spread_s"]) == pytest.approx(std_ms, rel=1e-2)
        assert f"{2 * np.sqrt(2 * np.log(2)) * std_ms:.3g}" in row["text"]
        assert float(text["chirp_hz_per_s"].replace(",", "")) == \
            pytest.approx(channel["chirp_hz_per_s"], abs=0.5)
        area = channel["cell_area"]
        assert text["cell_area"] == ("as a spectrogram (a = 1)" if area == 1 else
                                     f"super-resolution ×{1 / area:.2f}" if area < 1 else
                                     f"smoothing ×{area:.2f}")
        assert row["cells"]["equivalent"]["text"] == channel["equivalent"]["text"]


def test_summary_shows_the_run_and_the_cautions(page_text):
    """The summary states the gain, stop reason, windows used and rejected with reasons, the
    settings and the defaults chosen; a baseline without a finite score is named, not dropped
    silently; the cautions of docs/design.md §10 are on the page."""
    diag = diagnostics(channels=7)
    visible = " ".join(" ".join(Page(page_text).text).split())
    assert "+0.500 bits" in visible
    assert "budget" in visible
    assert "6 / 3" in visible  # windows used / rejected
    assert "given" in visible and "default" in visible  # settings tagged against the job's own
    for reason in diag["windows"]["rejected_by_reason"]:
        assert reason in visible
    assert "STA length 10 ms" in visible and "LTA length 200 ms" in visible
    assert "sta_s" not in visible and "lta_s" not in visible  # labels for people, not keys
    assert "Evaluation budget" in visible and "Random seed" in visible
    assert "site-A.mseed" in visible and "XX.S01..HHZ" in visible
    assert "not a certified safety" in visible
    assert "licensed professionals" in visible
    assert "ab" * 32 in visible  # provenance: corpus hash
    assert "Corpus fingerprint (SHA-256)" in visible
    assert "Not shown, no finite score (an invalid image): pseudo-Wigner–Ville." in visible


def test_without_windows_the_example_plot_is_omitted_with_a_note(page_text):
    """windows=None leaves out the example-burst plot and says why; report_plots offers the
    other plots as PNG bytes by name."""
    assert 'id="plot-examples"' in page_text and "without the corpus windows" in page_text
    plots = report.report_plots(filterbank_json(), diagnostics(), None, None)
    assert sorted(plots) == sorted(set(report.PLOT_NAMES) - {"examples"})
    assert all(png[:8] == b"\x89PNG\r\n\x1a\n" for png in plots.values())


def test_example_windows_are_the_best_median_and_worst_gain():
    """The example rows are the windows with the largest, the median and the smallest gain
    (spectrogram score − result score), in that order, among the windows available (docs/design.md §8)."""
    per_window = {"result": [5.0, 5.0, 5.0, 5.0, 5.0], "spectrogram": [5.3, 6.0, 4.9, 5.1, 5.5]}
    picks = report.example_indices(per_window, 5)
    assert [index for _, index, _ in picks] == [1, 0, 2]
    assert [round(g, 6) for _, _, g in picks] == [1.0, 0.3, -0.1]
    # only the windows handed over are candidates (a caller may pass the leading part)
    assert [index for _, index, _ in report.example_indices(per_window, 3)] == [1, 0, 2]
    assert [index for _, index, _ in report.example_indices(per_window, 2)] == [1, 0]
    with pytest.raises(ValueError, match="per_window"):
        report.example_indices({"result": [1.0], "spectrogram": [1.0, 2.0]}, 2)


def test_examples_drawn_from_windows_with_the_project_transform():
    """Given windows, the report embeds the example-burst plot, computed with search.tfd
    for the learned filterbank and the best spectrogram (a = 1, β = 0 at the recorded σ_t,
    named by its window std √2·σ_t); each example is named by its SEED id and UTC start, never
    by the file's server path, or by its offset in the trace when no start is recorded; a
    sampling rate that disagrees with the filterbank is refused naming both (project rule)."""
    fb = filterbank_json()
    diag = diagnostics()
    diag["corpus"]["window_meta"] = [
        {"file": "/srv/burstlens/blobs/ab/site-A.mseed", "trace_id": "XX.S01..HHZ",
         "start": f"2026-03-17T02:00:{10 + k:02d}.250000Z", "offset_s": 10.25 + k,
         "trigger_offset_s": 0.032} for k in range(5)] + [
        {"file": "/srv/burstlens/blobs/ab/site-A.mseed", "trace_id": "XX.S01..HHZ",
         "start": None, "offset_s": 40.5}]
    fs, n = fb["sampling_rate_hz"], fb["window_samples"]
    t = np.arange(n) / fs
    rng = np.random.default_rng(2)
    windows = np.array([np.exp(-0.5 * ((t - 0.06) / 0.01) ** 2) * np.cos(2 * np.pi * (150 + 40 * k) * t)
                        + 0.01 * rng.standard_normal(n) for k in range(6)])
    page = Page(report.render_report(fb, diag, windows, fs))
    (example,) = [a for t, a in page.tags if t == "img" and "Example windows" in a.get("alt", "")]
    assert base64.b64decode(example["src"].split(",", 1)[1])[:8] == b"\x89PNG\r\n\x1a\n"
    assert "best plain spectrogram" in example["alt"] and "window std 5.66 ms" in example["alt"]
    gains = np.array(diag["per_window"]["spectrogram"]) - np.array(diag["per_window"]["result"])
    best = int(np.argmax(gains))
    first = example["alt"].split(";")[0]
    when = f"from 2026-03-17 02:00:{10 + best:02d}.250 UTC" if best < 5 else "40.500 s into the trace"
    assert "XX.S01..HHZ" in first and when in first, first
    caption = visible_text(report.render_report(fb, diag, windows, fs))
    assert f"Row 1, sharpest gain ({gains[best]:+.2f} bits): XX.S01..HHZ {when}." in caption
    assert "/srv/" not in caption and "STA/LTA trigger" in caption
    with pytest.raises(ValueError, match="1000 Hz.*2000 Hz"):
        report.report_plots(fb, diag, windows, 1000.0)
    with pytest.raises(ValueError, match="windows"):
        report.report_plots(fb, diag, windows[0], fs)


def test_a_cancelled_run_still_renders_with_notes_for_what_is_missing():
    """A cancelled search records no baselines, result, intervals or per-window scores
    (DEVELOPERS.md diagnostics_); the report still renders and says which plots are left out
    and why instead of failing."""
    diag = diagnostics()
    diag.update(stop_reason="cancelled", bootstrap=None, baselines=None, result=None,
                gain_bits=None, per_window=None)
    windows = np.zeros((6, 256))
    windows[:, 100] = 1.0
    page = Page(report.render_report(filterbank_json(), diag, windows, 2000.0))
    assert len([t for t, _ in page.tags if t == "img"]) == 3  # tiling, convergence, channels
    visible = " ".join("".join(page.text).split())
    assert "Example bursts are not shown" in visible and "per_window" in visible
    assert "Baselines are not shown" in visible
    assert "cancelled" in visible and "not recorded" in visible


def test_malformed_filterbank_is_refused_naming_the_field():
    """A channel without a finite time_spread_s, or no channels at all, raises a ValueError that
    names the field (project rule: clear errors)."""
    fb = filterbank_json()
    broken = copy.deepcopy(fb)
    broken["channels"][2]["time_spread_s"] = None
    with pytest.raises(ValueError, match=r"\['channels'\]\[2\]\['time_spread_s'\]"):
        report.render_report(broken, diagnostics(), None, None)
    with pytest.raises(ValueError, match="channels"):
        report.render_report({**fb, "channels": []}, diagnostics(), None, None)


def judged_diagnostics(**judgement):
    """diagnostics() with the held-out judgement the search records (DEVELOPERS.md), clean: no
    warning applies; keywords replace judgement fields."""
    diag = diagnostics()
    diag["judgement"] = {
        "in_sample": False, "held_out_share": 0.25,
        "held_out_windows": 53, "fit_windows": 158, "guard_windows": 2,
        "gain_bits": {"estimate": 0.42, "low": 0.31, "high": 0.52, "level": 0.9, "resamples": 2000},
        "result": {"objective": 9.1, "low": 9.0, "high": 9.3},
        "spectrogram": {"objective": 9.6, "low": 9.5, "high": 9.8},
        "negative_share": {"overall": 0.004, "per_channel": [0.001, 0.004, 0.002, 0.0, 0.003],
                           "max_allowed": 0.01},
        "bounds_hit": [], "bounds_detail": [],
        "onset": {"result": {"median_ms": 3.1, "p90_ms": 9.0, "windows": 40},
                  "spectrogram": {"median_ms": 3.4, "p90_ms": 10.2, "windows": 40}},
        **judgement}
    return diag


LEAD = ("0.42 bit sharper than the best plain spectrogram on 53 windows the fit never saw, "
        "90 % interval 0.31–0.52")


def visible_text(text):
    return " ".join(" ".join(Page(text).text).split())


def test_the_page_leads_with_the_held_out_gain():
    """Right under the title (before the navigation and every section) the page states the gain
    on held-out windows with its 90 % interval and how many windows were held out."""
    text = report.render_report(filterbank_json(), judged_diagnostics(), None, None)
    after_header = text[text.index("</header>") + len("</header>"):]
    assert after_header.lstrip().startswith('<section id="verdict"><p class="lead" id="gain">'
                                            + LEAD + "</p>")
    assert text.index(LEAD) < text.index("<nav")
    visible = visible_text(text)
    assert "90 % interval from 2000 resamples" in visible and "158 windows fitted" in visible
    assert "2 left out of the fit because they overlap held-out ones" in visible
    assert 'id="warnings"' not in text  # nothing to warn about


@pytest.mark.parametrize("change", [
    {"judgement": {"bounds_hit": ["cell_area"], "bounds_detail": [
        {"setting": "cell_area", "bound": "lower", "value": 0.25, "channels": [0, 1, 2]}]}},
    {"judgement": {"negative_share": {"overall": 0.02, "per_channel": [0.02] * 5,
                                      "max_allowed": 0.05}}},
    {"fallback": {"to": "spectrogram", "reason": "no held-out gain"}},
    {"judgement": {"held_out_windows": 12}},
    {"judgement": {"in_sample": True, "held_out_share": 0.0, "held_out_windows": 0}},
    {"stop_reason": "time_limit"},
], ids=["bound", "negative", "fallback", "few-held-out", "in-sample", "time-limit"])
def test_the_warnings_box_shows_each_warning_that_applies(change):
    """One box under the lead, holding exactly the warnings service.verdict finds."""
    from burstlens.service import verdict

    diag = judged_diagnostics(**change.get("judgement", {}))
    diag.update({k: v for k, v in change.items() if k != "judgement"})
    text = report.render_report(filterbank_json(), diag, None, None)
    expected = verdict.warnings(diag)
    assert len(expected) == 1
    box = text[text.index('<div class="warnings"'):text.index("<nav")]
    # option names are wrapped in a span (kept on one line): compare the text without tags
    assert " ".join(html.unescape(re.sub(r"<[^>]+>", " ", re.sub(r"</?span[^>]*>", "", box))).split()) == \
        " ".join(("Warnings " + " ".join(expected)).split())
    assert text.index(verdict.gain_words(diag)) < text.index('id="warnings"')


def test_summary_shows_negative_share_and_onset_timing():
    text = report.render_report(filterbank_json(), judged_diagnostics(), None, None)
    visible = visible_text(text)
    assert "negative share of the image 0.4 % (ceiling 1 %)" in visible
    assert "result 3.1 / 9 ms · spectrogram 3.4 / 10.2 ms (40 windows)" in visible
    assert "held-out objective of the result 9.1 [9, 9.3]" in visible
    assert "Windows held out / fitted / guard 53 / 158 / 2" in visible
    without_onset = judged_diagnostics(onset=None)
    assert "not measured (no trigger offsets)" in visible_text(
        report.render_report(filterbank_json(), without_onset, None, None))


def test_old_diagnostics_without_judgement_render_with_a_note():
    """Diagnostics from before the held-out judgement (no key, or null) still render; the lead
    is a note saying the gain was not judged, and the summary says so instead of numbers."""
    for diag in (diagnostics(), {**diagnostics(), "judgement": None}):
        text = report.render_report(filterbank_json(), diag, None, None)
        after_header = text[text.index("</header>") + len("</header>"):].lstrip()
        assert after_header.startswith('<section id="verdict"><p class="lead note" id="gain">'
                                       "gain on windows the fit never saw: not judged")
        assert 'id="warnings"' not in text
        assert "no judgement on held-out windows recorded" in visible_text(text)


def test_warning_text_from_data_is_escaped():
    """A setting name in bounds_detail is data: it shows as text and injects nothing."""
    diag = judged_diagnostics(bounds_hit=[HOSTILE], bounds_detail=[
        {"setting": HOSTILE, "bound": "upper", "value": 2.0, "channels": [1]}])
    text = report.render_report(filterbank_json(), diag, None, None)
    page = Page(text)
    assert not [t for t, _ in page.tags if t == "script"]
    assert HOSTILE in visible_text(text)


def test_the_page_answers_first_and_folds_settings_away():
    """Order of the page: what was tuned, the gain, then example bursts, channel table, tiling
    and convergence; settings, defaults and files sit in one closed <details> at the end."""
    text = report.render_report(filterbank_json(), judged_diagnostics(), None, None)
    tuned = visible_text(text[text.index('id="tuned"'):text.index("</header>")])
    assert "XX.S01" in tuned  # the site, from the trace ids
    assert "5 channels at 60–900 Hz" in tuned and "6 windows of 128 ms at 2000 Hz" in tuned
    order = [text.index(m) for m in ('id="tuned"', 'id="gain"', 'id="plot-examples"',
                                     'id="channel-table"', 'id="plot-tiling"',
                                     'id="plot-convergence"', 'id="cautions"', '<details id="details">')]
    assert order == sorted(order)
    assert '<details id="details">' in text and "<details id=\"details\" open" not in text
    details = text[text.index('<details id="details">'):text.index("</main>")]
    assert "Settings of the run" in details and "Traces read" in details


def test_negative_gain_is_said_as_less_sharp():
    diag = judged_diagnostics(gain_bits={"estimate": -0.2, "low": -0.4, "high": -0.05,
                                         "level": 0.9, "resamples": 2000})
    text = report.render_report(filterbank_json(), diag, None, None)
    assert ("0.20 bit less sharp than the best plain spectrogram on 53 windows the fit never "
            "saw, 90 % interval -0.40 to -0.05") in visible_text(text)


def test_report_colours_are_the_palette():
    """The page's CSS variables are service.palette's, in one :root rule."""
    from burstlens.service import palette

    text = report.render_report(filterbank_json(), diagnostics(), None, None)
    assert palette.css_variables() in text


@pytest.mark.parametrize("first, second, ratio", [
    ("#000000", "#ffffff", 21.0), ("#767676", "#ffffff", 4.54), ("#ffffff", "#ffffff", 1.0)])
def test_contrast_ratio_matches_the_wcag_worked_values(first, second, ratio):
    """WCAG 2.1 §1.4.3: black on white 21:1, #767676 on white just above 4.5:1, in either order."""
    from burstlens.service import palette

    assert palette.contrast_ratio(first, second) == pytest.approx(ratio, abs=0.005)
    assert palette.contrast_ratio(second, first) == palette.contrast_ratio(first, second)


def test_palette_text_is_darkened_okabe_ito_and_readable_on_every_background():
    """Every text colour is an Okabe–Ito hue of the plots scaled towards black (same channel
    ratios) and reaches 4.5:1 on every background; one step lighter would not (darkened no more
    than needed); white on the accent (a primary button) passes too."""
    from burstlens.service import palette, plots

    assert {c.lower() for c in palette.OKABE_ITO.values()} == {c.lower() for c in plots.PALETTE}
    for name, colour in palette.TEXT.items():
        for background in palette.BACKGROUNDS.values():
            assert palette.contrast_ratio(colour, background) >= palette.AA_NORMAL_TEXT, name
    assert palette.contrast_ratio(palette.PAPER, palette.TEXT["accent"]) >= palette.AA_NORMAL_TEXT
    assert palette.TEXT["accent"] == palette.darken(palette.OKABE_ITO["blue"],
                                                    palette.BACKGROUNDS.values())
    assert palette.darken("#767676", ["#ffffff"]) == "#767676"  # already readable: unchanged
    darker = palette.darken("#999999", ["#ffffff"])
    assert palette.contrast_ratio(darker, "#ffffff") >= 4.5 and darker != "#999999"


def test_jobs_page_uses_the_same_palette():
    """service/static/index.html cannot import the palette: its :root rule must equal it."""
    from pathlib import Path

    from burstlens.service import palette

    page = (Path(palette.__file__).parent / "static" / "index.html").read_text(encoding="utf-8")
    assert palette.css_variables() in page


def test_the_report_says_which_corpus_options_were_given():
    """Corpus options the caller set (Corpus.defaults["given"]) carry a "given" tag in the
    folded settings; those the reader chose from the data do not, and no bare dict key shows."""
    diag = judged_diagnostics()
    diag["corpus"]["defaults"] = {"sta_s": 0.02, "sta_source": "given", "lta_s": 0.4,
                                  "lta_source": "20 × STA", "given": {"sta_s": 0.02}}
    text = report.render_report(filterbank_json(), diag, None, None)
    details = visible_text(text[text.index('<details id="details">'):text.index("</main>")])
    assert re.search(r"STA length\s*given\s*20 ms", details), details[:400]
    assert re.search(r"LTA length\s*400 ms \(20 × STA\)", details), details[:400]
    assert "sta_s" not in details and "'given'" not in details


# A raw key: a snake_case identifier standing alone, not part of a dotted Python path such as
# scipy.signal.resample_poly (common practice: PEP 8 spells variables and dict keys this way).
RAW_KEY = re.compile(r"(?<![\w.])[a-z][a-z0-9]*(?:_[a-z0-9]+)+\b")


def test_no_raw_key_in_the_visible_text():
    """Every label, setting, table head and warning is said in words with units: no snake_case
    key (window_samples, source_hash, sampling_rate_hz, band_hz, csv_sampling_rate_hz, …) is
    left in the page's text, the folded settings and the warnings included."""
    diag = judged_diagnostics(bounds_hit=["time_spread_s"], bounds_detail=[
        {"setting": "time_spread_s", "bound": "lower", "value": 0.002, "channels": [0, 1]}])
    diag["settings"].update(sampling_rate_hz=2000.0, band_hz=[60.0, 900.0],
                            csv_sampling_rate_hz=None, time_spread_bounds_s=[0.002, 0.02],
                            family_reference="geometric mean of band_hz", window_samples=256)
    diag["corpus"]["rejections"] = [{"file": "site-A.mseed", "trace_id": "XX.S01..HHZ",
                                     "offset_s": 3.5, "reason": "flat", "detail": "constant"}]
    diag["corpus"]["traces"][0].update(start="2026-03-17T02:00:00.000000Z", duration_s=60.0,
                                       sampling_rate_hz=2000.0)
    visible = visible_text(report.render_report(filterbank_json(), diag, None, None))
    assert RAW_KEY.findall(visible) == []
    assert "Sampling rate declared for CSV files not set" in visible
    assert re.search(r"Channel band (default )?60 Hz–900 Hz", visible)
    assert "2026-03-17 02:00:00.000 UTC" in visible  # trace starts in UTC words


def test_window_terms_agree_with_scipy_windows():
    """A channel's window in the user's terms, checked on scipy.signal.windows themselves
    (reference library): gaussian(length, std) has the std s = √2·σ_t in samples, and its
    square's time std is σ_t·fs (docs/design.md §3: |h|² has time std σ_t); the FWHM given is the one
    measured on that window (2√(2 ln 2)·s, common practice) and the Hann length's own window,
    hann(L, sym=False), is above half its peak over as many samples, to within one sample."""
    from scipy.signal.windows import gaussian, hann

    from burstlens.service.report.terms import window_terms

    def fwhm_samples(w):
        """Width at half the peak, each crossing placed by linear interpolation (samples)."""
        half, above = w.max() / 2, np.flatnonzero(w >= w.max() / 2)
        first, last = above[0], above[-1]
        left = first - (w[first] - half) / (w[first] - w[first - 1])
        right = last + (w[last] - half) / (w[last] - w[last + 1])
        return float(right - left)

    for sigma, fs in ((0.001, 4000.0), (0.0426667, 4000.0), (0.006, 2000.0), (0.02, 500.0)):
        terms = window_terms(sigma, fs, 1024)
        w = gaussian(terms.length, std=terms.std_samples)
        n = np.arange(w.size) - (w.size - 1) / 2
        power = w ** 2 / np.sum(w ** 2)
        assert np.sqrt(np.sum(power * n ** 2)) == pytest.approx(sigma * fs, rel=1e-3)
        assert terms.std_samples == pytest.approx(np.sqrt(2) * sigma * fs, rel=1e-12)
        assert abs(fwhm_samples(w) - terms.fwhm_s * fs) <= 1.0
        assert abs(fwhm_samples(hann(terms.hann, sym=False)) - terms.fwhm_s * fs) <= 1.0
        assert terms.nfft >= terms.length and terms.hop >= 1
    with pytest.raises(ValueError, match="time_spread_s"):
        window_terms(0.0, 1000.0, 256)


def test_the_shortfft_line_builds_the_best_spectrogram():
    """The report's copyable line, run as it is, builds a scipy.signal.ShortTimeFFT whose window
    is scipy's gaussian at the best spectrogram's std √2·σ_t·fs, and whose spectrogram of the
    analytic signal, over 2‖h‖², equals the project's own plain spectrogram image
    (search.spectrogram, the a = 1 identity of docs/design.md §3) at the same bins and times."""
    from scipy.signal import hilbert
    from scipy.signal.windows import gaussian

    from burstlens.search.spectrogram import spectrogram_images

    text = report.render_report(filterbank_json(), judged_diagnostics(), None, None)
    line = html.unescape(re.search(r'<pre id="stft-line"><code>(.*?)</code></pre>', text).group(1))
    space = {}
    exec(line, space)  # the line as a user copies it
    sft = space["SFT"]
    sigma, fs = 0.004, 2000.0
    length = sft.win.size
    assert np.allclose(sft.win, gaussian(length, std=np.sqrt(2) * sigma * fs), rtol=0, atol=1e-9)
    assert sft.fs == fs
    t = np.arange(256) / fs
    x = np.exp(-0.5 * ((t - 0.06) / 0.01) ** 2) * np.cos(2 * np.pi * 300 * t)
    z = hilbert(x)
    ours, _ = next(spectrogram_images(z[None], fs, sigma, [60.0, 900.0]))
    sft.fft_mode = "twosided"  # the line is for real traces; the identity is on the analytic one
    theirs = sft.spectrogram(z, p0=0, p1=-(-(256 - sft.hop // 2) // sft.hop), k_offset=sft.hop // 2)
    theirs = theirs / (2 * np.sum(sft.win ** 2))
    freqs = np.arange(sft.mfft) * fs / sft.mfft
    rows = np.flatnonzero((freqs >= 60.0) & (freqs <= 900.0))
    assert np.allclose(theirs[rows], ours, rtol=1e-9, atol=1e-12 * ours.max())


def test_the_page_says_which_settings_differ_from_the_defaults():
    """Under the title, the settings that made the run where they differ from
    search.settings.SETTINGS_DEFAULTS, each with its default; a run with the defaults says so.
    For a service job the job's own settings are compared; for `burstlens tune` the resolved
    ones."""
    text = report.render_report(filterbank_json(), judged_diagnostics(), None, None)
    note = visible_text(text[text.index('id="settings-used"'):text.index("</header>")])
    assert "channels 5 (default 96)" in note  # the job asked for 5
    fb = filterbank_json()
    fb["job"]["settings"] = {"channels": 96, "seed": 0}
    text = report.render_report(fb, judged_diagnostics(), None, None)
    assert "Made with the default settings." in visible_text(text)
    del fb["job"]
    diag = judged_diagnostics()
    diag["settings"] = {"channels": 96, "evaluations": 8, "seed": 0, "held_out": 0.25,
                        "sampling_rate_hz": 2000.0, "band_hz": [30.0, 900.0]}
    note = visible_text(report.render_report(fb, diag, None, None))
    assert "evaluation budget 8 (default 24)" in note
    assert "channel band 30 Hz–900 Hz (default fs/100 to 0.45·fs)" in note
    assert "channels 96" not in note.split("Made with")[1].split(".")[0]


def test_an_excluded_baseline_is_drawn_marked_with_its_reason():
    """The pseudo-WVD, whose image is 46 % negative against a 1 % positivity ceiling
    (docs/design.md §4.3), is still drawn but marked excluded with that reason, in the entries, the alt text and
    the caption; a baseline within the ceiling is not."""
    from burstlens.service.report.figures import baseline_entries

    diag = judged_diagnostics()
    diag["baselines"]["pseudo_wvd"]["negative_share"] = 0.4583
    diag["baselines"]["spectrogram"]["negative_share"] = 0.0
    entries = {e["label"]: e for e in baseline_entries(diag)}
    assert entries["pseudo-Wigner–Ville"]["excluded"] == \
        "46 % of its mass is negative (at most 1 % allowed)"
    assert entries["best plain spectrogram (own FFT grid) (window std 5.66 ms)"]["excluded"] is None
    page = Page(report.render_report(filterbank_json(), diag, None, None))
    (image,) = [a for t, a in page.tags if t == "img" and a.get("alt", "").startswith("Baselines")]
    assert "pseudo-Wigner–Ville 8.9 [8.7, 9] (excluded: 46 % of its mass is negative" in image["alt"]
    visible = " ".join(" ".join(page.text).split())
    assert "excluded" in visible and "pseudo-Wigner–Ville: 46 % of its mass is negative" in visible


@pytest.fixture(scope="module")
def drift_answers(tmp_path_factory):
    """Two real `burstlens check --json` answers (search.drift.check_drift) on a generated site
    (tests/service/test_check_command.py's decaying tone bursts in red noise with a 50 Hz line),
    tuned briefly: new files from the same site, and files whose bursts moved from 120 to
    250 Hz; each with the id, UTC finish time and file names the service adds."""
    from test_check_command import write_site

    from burstlens.search import FilterbankSearch
    from burstlens.search.corpus import read_corpus
    from burstlens.search.documents import FilterbankDocument
    from burstlens.search.drift import check_drift

    folder = tmp_path_factory.mktemp("drift")
    corpus = read_corpus([write_site(folder / "tuning.npz", seed=1, seconds=40.0)])
    search = FilterbankSearch(channels=8, evaluations=4, refine=False, bootstrap=0, seed=0).fit(corpus)
    document = FilterbankDocument.read(FilterbankDocument.of(search.filterbank_).to_json())
    answers = []
    for k, (seed, hz) in enumerate(((2, 120.0), (3, 250.0))):
        name = f"week{k + 1}.npz"
        new = read_corpus([write_site(folder / name, seed=seed, f_burst_hz=hz, seconds=30.0)],
                          **{**document.reading_options(), "max_windows": 256})
        answer = check_drift(document, new, search.diagnostics_, evaluations=2, resamples=200)
        answers.append({**answer.to_json(), "id": f"check-{k}", "files": [name],
                        "finished_at": 1773712800.0 + 7 * 86400 * k})  # 2026-03-17 02:00 UTC
    return document.to_json(), search.diagnostics_, answers


def test_drift_checks_are_listed_newest_first_in_words(drift_answers):
    """The drift-check section shows one row per check, newest first: its UTC date, files,
    the verdict in words (keep / re-tune), what moved (the check's own sentences) and the
    filterbank's sharpness gain over the new data's best spectrogram with its interval, as the
    answer's scorecard records it; without checks the section is absent."""
    filterbank, diag, answers = drift_answers
    assert [a["verdict"] for a in answers] == ["keep", "retune"]
    text = report.render_report(filterbank, diag, None, None, checks=answers)
    section = text[text.index('<section id="checks">'):]
    section = section[:section.index("</section>")]
    rows = re.findall(r"<tr data-check=\"([^\"]+)\">(.*?)</tr>", section)
    assert [r[0] for r in rows] == ["check-1", "check-0"]
    newest, oldest = (visible_text(r[1]) for r in rows)
    assert newest.startswith("2026-03-24 02:00 UTC week2.npz re-tune")
    assert oldest.startswith("2026-03-17 02:00 UTC week1.npz keep: the filterbank still serves")
    for row, answer in ((newest, answers[1]), (oldest, answers[0])):
        gain = answer["scorecard"]["rows"]["sharpness_bits"]["filterbank"]
        assert row.endswith(f"{gain['estimate']:+.2f} bits [{gain['low']:+.2f}, {gain['high']:+.2f}]")
    for moved in answers[1]["moved"]:
        assert html.escape(moved["words"]) in section
    assert "nothing moved" in oldest
    assert 'href="#checks"' in text
    for empty in (None, []):
        assert 'id="checks"' not in report.render_report(filterbank, diag, None, None, checks=empty)


def test_a_malformed_check_is_refused_naming_the_field(drift_answers):
    """A check without a known verdict or a UTC finish time raises a ValueError naming the entry
    and the field (project rule: clear errors)."""
    filterbank, diag, answers = drift_answers
    with pytest.raises(ValueError, match=r"checks\[1\]\['verdict'\]"):
        report.render_report(filterbank, diag, None, None,
                             checks=[answers[0], {**answers[1], "verdict": "maybe"}])
    with pytest.raises(ValueError, match=r"checks\[0\]\['finished_at'\]"):
        report.render_report(filterbank, diag, None, None,
                             checks=[{**answers[0], "finished_at": "yesterday"}])
