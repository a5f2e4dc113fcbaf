"""Does a tuned filterbank still fit the site? The old filterbank judged on new windows.

New windows, cut as the tuning cut its corpus, are compared with what the tuning recorded, on
two sides:

- **the site** — the bursts' dominant frequency and median duration (``Corpus.defaults``), the
  steady lines (found now by :func:`search.noise.site_lines`, against the filterbank's
  ``steady_lines_hz``), the sweep-rate bound (:func:`search.sweeps.sweep_rate_bound`, against
  the tuning's ``chirp_bound_hz_per_s``) and the noise level (rms of the noise windows), each
  against a named threshold below;
- **the scorecard** (:func:`search.scorecard.scorecard`, the tuning's judgement) — the old
  filterbank against the best plain spectrogram *of the new data* and against a quick refit
  (:class:`search.optimize.FilterbankSearch` with a small budget, ``refine=False``, no
  bootstrap), on the refit's held-out windows so the refit is not judged on what it was fitted
  to. Every window first loses the site's steady lines found now (as the tuning's windows lost
  its own), so the kernels are judged on the bursts; a new line is judged on the site side.

:func:`check_drift` returns a :class:`DriftCheck`: ``verdict`` "keep" when nothing moved, else
"retune", with what moved in words. Units: Hz, s, dB, bits, ms; windows are (M, N) float64.
"""
from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field

import numpy as np

from burstlens.search.fit.judge import DETECTION_TOLERANCE_DB
from burstlens.search.noise import LINE_RATIO, MERGE_BINS
from burstlens.search.sweeps import SAFETY

# The site side. A ratio threshold applies both ways (×1.25 or ÷1.25).
# 25 %: beyond what drawing another month from the same site moves these medians (the generated
# site of tests/search/test_drift.py under six more seeds moved the dominant frequency by at most
# 9 % and the median burst duration by at most 6 %), and about a third of an octave
# (2^(1/3) = 1.26), the spacing at which a log channel grid of tens of channels puts the bursts'
# energy into other channels than the ones whose kernels were fitted to it.
DOMINANT_FREQUENCY_RATIO = 1.25
BURST_DURATION_RATIO = 1.25
# A line found now stands at least LINE_RATIO (10 dB) over the spectrum around it (search.noise);
# it is new when no line of the filterbank lies within MERGE_BINS resolution bins (fs/N) of it,
# the distance at which the tuning itself counted two lines as one.
NEW_LINE_DB = 10.0 * math.log10(LINE_RATIO)
LINE_MATCH_BINS = MERGE_BINS
# The tuning's chirp bound is already SAFETY (2) times the sweeps it saw; sweeps faster than
# that headroom lie outside the chirp rates the old search could reach.
SWEEP_RATE_RATIO = SAFETY
# A doubling of the noise amplitude (6 dB) moves every burst's signal-to-noise ratio by as much,
# twelve times the detection row's resolution (DETECTION_TOLERANCE_DB).
NOISE_LEVEL_DB = 6.0

# The scorecard side. The refit must be sharper with its whole interval above zero and by at
# least this much: on the same generated site (six seeds) the quick refit came out 0.05–0.07 bits
# per burst *less* sharp than the old filterbank, so a tenth of a bit is past what the budget
# alone moves; a whole bit would be the Rényi entropy of doubling the cells a burst occupies.
REFIT_MIN_BITS = 0.1
# The detection margin is "surely negative" as in the tuning's pipeline guard: worse than the
# measurement's resolution, with the whole interval on the worse side of zero.
DETECTION_MARGIN_DB = DETECTION_TOLERANCE_DB

# Bounds of one check.
MAX_WINDOWS = 256     # burst windows read from the new files
EVALUATIONS = 8       # the quick refit's stage-1 budget
RESAMPLES = 1000      # the scorecard's paired bootstrap (≥ 1000 for percentile intervals,
                      # Efron & Tibshirani 1993, ch. 19)

VERDICTS = ("keep", "retune")


