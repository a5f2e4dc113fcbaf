"""The held-out verdict (service/verdict.py): the gain sentence and exactly the warnings that apply.

Every test builds the diagnostics by hand after the ``judgement`` schema the search records
(DEVELOPERS.md, diagnostics_), starting from a clean run that earns no warning and changing one
field.
"""
import copy

import pytest

from burstlens.service import verdict


CENTRES = [40.0, 52.0, 70.0, 95.0, 130.0, 180.0, 250.0, 340.0, 460.0, 620.0, 840.0, 1150.0,
           1550.0, 1800.0]


def clean(channels=3):
    """A judged run with nothing to warn about, its channel centres in the refinement's
    per-channel record (as the search keeps it for every channel)."""
    return {
        "refinement": [{"channel": c, "center_hz": f, "status": "disabled"}
                       for c, f in enumerate(CENTRES)],
        "settings": {"sampling_rate_hz": 4000.0},
        "stop_reason": "budget", "fallback": None, "gain_bits": 0.42,
        "result": {"objective": 11.2, "low": 11.1, "high": 11.3},
        "judgement": {
            "in_sample": False, "held_out_share": 0.25,
            "held_out_windows": 53, "fit_windows": 158, "guard_windows": 0,
            "gain_bits": {"estimate": 0.42, "low": 0.31, "high": 0.52, "level": 0.9,
                          "resamples": 2000},
            "result": {"objective": 11.2, "low": 11.1, "high": 11.3},
            "spectrogram": {"objective": 11.6, "low": 11.5, "high": 11.7},
            "negative_share": {"overall": 0.004, "per_channel": [0.001, 0.004, 0.002][:channels],
                               "max_allowed": 0.01},
            "bounds_hit": [], "bounds_detail": [],
            "onset": {"result": {"median_ms": 3.1, "p90_ms": 9.0, "windows": 40},
                      "spectrogram": {"median_ms": 3.4, "p90_ms": 10.2, "windows": 40}},
        },
    }


def test_gain_sentence_states_the_held_out_gain_interval_and_windows():
    """x.xx [low, high] bits and the number of held-out windows, in the wording the CLI prints."""
    assert verdict.gain_sentence(clean()) == \
        "gain on windows the fit never saw: 0.42 [0.31, 0.52] bits (53 held-out windows)"
    diag = clean()
    diag["judgement"]["gain_bits"].update(low=None, high=None)
    assert verdict.gain_sentence(diag) == \
        "gain on windows the fit never saw: 0.42 [no interval] bits (53 held-out windows)"
    diag["judgement"]["gain_bits"]["estimate"] = None
    assert "not determined" in verdict.gain_sentence(diag)


def test_gain_sentence_without_judgement_is_a_note_not_an_error():
    """Older diagnostics, a null judgement and a cancelled run each give a note saying why."""
    old = clean()
    del old["judgement"]
    assert verdict.gain_sentence(old).startswith("gain on windows the fit never saw: not judged")
    assert "older version" in verdict.gain_sentence(old)
    cancelled = {**clean(), "judgement": None, "stop_reason": "cancelled"}
    assert "cancelled" in verdict.gain_sentence(cancelled)
    assert verdict.gain_sentence(None).startswith("gain on windows the fit never saw: not judged")
    assert verdict.warnings(None) == [] and verdict.warnings({}) == []


def test_a_clean_run_has_no_warning():
    assert verdict.warnings(clean()) == []
    assert verdict.lines(clean()) == [verdict.gain_sentence(clean())]


def test_warns_when_a_parameter_sits_on_a_search_bound():
    """bounds_detail read in words: the parameter, which bound, its value with units and the
    channels as a frequency range in Hz, never indices or raw keys."""
    diag = clean()
    diag["judgement"]["bounds_hit"] = ["cell_area"]
    diag["judgement"]["bounds_detail"] = [{"setting": "cell_area", "bound": "lower", "value": 0.25,
                                           "channels": [0, 1, 2]}]
    (warning,) = verdict.warnings(diag)
    assert ("The result's cell area sits on the smallest value searched (0.25) in the 3 "
            "channels from 40 to 70 Hz") in warning
    assert "widen the cell-area range (--cell-area)" in warning
    assert "cell_area" not in warning


