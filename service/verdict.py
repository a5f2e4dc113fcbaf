"""What a person must read first about a tuned filterbank: the scorecard, the gain, the warnings.

The search judges its result on windows the fit never saw (``Diagnostics.judgement``,
docs/design.md §8). ``scorecard_rows`` says, in three sentences, what the pipeline gains: how much weaker a
burst the site's detector finds, how close the onsets stay to the waveform's, how much sharper
the bursts are, each against the best plain spectrogram with its interval (and the user's own
spectrogram when one was named). ``gain_sentence`` states the sharpness gain in one line,
``gain_words`` says it in words for the report's headline, and ``warnings`` lists, as plain
sentences, every reason to distrust it. The
report page, ``burstlens tune``, ``burstlens submit`` and ``make demo`` all call these, so the
rules live in one place. Each takes the diagnostics as ``search.diagnostics_doc.Diagnostics`` or
as the JSON object (read by ``Diagnostics.of``; None reads as a run that records nothing), so
diagnostics without a judgement (older files, cancelled runs) and missing or null fields give
notes, never errors.
"""
from __future__ import annotations

import math
from collections.abc import Mapping

from burstlens.search.diagnostics_doc import Diagnostics, Judgement, Scorecard

# Above this share of negative absolute mass the image is no longer read as an energy density
# without care, even when the search's own ceiling (max_negative_share) allowed it.
NEGATIVE_SHARE_WARN = 0.005
# Fewer held-out windows than this make the interval rest on too few bursts to trust it.
MIN_HELD_OUT_WINDOWS = 30

GAIN_LEAD = "gain on windows the fit never saw"


def _interval(low: float | None, high: float | None) -> str:
    return f" [{low:.2f}, {high:.2f}]" if low is not None and high is not None else " [no interval]"


def gain_sentence(diagnostics) -> str:
    """One line: the gain in bits over the best spectrogram on held-out windows, its interval
    and how many windows it rests on; or why there is no such gain to state."""
    d = Diagnostics.of(diagnostics)
    judged = d.judgement
    if judged is None:
        why = ("the search was cancelled before its result was judged" if d.cancelled else
               "these diagnostics carry no judgement on held-out windows (made by an older "
               "version); any gain they record was measured on the windows the fit used")
        return f"{GAIN_LEAD}: not judged; {why}"
    gain = judged.gain_bits
    value = (f"{gain.estimate:.2f}{_interval(gain.low, gain.high)} bits"
             if gain.estimate is not None else "not determined")
    if judged.in_sample is True:
        windows = judged.fit_windows
        where = f" ({windows} windows)" if windows is not None else ""
        return f"gain on the windows the fit used, none held out: {value}{where}"
    windows = judged.held_out_windows
    return f"{GAIN_LEAD}: {value} ({'?' if windows is None else windows} held-out windows)"


def _bits(value: float) -> str:
    return f"{value:.2f} bit" + ("s" if round(value, 2) > 1 else "")


def _span(low: float, high: float) -> str:
    # an en dash between two negative numbers reads as a third minus sign
    return f"{low:.2f}–{high:.2f}" if low >= 0 else f"{low:.2f} to {high:.2f}"


def gain_words(diagnostics) -> str:
    """The held-out gain as a person says it, e.g. "0.35 bit sharper than the best plain
    spectrogram on 32 windows the fit never saw, 90 % interval 0.15–0.54"; a negative gain is
    said as "less sharp". Without a judgement, the reason there is none (as ``gain_sentence``)."""
    d = Diagnostics.of(diagnostics)
    judged = d.judgement
    if judged is None:
        return gain_sentence(d)
    gain = judged.gain_bits
    estimate = gain.estimate
    if judged.in_sample is True:
        windows = judged.fit_windows
        where = (f"on the {windows} windows the fit used" if windows is not None
                 else "on the windows the fit used") + " (none held out)"
    else:
        windows = judged.held_out_windows
        where = f"on {'?' if windows is None else windows} windows the fit never saw"
    if estimate is None:
        return f"The gain over the best plain spectrogram {where} could not be determined"
    if round(estimate, 2) == 0:
        words = f"As sharp as the best plain spectrogram {where}"
    else:
        words = (f"{_bits(abs(estimate))} {'sharper' if estimate > 0 else 'less sharp'} than the "
                 f"best plain spectrogram {where}")
    if gain.low is not None and gain.high is not None:
        words += (f", {100 * gain.level:g} % interval " if gain.level is not None
                  else ", interval ") + _span(gain.low, gain.high)
    return words