@dataclass(frozen=True)
class TuningRecord:
    """What the tuning recorded about its site (None: not recorded).

    ``dominant_frequency_hz`` (Hz) and ``burst_duration_s`` (median, s) from the diagnostics'
    ``corpus.defaults``; ``steady_lines_hz`` (Hz) from the filterbank; ``chirp_bound_hz_per_s``
    (Hz/s) from the tuning's settings; ``noise_rms`` (sample units) from the diagnostics'
    ``noise.rms``; ``missing`` says in words what is not recorded and why.
    """

    dominant_frequency_hz: float | None
    burst_duration_s: float | None
    steady_lines_hz: tuple
    chirp_bound_hz_per_s: float | None
    noise_rms: float | None
    missing: tuple = ()


@dataclass(frozen=True)
class SiteNow:
    """The same figures measured on the new windows (see :class:`TuningRecord`); ``lines_hz``
    and ``levels_db`` (dB over the spectrum around each line) of every line found now."""

    dominant_frequency_hz: float | None
    burst_duration_s: float | None
    lines_hz: tuple
    levels_db: tuple
    chirp_bound_hz_per_s: float | None
    noise_rms: float | None


@dataclass(frozen=True)
class Moved:
    """One thing that moved past its threshold: ``what`` (a name of :data:`MOVED`), the value
    ``then`` and ``now`` (None where one side has no value), their ``unit``, the ``rule`` that
    fired, and the sentence for people."""

    what: str
    then: float | None
    now: float | None
    unit: str
    rule: str
    words: str

    def to_json(self) -> dict:
        return {"what": self.what, "then": self.then, "now": self.now, "unit": self.unit,
                "rule": self.rule, "words": self.words}


MOVED = ("dominant_frequency", "burst_duration", "steady_line", "sweep_rate", "noise_level",
         "refit", "detection_margin")


@dataclass(frozen=True)
class DriftCheck:
    """The answer: ``verdict`` ("keep" | "retune"), ``moved`` (the :class:`Moved` reasons; empty
    for keep), ``not_compared`` (what could not be compared, in words), ``scorecard`` (the
    scorecard against the new data's best plain spectrogram, the tuning's orientation: positive
    means the representation is better), ``refit`` (the quick refit and its margin over the old
    filterbank) and ``figures`` (the record, the figures now and the bounds of the check)."""

    verdict: str
    moved: tuple
    not_compared: tuple
    scorecard: dict
    refit: dict
    figures: dict = field(default_factory=dict)

    def words(self) -> list[str]:
        """The answer in lines for people: the verdict, then each reason, then what was not
        compared."""
        head = ("the filterbank still serves (keep)" if self.verdict == "keep"
                else "re-tune: " + "; ".join(m.what.replace("_", " ") for m in self.moved))
        return [head, *(f"- {m.words}" for m in self.moved),
                *(f"not compared: {n}" for n in self.not_compared)]

    def to_json(self) -> dict:
        return {"verdict": self.verdict, "moved": [m.to_json() for m in self.moved],
                "not_compared": list(self.not_compared), "scorecard": self.scorecard,
                "refit": self.refit, "figures": self.figures}


# --------------------------------------------------------------------------------------------
# The two records


def tuning_record(filterbank, settings: Mapping, diagnostics: Mapping | None) -> TuningRecord:
    """:class:`TuningRecord` of a filterbank (its ``steady_lines_hz``), the tuning's resolved
    ``settings`` (``FilterbankDocument.tuning_settings``) and its diagnostics dict (None when
    not at hand: the site's bursts are then not compared)."""
    missing = []
    dominant = duration = rms = None
    if diagnostics is None:
        missing.append("dominant frequency and burst duration: no diagnostics of the tuning "
                       "were given")
    else:
        defaults = ((diagnostics.get("corpus") or {}).get("defaults")) or {}
        dominant = measured_dominant_frequency(defaults)
        duration = _positive((defaults.get("burst_duration_s") or {}).get("median"))
        for name, value in (("dominant frequency", dominant), ("burst duration", duration)):
            if value is None:
                missing.append(f"{name}: the tuning's diagnostics record no measured value "
                               f"(corpus.defaults: windows not cut around bursts, or no "
                               f"transient stood out)")
        rms = _positive((diagnostics.get("noise") or {}).get("rms"))
    if rms is None:
        missing.append("noise level: the tuning recorded no rms of its noise windows; the rms "
                       "now is in the figures")
    chirp = _positive(settings.get("chirp_bound_hz_per_s")) if settings.get("chirp") else None
    if chirp is None:
        missing.append("sweep rate: the tuning searched no chirped kernels (or recorded no "
                       "chirp bound)")
    return TuningRecord(dominant, duration, tuple(float(f) for f in filterbank.steady_lines_hz),
                        chirp, rms, tuple(missing))