def test_a_window_on_its_bound_is_said_as_a_window_in_ms_and_samples():
    """The time spread σ_t on its bound (the 0.0426667 s a search records) is said as the
    Gaussian window's std √2·σ_t, rounded, in ms and samples (docs/design.md §3: |h|² has time std
    σ_t), in all channels by their band; no raw key, no raw float."""
    diag = clean()
    diag["judgement"]["bounds_hit"] = ["time_spread_s"]
    diag["judgement"]["bounds_detail"] = [{"setting": "time_spread_s", "bound": "upper",
                                           "value": 0.042666666666666665,
                                           "channels": list(range(len(CENTRES)))}]
    (warning,) = verdict.warnings(diag)
    assert ("The result's window length sits on the largest value searched (Gaussian window "
            "std 60.3 ms, 241 samples) in all 14 channels (40–1800 Hz)") in warning
    assert "time_spread_s" not in warning and "0.0426" not in warning


def test_the_grid_cap_is_said_in_words():
    """The cap the channel grid sets on time spreads is named as such, with its remedy."""
    diag = clean()
    diag["judgement"]["bounds_hit"] = ["channels"]
    diag["judgement"]["bounds_detail"] = [{"setting": "channels", "value": None, "channels": [4],
                                           "bound": "grid spacing caps time_spread_s"}]
    (warning,) = verdict.warnings(diag)
    assert "The channel spacing caps the window length in the channel at 130 Hz" in warning
    assert "more channels (--channels)" in warning


def test_a_bound_named_without_detail_still_warns():
    diag = clean()
    diag["judgement"]["bounds_hit"] = ["chirp_hz_per_s"]
    (warning,) = verdict.warnings(diag)
    assert warning.startswith("The result's matched sweep rate sits on a search bound:")


@pytest.mark.parametrize("overall, warned", [(0.004, False), (0.005, False), (0.0051, True),
                                             (0.03, True), (None, False)])
def test_warns_when_the_negative_share_is_above_half_a_percent(overall, warned):
    """Strictly above 0.5 % of the absolute mass; the worst channel is named."""
    diag = clean()
    diag["judgement"]["negative_share"].update(overall=overall, per_channel=[0.001, 0.04, 0.002])
    found = verdict.warnings(diag)
    assert bool(found) is warned
    if warned:
        assert "negative" in found[0] and "the channel at 52 Hz: 4.0 %" in found[0]
        assert f"{100 * overall:.2g} % of the image" in found[0]  # 0.51 %, not a rounded 0.5 %


def test_warns_on_the_spectrogram_fallback():
    diag = clean()
    diag["fallback"] = {"to": "spectrogram", "reason": "no held-out gain"}
    (warning,) = verdict.warnings(diag)
    assert "returned the best spectrogram instead of a learned filterbank: no held-out gain." \
        in warning


@pytest.mark.parametrize("windows, warned", [(29, True), (30, False), (5, True)])
def test_warns_when_fewer_than_30_windows_were_held_out(windows, warned):
    diag = clean()
    diag["judgement"]["held_out_windows"] = windows
    found = verdict.warnings(diag)
    assert bool(found) is warned
    if warned:
        assert f"Only {windows} windows were held out" in found[0]


def test_warns_when_judged_in_sample():
    """held_out = 0: one in-sample warning (not also a held-out count one), and the sentence no
    longer claims unseen windows."""
    diag = clean()
    diag["judgement"].update(in_sample=True, held_out_share=0.0, held_out_windows=0,
                             fit_windows=211)
    (warning,) = verdict.warnings(diag)
    assert warning.startswith("Judged in-sample")
    sentence = verdict.gain_sentence(diag)
    assert "never saw" not in sentence and "0.42 [0.31, 0.52] bits (211 windows)" in sentence


@pytest.mark.parametrize("stop, needle", [("time_limit", "time limit"), ("cancelled", "cancelled"),
                                          ("stall", None), ("budget", None)])
def test_warns_on_a_stop_by_time_limit_or_cancel(stop, needle):
    diag = clean()
    diag["stop_reason"] = stop
    found = verdict.warnings(diag)
    if needle is None:
        assert found == []
    else:
        (warning,) = found
        assert needle in warning


def test_a_cancelled_run_without_judgement_still_warns():
    """Warnings that rest on top-level fields hold without a judgement."""
    diag = {"stop_reason": "cancelled", "judgement": None, "fallback": None}
    assert len(verdict.warnings(diag)) == 1
    assert verdict.lines(diag)[1].startswith("warning: The search was cancelled")


def test_scattered_channels_are_said_as_frequency_ranges():
    """Channels are grouped into runs of neighbours and said as ranges in Hz, at most four,
    the rest counted; without recorded centres they are only counted, never listed by index."""
    diag = clean()
    diag["judgement"]["bounds_detail"] = [{"setting": "chirp_hz_per_s", "bound": "upper",
                                           "value": 5000.0, "channels": [0, 1, 4, 6, 7, 9, 11, 13]}]
    (warning,) = verdict.warnings(diag)
    assert ("largest value searched (+5,000 Hz/s) in 8 of 14 channels: 40–52 Hz, 130 Hz, "
            "250–340 Hz, 620 Hz and 2 more ranges") in warning
    del diag["refinement"]
    (warning,) = verdict.warnings(diag)
    assert "in 8 channels:" in warning and "13" not in warning