# Frequency ranges named in a sentence before the rest are counted instead.
RANGES_NAMED = 4


def _hz(value: float) -> str:
    return f"{value:.3g}" if value < 100 else f"{value:.0f}"


def _runs(indices: list[int]) -> list[tuple[int, int]]:
    """Consecutive channel indices as (first, last) runs, in order."""
    runs: list[tuple[int, int]] = []
    for index in sorted(set(indices)):
        if runs and index == runs[-1][1] + 1:
            runs[-1] = (runs[-1][0], index)
        else:
            runs.append((index, index))
    return runs


def channels_text(channels, centres) -> str:
    """Channels as people read them, by frequency: " in the 12 channels from 40 to 62 Hz",
    " in 20 of 96 channels: 40–62 Hz and 900–1800 Hz", " in all 96 channels (40–1800 Hz)".
    ``channels``: channel indices (ints); ``centres``: every channel's centre (Hz) or None (the
    channels are then only counted, never listed by index). Empty for no channels."""
    if not channels:
        return ""
    indices = sorted(set(channels))
    count = len(indices)
    plural = "s" if count > 1 else ""
    if centres is None or indices[-1] >= len(centres) or indices[0] < 0:
        return f" in {count} channel{plural}"
    if count == len(centres):
        return f" in all {count} channels ({_hz(centres[0])}–{_hz(centres[-1])} Hz)"
    runs = _runs(indices)
    if len(runs) == 1:
        first, last = runs[0]
        if first == last:
            return f" in the channel at {_hz(centres[first])} Hz"
        return f" in the {count} channels from {_hz(centres[first])} to {_hz(centres[last])} Hz"
    spans = [f"{_hz(centres[a])} Hz" if a == b else f"{_hz(centres[a])}–{_hz(centres[b])} Hz"
             for a, b in runs]
    if len(spans) <= RANGES_NAMED:
        named = ", ".join(spans[:-1]) + " and " + spans[-1]
    else:
        named = ", ".join(spans[:RANGES_NAMED]) + f" and {len(spans) - RANGES_NAMED} more " \
            + ("range" if len(spans) == RANGES_NAMED + 1 else "ranges")
    return f" in {count} of {len(centres)} channels: {named}"


def window_std_words(time_spread_s: float, sampling_rate_hz: float | None) -> str:
    """A channel's window as the page states it: the std s = √2·σ_t of its Gaussian window
    h(u) = exp(−u²/2s²) (what ``scipy.signal.windows.gaussian`` takes), in ms and, with the
    rate, in samples; σ_t is the time std of |h|², the filterbank file's ``time_spread_s``
    (docs/design.md §3)."""
    std = math.sqrt(2.0) * time_spread_s
    text = f"Gaussian window std {1e3 * std:.3g} ms"
    return text + (f", {std * sampling_rate_hz:.3g} samples" if sampling_rate_hz else "")
# Each searched parameter in words: what it is and its value with units.
PARAMETER_WORDS = {"time_spread_s": "window length", "cell_area": "cell area",
                   "chirp_hz_per_s": "matched sweep rate", "band_hz": "band"}