def site_now(corpus, lines, chirp_bound_hz_per_s: float | None) -> SiteNow:
    """:class:`SiteNow` of a new corpus: its reader's dominant frequency and median burst
    duration, ``lines`` (:class:`search.noise.SteadyLines` found in it), the sweep-rate bound
    found in it (Hz/s, None when not searched) and the rms of its noise windows after the lines
    are removed (the background the bursts stand in, so a new line is not counted twice), None
    without noise windows."""
    defaults = getattr(corpus, "defaults", None) or {}
    noise = np.asarray(getattr(corpus, "noise_windows", np.zeros((0, 1))), dtype=np.float64)
    rms = None
    if noise.size:
        clean = lines.remove(noise, corpus.sampling_rate_hz)
        rms = float(np.sqrt(np.mean(clean * clean)))
    return SiteNow(measured_dominant_frequency(defaults),
                   _positive((defaults.get("burst_duration_s") or {}).get("median")),
                   tuple(float(f) for f in lines.lines_hz), tuple(float(v) for v in lines.levels_db),
                   chirp_bound_hz_per_s, rms)


def measured_dominant_frequency(defaults: Mapping) -> float | None:
    """The reader's dominant frequency (Hz) when it measured one from the transients; None when
    it fell back to a fraction of the rate (``dominant_frequency_source`` "fallback ...") or
    recorded none: a fallback says nothing about the bursts."""
    if str(defaults.get("dominant_frequency_source", "")).startswith("fallback"):
        return None
    return _positive(defaults.get("dominant_frequency_hz"))


# --------------------------------------------------------------------------------------------
# The site side


def site_moves(then: TuningRecord, now: SiteNow, sampling_rate_hz: float,
               window_samples: int) -> tuple[list, list]:
    """(:class:`Moved` reasons, what was not compared) of the site between the tuning's record
    and now, by the thresholds at the top of the module. ``sampling_rate_hz`` (Hz) and
    ``window_samples`` give the line-matching distance ``LINE_MATCH_BINS·fs/N`` (Hz)."""
    if sampling_rate_hz <= 0 or window_samples < 1:
        raise ValueError(f"sampling_rate_hz {sampling_rate_hz!r} and window_samples "
                         f"{window_samples!r} must be positive")
    moved, missing = [], list(then.missing)
    for what, a, b, unit, ratio, name in (
            ("dominant_frequency", then.dominant_frequency_hz, now.dominant_frequency_hz, "Hz",
             DOMINANT_FREQUENCY_RATIO, "the bursts' dominant frequency"),
            ("burst_duration", then.burst_duration_s, now.burst_duration_s, "s",
             BURST_DURATION_RATIO, "the median burst duration")):
        if a is None:
            continue
        if b is None:
            missing.append(f"{name}: not measured on the new windows (no transient stood out, "
                           f"or windows not cut around bursts)")
        elif ratio_moved(a, b, ratio):
            moved.append(Moved(what, a, b, unit, f"changed by more than a factor {ratio:g}",
                               f"{name} moved from {a:.4g} {unit} to {b:.4g} {unit} "
                               f"({100 * (b / a - 1):+.0f} %)"))
    tolerance = LINE_MATCH_BINS * sampling_rate_hz / window_samples
    for f, level in new_lines(then.steady_lines_hz, now.lines_hz, now.levels_db, tolerance):
        moved.append(Moved("steady_line", None, f, "Hz",
                           f"a line ≥ {NEW_LINE_DB:g} dB not within {tolerance:.3g} Hz of the "
                           f"filterbank's lines",
                           f"a new steady line at {f:.2f} Hz, {level:.1f} dB over the spectrum "
                           f"around it, that the filterbank does not remove"))
    if then.chirp_bound_hz_per_s is not None:
        a, b = then.chirp_bound_hz_per_s, now.chirp_bound_hz_per_s
        if b is None:
            missing.append("sweep rate: not measured on the new windows")
        elif b > SWEEP_RATE_RATIO * a:
            moved.append(Moved("sweep_rate", a, b, "Hz/s",
                               f"the sweep-rate bound grew by more than a factor {SWEEP_RATE_RATIO:g}",
                               f"arrivals sweep faster: the sweep-rate bound rose from {a:.4g} "
                               f"to {b:.4g} Hz/s, beyond the chirps the tuning searched"))
    if then.noise_rms is not None:
        a, b = then.noise_rms, now.noise_rms
        if b is None:
            missing.append("noise level: the new files gave no noise windows")
        elif abs(20.0 * math.log10(b / a)) > NOISE_LEVEL_DB:
            moved.append(Moved("noise_level", a, b, "rms",
                               f"the noise rms changed by more than {NOISE_LEVEL_DB:g} dB",
                               f"the noise level moved by {20 * math.log10(b / a):+.1f} dB "
                               f"(rms {a:.4g} to {b:.4g})"))
    return moved, missing