def test_every_cli_printout_starts_with_the_verdict():
    """tune and the demo print the gain sentence first, then the warnings, from the same
    function the report uses."""
    from burstlens.service import demo
    from burstlens.service.commands import tune

    diag = clean()
    diag.update(stop_reason="time_limit", windows={"used": 211, "rejected": 0}, bootstrap=None,
                baselines={"spectrogram": {"objective": 11.6,
                                           "parameters": {"time_spread_s": 0.004}}},
                settings={})
    expected = verdict.lines(diag)
    assert len(expected) == 2
    assert tune.summary_lines(copy.deepcopy(diag))[:2] == expected
    filterbank = {"channels": [], "sampling_rate_hz": 1000.0}
    assert demo.summary_lines(filterbank, copy.deepcopy(diag), 1.0)[:2] == expected


def test_warns_when_the_result_stopped_at_the_positivity_ceiling():
    """The ceiling named as what stopped the search, with how to move it."""
    diag = clean()
    diag["judgement"]["bounds_hit"] = ["max_negative_share"]
    diag["judgement"]["bounds_detail"] = [{"setting": "max_negative_share", "bound": "upper",
                                           "value": 0.01, "channels": []}]
    (warning,) = verdict.warnings(diag)
    assert "positivity ceiling of 1 %" in warning
    assert "raising the negative share allowed (--max-negative-share)" in warning


@pytest.mark.parametrize("estimate, high, warned, surely", [
    (0.42, 0.52, False, False), (-0.1, 0.05, True, False), (-0.3, -0.1, True, True)])
def test_warns_when_the_plain_spectrogram_is_sharper_on_held_out_windows(estimate, high, warned,
                                                                          surely):
    """A negative held-out gain is said in words, and whether the whole interval is below 0."""
    diag = clean()
    diag["judgement"]["gain_bits"].update(estimate=estimate, low=estimate - 0.1, high=high)
    found = [w for w in verdict.warnings(diag) if "less sharp than the best plain" in w]
    assert bool(found) == warned
    assert bool(found and "whole interval is below 0" in found[0]) == surely


@pytest.mark.parametrize("estimate, low, high, words", [
    (0.42, 0.31, 0.52, "0.42 bit sharper than the best plain spectrogram on 53 windows the fit "
                       "never saw, 90 % interval 0.31–0.52"),
    (-1.5, -2.0, -1.1, "1.50 bits less sharp than the best plain spectrogram on 53 windows the "
                       "fit never saw, 90 % interval -2.00 to -1.10"),
    (0.001, None, None, "As sharp as the best plain spectrogram on 53 windows the fit never saw"),
])
def test_gain_words_say_the_gain_as_a_person_would(estimate, low, high, words):
    diag = clean()
    diag["judgement"]["gain_bits"].update(estimate=estimate, low=low, high=high)
    assert verdict.gain_words(diag) == words


def test_gain_words_in_sample_and_without_judgement():
    diag = clean()
    diag["judgement"].update(in_sample=True, held_out_windows=0)
    assert "on the 158 windows the fit used (none held out)" in verdict.gain_words(diag)
    assert verdict.gain_words({"stop_reason": "cancelled"}) == \
        verdict.gain_sentence({"stop_reason": "cancelled"})


def test_energy_channels_name_the_channels_the_bursts_fill():
    """Bursts at 300 Hz over a steady 50 Hz hum, no trigger known: the channel where the bursts
    stand out most is the one near 300 Hz, not the lowest, and the picks come highest first."""
    import numpy as np

    from burstlens.search import Channel, Filterbank
    from burstlens.service import energy_channels

    fs, n = 2000.0, 512
    t = np.arange(n) / fs
    rng = np.random.default_rng(0)
    windows = np.array([0.3 * np.sin(2 * np.pi * 50 * t + k)
                        + np.exp(-0.5 * ((t - 0.1 - 0.01 * k) / 0.01) ** 2) * np.cos(2 * np.pi * 300 * t)
                        + 0.01 * rng.standard_normal(n) for k in range(6)])
    centres = np.geomspace(40.0, 800.0, 12)
    bank = Filterbank([Channel(float(fc), 0.01, 1.0, 0.0) for fc in centres], fs)
    fb = bank.to_json(window_samples=n, criterion={"name": "renyi"}, objective=1.0)
    picked = energy_channels.main_channels(fb, windows)
    assert abs(centres[picked[0][0]] - 300) < 60
    assert [s for _, s in picked] == sorted((s for _, s in picked), reverse=True)
    lines = energy_channels.summary_lines(fb, windows)
    assert lines[0].startswith("channels where the bursts stand out most")
    assert len(lines) == 1 + energy_channels.LISTED
    assert "not weighed" in energy_channels.lines_or_note(fb, None)[0]