# What lifts a bound, where an option does; other bounds are derived by the engine.
REMEDY = {("cell_area", "lower"): "widen the cell-area range (--cell-area) and tune again",
          ("cell_area", "upper"): "widen the cell-area range (--cell-area) and tune again",
          ("time_spread_s", "lower"): "no shorter window is searched at this sampling rate",
          ("time_spread_s", "upper"): "the longest window searched is a sixth of the burst "
                                      "window; longer burst windows (--window) allow longer ones",
          ("chirp_hz_per_s", "lower"): "the sweep-rate bound was found in the data; fast "
                                       "sweeps may be rare in this corpus",
          ("chirp_hz_per_s", "upper"): "the sweep-rate bound was found in the data; fast "
                                       "sweeps may be rare in this corpus",
          ("band_hz", "lower"): "widen the band (--band) and tune again",
          ("band_hz", "upper"): "widen the band (--band) and tune again"}


def _value_words(setting: str, value: float | None, fs: float | None) -> str:
    if value is None:
        return ""
    if setting == "time_spread_s":
        return f" ({window_std_words(value, fs)})"
    if setting == "chirp_hz_per_s":
        return f" ({value:+,.0f} Hz/s)"
    if setting == "band_hz":
        return f" ({value:.4g} Hz)"
    return f" ({value:.3g})"


def _bound_sentence(setting: str, bound: str | None, value: float | None, channels, centres,
                    fs: float | None) -> str:
    name = PARAMETER_WORDS.get(setting, setting.replace("_", " "))
    if bound in ("lower", "upper"):
        where = ("the smallest value searched" if bound == "lower" else
                 "the largest value searched") + _value_words(setting, value, fs)
    else:  # a bound the engine describes in words
        where = "a search bound" + (f" ({bound.replace('_', ' ')})" if bound else "")
    remedy = REMEDY.get((setting, bound)) or REMEDY.get((setting, "lower"))
    return (f"The result's {name} sits on {where}{channels_text(channels, centres)}: the "
            "sharpest value may lie beyond what was searched" + (f"; {remedy}." if remedy else "."))


def _bound_sentences(judged: Judgement, centres, fs: float | None) -> list[str]:
    sentences = []
    for detail in judged.bounds_detail:
        setting, value = detail.setting or "a parameter", detail.value
        if setting == "channels":
            where = channels_text(detail.channels, centres)
            sentences.append(f"The channel spacing caps the window length{where}: a longer "
                             "window would fall between channel centres, so the grid cannot "
                             "hold it; more channels (--channels) would lift the cap.")
            continue
        if setting == "max_negative_share":
            ceiling = f" of {100 * value:g} %" if value is not None else ""
            sentences.append(f"The result stopped at the positivity ceiling{ceiling} (the "
                             "share of the image below zero), not at an optimum of the "
                             "criterion; raising the negative share allowed "
                             "(--max-negative-share) permits more super-resolution, and more "
                             "Wigner–Ville interference with it.")
            continue
        sentences.append(_bound_sentence(setting, detail.bound, value, detail.channels, centres,
                                         fs))
    described = {str(d.setting) for d in judged.bounds_detail}
    sentences += [_bound_sentence(setting, None, None, None, centres, fs)
                  for setting in judged.bounds_hit if setting not in described]
    return sentences


def _negative_sentence(judged: Judgement, centres) -> list[str]:
    share = judged.negative_share
    overall = share.overall
    if overall is None or overall <= NEGATIVE_SHARE_WARN:
        return []
    per_channel = share.per_channel
    worst = max((i for i, v in enumerate(per_channel) if v is not None),
                key=lambda i: per_channel[i], default=None)
    if worst is None:
        worst_text = ""
    elif centres is not None and worst < len(centres):
        worst_text = (f" (most in the channel at {_hz(centres[worst])} Hz: "
                      f"{100 * per_channel[worst]:.1f} %)")
    else:
        worst_text = f" (most in one channel: {100 * per_channel[worst]:.1f} %)"
    return [f"{100 * overall:.2g} % of the image's absolute mass is negative{worst_text}, above "
            f"{100 * NEGATIVE_SHARE_WARN:.1f} %: read the output as a sharpness map, not as energy "
            "per cell, and lower the negative share allowed (--max-negative-share) if energies "
            "matter."]