def ratio_moved(then: float, now: float, ratio: float) -> bool:
    """True when ``now`` differs from ``then`` by more than the factor ``ratio`` (> 1) either
    way: |log(now/then)| > log(ratio). Both positive."""
    if not (then > 0 and now > 0 and ratio > 1):
        raise ValueError(f"ratio_moved needs positive values and a ratio > 1, got {then!r}, "
                         f"{now!r}, {ratio!r}")
    return abs(math.log(now / then)) > math.log(ratio)


def new_lines(known_hz, found_hz, levels_db, tolerance_hz: float) -> list[tuple[float, float]]:
    """The lines of ``found_hz`` (Hz, with their ``levels_db``) at least :data:`NEW_LINE_DB`
    high and farther than ``tolerance_hz`` from every line of ``known_hz``, as (Hz, dB)."""
    known = np.asarray(list(known_hz), dtype=np.float64)
    out = []
    for f, level in zip(found_hz, levels_db, strict=True):
        if level >= NEW_LINE_DB and not np.any(np.abs(known - f) <= tolerance_hz):
            out.append((float(f), float(level)))
    return out


# --------------------------------------------------------------------------------------------
# The scorecard side


def judge_old(old, refit, sigma_s: float, bursts, noise, band_hz, criterion, *, eps: float = 1e-6,
              resamples: int = RESAMPLES, seed: int = 0) -> tuple[dict, dict]:
    """The old filterbank on new windows, by :func:`search.scorecard.scorecard`.

    ``old`` and ``refit``: :class:`search.filterbank.Filterbank` (their steady lines are not
    applied: ``bursts`` (M, N) and ``noise`` (K, N) have had the site's lines removed already);
    ``sigma_s``: the time spread (s) of the new data's best plain spectrogram; ``band_hz``
    its band; ``criterion`` the tuning's :class:`search.criteria.Criterion`.

    Returns (the scorecard of the old filterbank ("filterbank"), the refit and the raw envelope
    against the spectrogram, the tuning's orientation; the rows of the scorecard of the refit
    against the old filterbank: positive means the refit is better). Two scorecards, so both
    comparisons get their own paired intervals.
    """
    from burstlens.search.scorecard import (
        envelope_representation,
        filterbank_representation,
        scorecard,
    )
    from burstlens.search.spectrogram import spectrogram_representation

    fs = old.sampling_rate_hz
    kernels = {"filterbank": filterbank_representation("filterbank", _without_lines(old), eps),
               "refit": filterbank_representation("refit", _without_lines(refit), eps)}
    spectrogram = spectrogram_representation(sigma_s, fs, band_hz, np.shape(bursts)[1], eps)
    card = scorecard({"spectrogram": spectrogram, **kernels,
                      "envelope": envelope_representation(fs)}, bursts, noise, fs, criterion,
                     resamples=resamples, seed=seed)
    versus = scorecard(kernels, bursts, noise, fs, criterion, reference="filterbank",
                       resamples=resamples, seed=seed)
    return card, versus["rows"]