def test_energy_channels_ignore_a_loud_hum_when_the_trigger_is_known():
    """A 50 Hz hum three times the bursts' amplitude: measured against each channel's level
    before the trigger onset (the noise window before a pick, common practice), the hum rises
    by a tiny share of its level and the 300 Hz bursts lead; the corpus form (windows +
    window_meta) is read."""
    from types import SimpleNamespace

    import numpy as np

    from burstlens.search import Channel, Filterbank
    from burstlens.service import energy_channels

    fs, n = 2000.0, 512
    t = np.arange(n) / fs
    rng = np.random.default_rng(1)
    onsets = [0.1 + 0.01 * k for k in range(6)]
    windows = np.array([3.0 * np.sin(2 * np.pi * 50 * t + k)
                        + np.where(t >= t0, np.exp(-(t - t0) / 0.01), 0.0) * np.sin(2 * np.pi * 300 * (t - t0))
                        + 0.01 * rng.standard_normal(n) for k, t0 in enumerate(onsets)])
    centres = np.geomspace(40.0, 800.0, 12)
    fb = Filterbank([Channel(float(fc), 0.01, 1.0, 0.0) for fc in centres], fs).to_json(
        window_samples=n, criterion={"name": "renyi"}, objective=1.0)
    corpus = SimpleNamespace(windows=windows,
                             window_meta=[{"trigger_offset_s": t0} for t0 in onsets])
    lines = energy_channels.lines_or_note(fb, corpus)
    strongest = float(lines[1].split("Hz")[0].split()[-1])
    assert abs(strongest - 300) < 60


def test_scorecard_words_name_what_was_returned_and_skip_the_grid_warning_for_detection():
    """After a fallback the scorecard's sentences speak of the returned spectrogram, not of a
    tuned filterbank; a run tuned for detection is not told its sharpness loss comes from the
    channel grid (project rules: say what was measured, in words a seismologist reads)."""
    card = {"representations": {"result": {"onset_median_ms": 2.0},
                                 "spectrogram": {"onset_median_ms": 1.5}},
            "rows": {"detection_db": {"result": {"estimate": 0.3, "low": -0.2, "high": 0.9}},
                     "onset_ms": {"result": {"estimate": -0.5, "low": -1.0, "high": 0.2}},
                     "sharpness_bits": {"result": {"estimate": -1.1, "low": -1.2, "high": -1.0}}}}
    diag = {"judgement": {"in_sample": False, "held_out_windows": 40, "scorecard": card,
                          "gain_bits": {"estimate": -1.1, "low": -1.2, "high": -1.0}},
            "settings": {"criterion": {"name": "renyi"}}}
    assert verdict.scorecard_rows(diag)[0].startswith("The tuned filterbank finds")
    assert any("less sharp than the best plain spectrogram on windows" in w
               for w in verdict.warnings(diag))
    fell = {**diag, "fallback": {"to": "spectrogram", "reason": "guard"}}
    assert all(r.startswith("The returned spectrogram") for r in verdict.scorecard_rows(fell))
    tuned_for_detection = {**diag, "settings": {"criterion": {"name": "detection"}}}
    assert not any("channel grid" in w for w in verdict.warnings(tuned_for_detection))


def test_cli_and_report_name_the_same_window_std():
    """The best spectrogram's window in `tune`'s summary is the std s = √2·σ_t of the Gaussian
    h(u) = exp(−u²/2s²) (scipy.signal.windows.gaussian's ``std``), the number the report
    prints (service.report.terms.window_terms); σ_t is the time std of |h|², s/√2 (Gabor 1946,
    from memory). A σ_t of 4 ms is a window std of 5.66 ms."""
    from burstlens.service.commands import tune
    from burstlens.service.report.terms import window_terms

    diag = clean()
    diag.update(stop_reason="completed", windows={"used": 211, "rejected": 0}, bootstrap=None,
                baselines={"spectrogram": {"objective": 11.6,
                                           "parameters": {"time_spread_s": 0.004}}},
                settings={})
    (line,) = [x for x in tune.summary_lines(copy.deepcopy(diag)) if x.startswith("best spectrogram")]
    std_ms = 1e3 * window_terms(0.004, 1000.0, 256).std_s
    assert f"window std {std_ms:.3g} ms" in line and "5.66 ms" in line