def warnings(diagnostics) -> list[str]:
    """Every reason to doubt the result, one plain sentence each in a fixed order; empty when
    there is none. Conditions: a parameter on a search bound (the positivity ceiling included),
    a negative share above 0.5 %, the spectrogram fallback, fewer than 30 held-out windows, a
    judgement made in-sample, a negative held-out gain, a stop by the time limit or a cancel."""
    d = Diagnostics.of(diagnostics)
    out = []
    if d.stop_reason == "cancelled":
        out.append("The search was cancelled: the filterbank is the best found so far and was "
                   "not judged on held-out windows.")
    elif d.stop_reason == "time_limit":
        out.append("The search stopped at its time limit before its budget was spent: a longer "
                   "run may find a sharper filterbank.")
    if d.fallback is not None:
        reason = d.fallback.reason
        out.append("The search returned the best spectrogram instead of a learned filterbank"
                   + (f": {reason}." if reason else "."))
    judged = d.judgement
    if judged is None:
        return out
    if judged.in_sample is True:
        out.append("Judged in-sample (no windows held out): the gain was measured on the windows "
                   "the fit used and overstates what new bursts will show; keep a share of the "
                   "windows out (--held-out) to judge it.")
    else:
        held = judged.held_out_windows
        if held is not None and held < MIN_HELD_OUT_WINDOWS:
            out.append(f"Only {held} windows were held out (fewer than {MIN_HELD_OUT_WINDOWS}): "
                       "the gain and its interval rest on too few bursts to be trusted; use a "
                       "larger corpus or a larger held-out share (--held-out).")
    estimate, high = judged.gain_bits.estimate, judged.gain_bits.high
    # tuned for detection, not sharpness: no grid to blame
    by_detection = isinstance(d.settings.criterion, Mapping) \
        and d.settings.criterion.get("name") == "detection"
    if estimate is not None and round(estimate, 2) < 0 and not by_detection:
        surely = high is not None and high < 0
        out.append("The tuned filterbank is less sharp than the best plain spectrogram on windows "
                   "the fit never saw" + (" (the whole interval is below 0)" if surely else "")
                   + ": the channel grid shortens windows where its spacing is wider than their "
                   "frequency spread; more channels or a narrower band may help, or use the "
                   "plain spectrogram.")
    centres = d.channel_centres
    out += _bound_sentences(judged, centres, d.settings.sampling_rate_hz)
    out += _negative_sentence(judged, centres)
    return out


def scorecard(diagnostics) -> dict | None:
    """The scorecard as recorded (``judgement.scorecard``, for the service's job summary), None
    when absent (runs before it have none)."""
    judged = Diagnostics.of(diagnostics).judgement
    card = None if judged is None else judged.scorecard
    return None if card is None else card.to_json()


def spectrogram_words(diagnostics) -> str:
    """The best plain spectrogram as a user would set it up: its Gaussian window's std (what
    ``scipy.signal.windows.gaussian`` takes) in samples and ms, and its length, e.g. "the plain
    spectrogram with a Gaussian window of std 5.66 samples (1.41 ms), 61 samples long". The
    std is of the window h itself, √2·σ_t (σ_t, the recorded ``time_spread_s``, is the time
    std of |h|²: search.spectrogram)."""
    d = Diagnostics.of(diagnostics)
    base = d.spectrogram
    sigma = None if base is None else base.time_spread_s
    fs = d.settings.sampling_rate_hz
    if sigma is None:
        return "the best plain spectrogram"
    std = math.sqrt(2.0) * sigma
    text = "the plain spectrogram with a Gaussian window of std " + (
        f"{std * fs:.3g} samples ({1e3 * std:.3g} ms)" if fs is not None else f"{1e3 * std:.3g} ms")
    length = base.window_samples
    return text + (f", {length} samples long" if length is not None else "")


def _row_interval(entry, unit: str) -> tuple[str, bool]:
    """(" [low, high] unit" or "", whether the interval includes zero) of a scorecard Estimate."""
    if entry is None or entry.low is None or entry.high is None:
        return "", False
    return f" [{entry.low:.2f}, {entry.high:.2f}{unit}]", entry.low <= 0.0 <= entry.high