def scorecard_moves(card: dict, refit_rows: dict) -> list:
    """:class:`Moved` reasons from the scorecards of :func:`judge_old`: the quick refit sharper
    than the old filterbank by at least :data:`REFIT_MIN_BITS` with its whole interval above
    zero; the old filterbank needing bursts more than :data:`DETECTION_MARGIN_DB` stronger than
    the new best plain spectrogram with its whole interval below zero."""
    moved = []
    sharp = ((refit_rows or {}).get("sharpness_bits") or {}).get("refit") or {}
    estimate, low = sharp.get("estimate"), sharp.get("low")
    if estimate is not None and low is not None and estimate >= REFIT_MIN_BITS and low > 0:
        moved.append(Moved("refit", 0.0, estimate, "bits",
                           f"the quick refit sharper by ≥ {REFIT_MIN_BITS:g} bits, interval above 0",
                           f"a quick refit on the new data is sharper by {estimate:.3f} bits "
                           f"per burst [{low:.3f}, {sharp['high']:.3f}]"))
    margin = ((card.get("rows") or {}).get("detection_db") or {}).get("filterbank") or {}
    estimate, high = margin.get("estimate"), margin.get("high")
    if estimate is not None and high is not None and estimate < -DETECTION_MARGIN_DB and high < 0:
        low = margin.get("low")
        interval = "" if low is None else f" [{-high:.1f}, {-low:.1f}]"
        moved.append(Moved("detection_margin", None, estimate, "dB",
                           f"the detection margin below −{DETECTION_MARGIN_DB:g} dB, interval "
                           f"below 0",
                           f"the filterbank needs bursts {-estimate:.1f} dB{interval} stronger "
                           f"than the new data's best plain spectrogram"))
    return moved


# --------------------------------------------------------------------------------------------
# The check


def refit_options(filterbank, settings: Mapping, *, evaluations: int, seed: int) -> dict:
    """``FilterbankSearch`` options of the quick refit: the tuning's grid, band, criterion and
    search space as recorded in its ``settings`` (the filterbank's channel count and centre
    span where none are), with ``evaluations``, no refinement, no bootstrap and no pipeline
    guard (the check judges the refit itself)."""
    centers = filterbank.center_hz
    keep = ("spacing", "criterion", "cell_area", "chirp", "held_out", "max_negative_share", "eps")
    options = {k: settings[k] for k in keep if settings.get(k) is not None}
    options["channels"] = int(settings.get("channels") or len(centers))
    options["band_hz"] = list(settings.get("band_hz") or [float(centers.min()), float(centers.max())])
    options.update(evaluations=int(evaluations), refine=False, bootstrap=0, guard=False,
                   seed=int(seed), jobs=1)
    return options


