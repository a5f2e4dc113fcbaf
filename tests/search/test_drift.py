"""search/drift.py: the old filterbank judged on new windows of a generated site.

The site is made up here (no check compares it with recorded data): decaying tone bursts
x(t) = A·exp(−t/τ)·sin(2πft) at irregular times in red noise (AR(1), coefficient 0.95) with a
steady line, one trace of 60 s at 1 kHz written as .npz with its rate. Its truth is known —
the bursts' frequency f, decay τ and the lines — so each check compares the answer with the
generator's parameters. A damped sinusoid's spectrum peaks at f (a Lorentzian line of half width
1/(2πτ); from memory), so the reader's dominant frequency should follow f.
"""
import math

import numpy as np
import pytest
from scipy.signal import lfilter

from burstlens.search import drift
from burstlens.search.corpus import read_corpus
from burstlens.search.documents import FilterbankDocument
from burstlens.search.optimize import FilterbankSearch

FS = 1000.0
SITE = {"f_burst_hz": 120.0, "decay_s": 0.03, "lines": ((50.0, 0.2),)}


def write_site(path, seed: int, f_burst_hz: float = 120.0, decay_s: float = 0.03,
               lines=((50.0, 0.2),), seconds: float = 60.0, every_s: float = 1.2) -> str:
    """One generated trace as .npz (``data``, ``sampling_rate_hz``); returns the path."""
    rng = np.random.default_rng(seed)
    n = int(FS * seconds)
    t = np.arange(n) / FS
    x = lfilter([1.0], [1.0, -0.95], 0.02 * rng.standard_normal(n))
    for f, amplitude in lines:
        x += amplitude * np.sin(2 * np.pi * f * t + rng.uniform(0, 2 * np.pi))
    onsets = np.arange(1.0, seconds - 1.0, every_s)
    for t0 in onsets + rng.uniform(-0.2, 0.2, onsets.size):
        i = int(t0 * FS)
        tau = np.arange(min(n - i, int(10 * decay_s * FS))) / FS
        f = f_burst_hz * rng.uniform(0.9, 1.1)
        x[i:i + tau.size] += rng.uniform(2.0, 4.0) * np.exp(-tau / decay_s) * np.sin(2 * np.pi * f * tau)
    np.savez(path, data=x, sampling_rate_hz=np.float64(FS))
    return str(path)


@pytest.fixture(scope="module")
def tuned(tmp_path_factory):
    """The site tuned once (16 channels, 16 evaluations, no refinement): (document,
    diagnostics, tuning corpus)."""
    folder = tmp_path_factory.mktemp("site")
    corpus = read_corpus([write_site(folder / "tuning.npz", seed=1, **SITE)])
    search = FilterbankSearch(channels=16, evaluations=16, refine=False, bootstrap=0,
                              seed=0).fit(corpus)
    return FilterbankDocument.of(search.filterbank_), search.diagnostics_, corpus


def _check(tuned, tmp_path, seed: int, **changes):
    document, diagnostics, _ = tuned
    path = write_site(tmp_path / f"new{seed}.npz", seed=seed, **{**SITE, **changes})
    corpus = read_corpus([path], **document.reading_options(), max_windows=drift.MAX_WINDOWS)
    return drift.check_drift(document, corpus, diagnostics)


def test_same_site_another_seed_keeps(tuned, tmp_path):
    """Another month of the same site (same generator, other seeds) moves nothing past the
    thresholds: verdict keep, exit of the cron 0. The dominant frequency read both times is
    within 10 % of the bursts' f (damped sinusoid's spectral peak, from memory)."""
    for seed in (2, 3):
        answer = _check(tuned, tmp_path, seed)
        assert answer.verdict == "keep", answer.words()
        assert answer.moved == ()
        then, now = answer.figures["then"], answer.figures["now"]
        for f in (then["dominant_frequency_hz"], now["dominant_frequency_hz"]):
            assert abs(f / SITE["f_burst_hz"] - 1) < 0.10
        assert abs(math.log(now["burst_duration_s"] / then["burst_duration_s"])) \
            < math.log(drift.BURST_DURATION_RATIO)


def test_longer_bursts_retune_naming_the_burst_duration(tuned, tmp_path):
    """Bursts decaying three times slower (τ 30 → 90 ms) last longer: the median burst duration
    grows past BURST_DURATION_RATIO, and the answer is retune naming it, with the values then
    and now in the record."""
    answer = _check(tuned, tmp_path, 4, decay_s=0.09)
    assert answer.verdict == "retune"
    moved = {m.what: m for m in answer.moved}
    assert "burst_duration" in moved, answer.words()
    m = moved["burst_duration"]
    assert m.now > drift.BURST_DURATION_RATIO * m.then
    assert "burst duration" in answer.words()[0]


def test_new_steady_line_retunes_naming_its_frequency(tuned, tmp_path):
    """A pump starts at 180 Hz (a steady sinusoid, as strong as the 50 Hz line): the check finds
    a line ≥ 10 dB that the filterbank's steady_lines_hz lacks, names it within one resolution
    bin (fs/N) of 180 Hz, and keeps the 50 Hz line, which the filterbank removes, out."""
    document, _, _ = tuned
    assert any(abs(f - 50.0) < 1.0 for f in document.filterbank.steady_lines_hz)
    answer = _check(tuned, tmp_path, 5, lines=((50.0, 0.2), (180.0, 0.2)))
    assert answer.verdict == "retune"
    lines = [m for m in answer.moved if m.what == "steady_line"]
    assert len(lines) == 1, answer.words()
    bin_hz = FS / document.window_samples
    assert abs(lines[0].now - 180.0) < bin_hz
    assert f"{lines[0].now:.2f} Hz" in lines[0].words