def _detection_sentence(card: Scorecard, name: str, who: str, spectrogram: str) -> str | None:
    entry = card.row("detection_db", name)
    if entry is None:
        return None
    estimate = entry.estimate
    if estimate is None:
        return f"{who}: the detection margin could not be measured (a threshold was never reached)"
    interval, zero = _row_interval(entry, " dB")
    if zero:
        return (f"{who} finds the site's bursts no weaker and no stronger than the best plain "
                f"spectrogram ({estimate:+.1f} dB,{interval}: the interval includes zero), so "
                f"{spectrogram} serves as well for detection")
    if estimate >= 0:
        return (f"{who} finds the site's bursts {estimate:.1f} dB weaker than the best plain "
                f"spectrogram{interval}")
    return (f"{who} needs the site's bursts {-estimate:.1f} dB stronger than the best plain "
            f"spectrogram does to find them{interval}")


def _onset_sentence(card: Scorecard, name: str, who: str) -> str | None:
    mine = card.representations[name].onset_median_ms
    plain = card.representations.get("spectrogram")
    theirs = None if plain is None else plain.onset_median_ms
    if mine is None:
        return None
    text = (f"{who}: onsets within {mine:.1f} ms of the waveform's (median; best plain "
            f"spectrogram {'?' if theirs is None else f'{theirs:.1f}'} ms)")
    interval, zero = _row_interval(card.row("onset_ms", name), " ms")
    if interval:
        text += f", difference{interval}" + (": the interval includes zero" if zero else "")
    return text


def _sharpness_sentence(card: Scorecard, name: str, who: str) -> str | None:
    entry = card.row("sharpness_bits", name)
    estimate = None if entry is None else entry.estimate
    if estimate is None:
        return None
    interval, zero = _row_interval(entry, " bit")
    if round(estimate, 2) == 0:
        words = "as sharp as the best plain spectrogram on the bursts"
    else:
        words = (f"{_bits(abs(estimate))} {'sharper' if estimate > 0 else 'less sharp'} than the "
                 "best plain spectrogram on the bursts")
    return f"{who}: {words}{interval}" + (" (the interval includes zero)" if zero else "")


def scorecard_rows(diagnostics, result_sharpness: bool = True) -> list[str]:
    """The scorecard in words, the result first and then the user's own spectrogram: the
    detection margin, the onset fidelity and the burst sharpness, each against the best plain
    spectrogram with its paired interval; an interval that includes zero is said plainly with
    the spectrogram window that serves as well. Empty without a scorecard.
    ``result_sharpness`` False leaves out the result's sharpness row (the report says it in
    :func:`gain_words`)."""
    d = Diagnostics.of(diagnostics)
    card = None if d.judgement is None else d.judgement.scorecard
    if card is None:
        return []
    spectrogram = spectrogram_words(d)
    out = []
    # after a fallback the result is the best plain spectrogram on the channel grid, not a
    # learned filterbank: say so, not "the tuned filterbank"
    result = ("the returned spectrogram (the fallback, on the channel grid)"
              if d.fallback is not None else "the tuned filterbank")
    for name, who in (("result", result),
                      ("yours", f"your spectrogram ({d.settings.compare_to})")):
        if name not in card.representations:
            continue
        sharpness = _sharpness_sentence(card, name, who) \
            if result_sharpness or name != "result" else None
        for sentence in (_detection_sentence(card, name, who, spectrogram),
                         _onset_sentence(card, name, who), sharpness):
            if sentence:
                out.append(sentence[0].upper() + sentence[1:])
    if card.rows.get("detection_db") is None:
        out.append("Detection margin: not measured (the corpus has no noise windows to inject "
                   "the bursts into: 'whole' or 'sliding' windows, or no quiet stretch)")
    return out


def lines(diagnostics) -> list[str]:
    """The scorecard rows (or, for runs without one, the gain sentence), then each warning
    prefixed ``warning: `` (the CLI's first lines)."""
    d = Diagnostics.of(diagnostics)
    lead = scorecard_rows(d) or [gain_sentence(d)]
    return lead + [f"warning: {w}" for w in warnings(d)]