def check_drift(document, corpus, diagnostics: Mapping | None = None, *,
                evaluations: int = EVALUATIONS, resamples: int = RESAMPLES, seed: int = 0,
                progress: Callable[[float], None] | None = None) -> DriftCheck:
    """Judge ``document``'s filterbank (:class:`search.documents.FilterbankDocument`) on a new
    ``corpus`` (:class:`search.corpus.Corpus`, read with ``document.reading_options()``),
    against the tuning's ``diagnostics`` dict when given.

    ``progress(fraction)`` (0–1) is called as the refit and the scorecard go. ``ValueError``
    when the corpus does not fit the filterbank (rate or window length) or a bound is bad.
    """
    from burstlens.search.fit.evaluate import make_criterion
    from burstlens.search.optimize import FilterbankSearch

    old = document.filterbank
    fs = old.sampling_rate_hz
    if abs(corpus.sampling_rate_hz - fs) > 1e-9 * fs:
        raise ValueError(f"the new windows are at {corpus.sampling_rate_hz:g} Hz but the "
                         f"filterbank is for {fs:g} Hz")
    n = int(np.shape(corpus.windows)[1])
    if document.window_samples is not None and int(document.window_samples) != n:
        raise ValueError(f"the new windows have {n} samples but the tuning's had "
                         f"{int(document.window_samples)}")
    for name, value, least in (("evaluations", evaluations, 1), ("resamples", resamples, 0),
                               ("seed", seed, 0)):
        if not isinstance(value, int) or isinstance(value, bool) or value < least:
            raise ValueError(f"{name} = {value!r}: must be an integer ≥ {least}")
    settings = document.tuning_settings
    search = FilterbankSearch(**refit_options(old, settings, evaluations=evaluations, seed=seed))

    def refit_progress(message: dict) -> None:
        if progress is not None:
            progress(0.7 * float(message.get("fraction", 0.0)))

    search.fit(corpus, progress=refit_progress)
    d = search.diagnostics_
    lines = _lines_of(d["noise"]["lines"])
    s = d["settings"]
    now = site_now(corpus, lines, _positive(s.get("chirp_bound_hz_per_s")) if s.get("chirp") else None)
    then = tuning_record(old, settings, diagnostics)
    moved, missing = site_moves(then, now, fs, n)

    clean = lines.remove(corpus.windows, fs)
    judged = np.asarray(d["per_window"]["windows"], dtype=np.int64)
    noise = lines.remove(np.asarray(corpus.noise_windows, dtype=np.float64).reshape(-1, n), fs)
    sigma = float(d["baselines"]["spectrogram"]["parameters"]["time_spread_s"])
    card, versus = judge_old(old, search.filterbank_, sigma, clean[judged], noise, s["band_hz"],
                             make_criterion(s["criterion"]), eps=s["eps"], resamples=resamples,
                             seed=seed)
    if progress is not None:
        progress(1.0)
    moved += scorecard_moves(card, versus)
    if card["rows"]["detection_db"] is None:
        missing.append("detection margin: the new files gave no noise windows")
    refit = {"against_filterbank": versus, "evaluations": int(evaluations),
             "time_spread_s": _span(search.filterbank_.time_spread_s),
             "chirp_hz_per_s": _span(search.filterbank_.chirp_hz_per_s),
             "origin": d["origin"], "fallback": d["fallback"] is not None,
             "judged_on": f"{judged.size} held-out windows of the refit's split"
             if not d["judgement"]["in_sample"] else "the refit's own windows (held_out = 0)"}
    figures = {
        "then": _record_json(then), "now": _now_json(now),
        "best_spectrogram_time_spread_s": sigma,
        "windows": int(np.shape(corpus.windows)[0]), "judged_windows": int(judged.size),
        "noise_windows": int(noise.shape[0]),
        "gain_bits_at_tuning": document.gain_bits,
        "thresholds": thresholds()}
    return DriftCheck("retune" if moved else "keep", tuple(moved), tuple(missing), card, refit,
                      figures)


def thresholds() -> dict:
    """The thresholds the verdict uses, by name (for the JSON answer)."""
    return {"dominant_frequency_ratio": DOMINANT_FREQUENCY_RATIO,
            "burst_duration_ratio": BURST_DURATION_RATIO, "new_line_db": NEW_LINE_DB,
            "line_match_bins": LINE_MATCH_BINS, "sweep_rate_ratio": SWEEP_RATE_RATIO,
            "noise_level_db": NOISE_LEVEL_DB, "refit_min_bits": REFIT_MIN_BITS,
            "detection_margin_db": DETECTION_MARGIN_DB}


# --------------------------------------------------------------------------------------------
# Helpers


def _positive(value) -> float | None:
    """``value`` as a float when it is a finite positive number, else None."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return None
    value = float(value)
    return value if math.isfinite(value) and value > 0 else None


def _without_lines(filterbank):
    """The filterbank's kernels without its steady lines (for windows already cleaned)."""
    from burstlens.search.filterbank import Filterbank

    return Filterbank(filterbank.channels, filterbank.sampling_rate_hz)


def _lines_of(record: Mapping):
    """The :class:`search.noise.SteadyLines` the refit found and removed, from its record."""
    from burstlens.search.noise import SteadyLines

    return SteadyLines(tuple(record["lines_hz"]), tuple(record["levels_db"]), record["found_in"],
                       int(record["windows"]))


def _span(values) -> list:
    v = np.asarray(values, dtype=np.float64)
    return [float(v.min()), float(v.max())]


def _record_json(r: TuningRecord) -> dict:
    return {"dominant_frequency_hz": r.dominant_frequency_hz, "burst_duration_s": r.burst_duration_s,
            "steady_lines_hz": list(r.steady_lines_hz), "chirp_bound_hz_per_s": r.chirp_bound_hz_per_s,
            "noise_rms": r.noise_rms}


def _now_json(n: SiteNow) -> dict:
    return {"dominant_frequency_hz": n.dominant_frequency_hz, "burst_duration_s": n.burst_duration_s,
            "steady_lines_hz": list(n.lines_hz), "line_levels_db": list(n.levels_db),
            "chirp_bound_hz_per_s": n.chirp_bound_hz_per_s, "noise_rms": n.noise_rms}