def test_other_dominant_frequency_retunes_naming_it(tuned, tmp_path):
    """Bursts at 250 Hz instead of 120 Hz: the dominant frequency moves by more than
    DOMINANT_FREQUENCY_RATIO and the answer names it; the value now is within 10 % of 250 Hz
    (the damped sinusoid's spectral peak, from memory)."""
    answer = _check(tuned, tmp_path, 6, f_burst_hz=250.0)
    assert answer.verdict == "retune"
    moved = {m.what: m for m in answer.moved}
    assert "dominant_frequency" in moved, answer.words()
    assert abs(moved["dominant_frequency"].now / 250.0 - 1) < 0.10
    assert "dominant frequency" in answer.words()[0]


def test_json_answer_has_the_scorecard_rows_and_the_refit(tuned, tmp_path):
    """The JSON answer carries the verdict, the reasons, the scorecard of the old filterbank
    against the new best spectrogram (the three rows of search.scorecard, each an estimate with
    an interval whose ends bracket it: a percentile bootstrap interval of a paired difference
    holds its full-sample value in these data, Efron & Tibshirani 1993, ch. 13), and the refit's
    margin over the old filterbank."""
    import json

    answer = _check(tuned, tmp_path, 2)
    out = json.loads(json.dumps(answer.to_json(), allow_nan=False))
    assert set(out) >= {"verdict", "moved", "scorecard", "refit", "figures"}
    rows = out["scorecard"]["rows"]
    assert set(rows) == {"sharpness_bits", "onset_ms", "detection_db"}
    sharp = rows["sharpness_bits"]["filterbank"]
    assert sharp["low"] <= sharp["estimate"] <= sharp["high"]
    assert "refit" in out["refit"]["against_filterbank"]["sharpness_bits"]
    assert out["scorecard"]["reference"] == "spectrogram"
    assert out["figures"]["thresholds"]["new_line_db"] == pytest.approx(10.0)


def test_ratio_moved_is_symmetric_in_log():
    """A factor either way counts alike: |ln(now/then)| > ln(ratio) (×1.3 and ÷1.3 both move at
    ratio 1.25, ×1.2 and ÷1.2 do not). Bad input is a ValueError naming the values."""
    assert drift.ratio_moved(100.0, 130.0, 1.25) and drift.ratio_moved(130.0, 100.0, 1.25)
    assert not drift.ratio_moved(100.0, 120.0, 1.25) and not drift.ratio_moved(120.0, 100.0, 1.25)
    with pytest.raises(ValueError, match="-1.0"):
        drift.ratio_moved(-1.0, 2.0, 1.25)


def test_new_lines_keeps_only_strong_unknown_lines():
    """A line is new when it is ≥ NEW_LINE_DB high and farther than the tolerance from every
    known line (common practice: the same 2-bin merge distance the tuning used)."""
    found = drift.new_lines([50.0], [50.4, 120.0, 180.0], [20.0, 9.0, 15.0], tolerance_hz=0.5)
    assert found == [(180.0, 15.0)]
    assert drift.new_lines([], [60.0], [10.0], tolerance_hz=1.0) == [(60.0, 10.0)]


def test_site_moves_without_diagnostics_says_what_was_not_compared(tuned):
    """Without the tuning's diagnostics the bursts' frequency and duration cannot be compared:
    nothing moves for them and the answer says so; a new line is still found from the
    filterbank's own steady_lines_hz."""
    document, _, _ = tuned
    then = drift.tuning_record(document.filterbank, document.tuning_settings, None)
    now = drift.SiteNow(400.0, 1.0, (50.0, 300.0), (20.0, 20.0), then.chirp_bound_hz_per_s, 1.0)
    moved, missing = drift.site_moves(then, now, FS, int(document.window_samples))
    assert [m.what for m in moved] == ["steady_line"] and moved[0].now == 300.0
    assert any("dominant frequency" in text for text in missing)
    assert any("noise level" in text for text in missing)


def test_site_moves_sweep_rate_and_noise_level_thresholds():
    """The sweep-rate bound moves when it more than doubles (SWEEP_RATE_RATIO = the bound's own
    safety factor, search.sweeps) and the noise level when its rms changes by more than 6 dB
    (20·log10 of an amplitude ratio, common practice); smaller changes move nothing."""
    then = drift.TuningRecord(None, None, (), 1000.0, 1.0)
    loud = drift.SiteNow(None, None, (), (), 2500.0, 2.5)       # ×2.5 bound, +8.0 dB
    moved, _ = drift.site_moves(then, loud, FS, 128)
    assert sorted(m.what for m in moved) == ["noise_level", "sweep_rate"]
    calm = drift.SiteNow(None, None, (), (), 1900.0, 1.9)       # ×1.9 bound, +5.6 dB
    assert drift.site_moves(then, calm, FS, 128)[0] == []
    with pytest.raises(ValueError, match="window_samples"):
        drift.site_moves(then, calm, FS, 0)
