"""Values and settings in words and units for people: numbers, shares, intervals, onsets, and
settings dicts turned into (label, text) pairs.

Pure text: nothing here writes HTML (``service.report.sections`` escapes and places it). Units come
from the key's suffix (``_hz``, ``_hz_per_s``, ``_samples``, ``_s``; seconds under one in ms).
"""
from __future__ import annotations

import json
import math
import re
from collections.abc import Mapping

from burstlens.search.safe_io import finite_or_none
from burstlens.search.diagnostics_doc import Onset

# The job settings of docs/design.md §7 (what a person sets); everything else the engine resolved is a
# default it chose, shown apart with the corpus reader's choices.
JOB_SETTINGS = ("channels", "band_hz", "spacing", "window_s", "criterion", "cell_area", "chirp",
                "refine", "evaluations", "time_limit_s", "bootstrap", "seed", "windowing",
                "max_windows", "held_out", "max_negative_share", "subset", "n_jobs")
# recorded name -> the job settings' name for it: the record of a run (diagnostics_["settings"],
# copied into filterbank.json) spells the setting jobs as n_jobs, as every file written so far does
SETTING_ALIASES = {"n_jobs": "jobs"}

# Words for setting names whose spelling out is not enough; the rest are spelled out from the key.
LABELS = {"sta": "STA length", "lta": "LTA length", "window": "window length",
          "bootstrap": "bootstrap resamples", "evaluations": "evaluation budget",
          "seed": "random seed", "n_jobs": "parallel jobs", "jobs": "parallel jobs", "max_windows": "most windows kept",
          "band": "channel band",
          "bandpass": "band-pass", "chirp": "chirped channels", "refine": "per-channel refinement",
          "held_out": "share of windows held out", "max_negative_share": "negative share allowed",
          "subset": "windows in the family search", "cell_area": "cell area range",
          "trigger_on": "trigger-on STA/LTA ratio", "trigger_off": "trigger-off STA/LTA ratio",
          "pre_trigger": "share of the window before the trigger", "eps": "kernel truncation",
          "source_hash": "corpus fingerprint (SHA-256)", "corpus_hash": "corpus fingerprint (SHA-256)",
          "sampling_rate": "sampling rate", "csv_sampling_rate": "sampling rate declared for CSV files",
          "band_hz_default": "channel band when none is given", "n_windows": "windows",
          "time_spread_bounds": "Gaussian window std range searched",
          "chirp_bound": "sweep-rate bound", "chirp_bound_source": "how the sweep-rate bound was found",
          "nyquist": "Nyquist frequency", "batch": "candidates scored per round",
          "stall_rounds": "rounds without progress before stopping",
          "stall_tol": "smallest relative improvement counted as progress",
          "initial_points": "initial design points", "refine_sweeps": "refinement sweeps",
          "refine_maxiter": "refinement steps per parameter",
          "refine_min_share": "image energy share a channel needs to be refined",
          "smoothness": "smoothness penalty between neighbouring channels",
          "chunk_windows": "windows per work chunk",
          "family_reference": "reference frequency of the family search",
          "native_rates": "native sampling rates", "bandpass_order": "band-pass filter order",
          "clip_run": "run of equal extreme samples counted as clipping",
          "dominant_frequency_loud_frames": "loud frames behind the dominant frequency",
          "trigger_band": "trigger band", "compare_to": "your spectrogram",
          "guard": "pipeline guard", "stop_reason": "stop reason", "elapsed": "time taken",
          "origin": "result from stage", "judged_on": "judged on", "gain": "gain over the best spectrogram",
          "steady_lines": "steady lines removed", "burstlens_version": "burstlens version",
          "trace_id": "SEED id", "offset": "offset in the trace", "start": "start (UTC)",
          "components": "components", "hop": "hop", "windowing": "windowing",
          "time_limit": "time limit",
          "sampling_rate_source": "how the sampling rate was chosen",
          "windows_found": "windows found", "windows_kept": "windows kept",
          "windows_checked": "windows checked", "burst_duration": "burst duration",
          "noise": "noise sample", "window_samples": "window length"}
# unit suffix of a key -> (unit shown, factor); seconds shorter than one are shown in ms
UNITS = (("_hz_per_s", "Hz/s", 1.0), ("_hz", "Hz", 1.0), ("_samples", "samples", 1.0),
         ("_bits", "bits", 1.0), ("_s", "s", 1.0))
# keys whose value is a kernel time spread σ_t (s), shown as the Gaussian window's std √2·σ_t,
# the one window spread the page uses (docs/design.md §3: |h|² has time std σ_t)
WINDOW_SPREAD_KEYS = ("time_spread_s", "time_spread_bounds_s")
# a snake_case name not part of a dotted path (scipy.signal.resample_poly names a function)
SNAKE_CASE = re.compile(r"(?<![\w.])[a-z][a-z0-9]*(?:_[a-z0-9]+)+\b")


def label_of(key: str) -> str:
    """A dict key as words for people: its label (``LABELS``) or the key spelled out, without
    its unit suffix ("sta_s" -> "STA length", "csv_sampling_rate_hz" -> "sampling rate
    declared for CSV files")."""
    key = str(key)
    stem, _ = key_stem(key)
    return LABELS.get(key) or LABELS.get(stem) or stem.replace("_", " ")


def plain_words(text: str) -> str:
    """Free text from the engine with every snake_case name in it said in words
    ("geometric mean of band_hz" -> "geometric mean of channel band")."""
    return SNAKE_CASE.sub(lambda m: label_of(m.group(0)), str(text))


def fmt(value) -> str:
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


def equivalent_text(equivalent) -> str:
    """The channel's ``equivalent`` reading as one line of text for people."""
    if isinstance(equivalent, str):
        return equivalent
    if isinstance(equivalent, Mapping):
        for key in ("text", "description", "summary", "reading"):
            if isinstance(equivalent.get(key), str):
                return equivalent[key]
        return "; ".join(f"{k} {fmt(v)}" for k, v in equivalent.items())
    return "" if equivalent is None else fmt(equivalent)


def resolution_text(area: float) -> str:
    """Cell area a as a geophysicist reads it: ×1/a finer (super-resolution) or ×a coarser."""
    if math.isclose(area, 1.0, rel_tol=5e-3):
        return "as a spectrogram (a = 1)"
    if area < 1:
        return f"super-resolution ×{1 / area:.2f}"
    return f"smoothing ×{area:.2f}"


def stability_text(entry) -> str:
    """The bootstrap interval of one channel's Gaussian window std √2·σ_t (ms) and cell area,
    or why none."""
    if not isinstance(entry, Mapping):
        return "not recorded"
    method = str(entry.get("method") or "")
    if method.startswith(("skipped", "not determined")):
        return plain_words(method)
    parts = []
    spread, area = entry.get("time_spread_s"), entry.get("cell_area")
    if isinstance(spread, (list, tuple)) and len(spread) == 2 and None not in spread:
        low, high = (1e3 * math.sqrt(2.0) * v for v in spread)  # the window's std, as the table
        parts.append(f"window std {low:.3g}–{high:.3g} ms")
    if isinstance(area, (list, tuple)) and len(area) == 2 and None not in area:
        parts.append(f"a {area[0]:.2f}–{area[1]:.2f}")
    return ", ".join(parts) or "not recorded"


def percent_text(value) -> str:
    """A share (0–1) as a percentage to 3 significant digits, or "not recorded"."""
    number = finite_or_none(value)
    return "not recorded" if number is None else f"{100 * number:.3g} %"


def onset_text(onset: Onset | None) -> str:
    """'result m / p ms · spectrogram m / p ms (n windows)' from the judgement's onset timing
    (``Diagnostics.judgement.onset``; None: not measured)."""
    if onset is None:
        return "not measured (no trigger offsets)"
    parts, counts = [], set()
    for name, entry in (("result", onset.result), ("spectrogram", onset.spectrogram)):
        shown = [f"{v:.3g}" if v is not None else "?" for v in (entry.median_ms, entry.p90_ms)]
        parts.append(f"{name} {shown[0]} / {shown[1]} ms")
        if entry.windows is not None:
            counts.add(entry.windows)
    windows = f" ({', '.join(map(str, sorted(counts)))} windows)" if counts else ""
    return " · ".join(parts) + windows


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
        return "; ".join(f"{label_of(k)} {_value_text(v, key_stem(str(k))[1] or unit)}"
                         for k, v in value.items())
    return plain_words(value)


def key_stem(key: str) -> tuple[str, str]:
    """A setting key without its unit suffix, and the unit it names ("sta_s" -> ("sta", "s"))."""
    for suffix, unit, _ in UNITS:
        if key.endswith(suffix) and len(key) > len(suffix):
            return key[:-len(suffix)], unit
    return key, ""


def utc_text(iso: str) -> str:
    """An ISO 8601 UTC time as people read it, to the millisecond:
    "2026-03-17T02:00:12.265250Z" -> "2026-03-17 02:00:12.265 UTC"; other text unchanged."""
    match = re.fullmatch(r"(\d{4}-\d{2}-\d{2})T(\d{2}:\d{2}:\d{2})(\.\d+)?(Z|[+-]00:?00)?",
                         str(iso).strip())
    if not match:
        return str(iso)
    fraction = (match.group(3) or ".000")[1:4].ljust(3, "0")
    return f"{match.group(1)} {match.group(2)}.{fraction} UTC"


def _window_std(value):
    """σ_t (a number or a pair, s) as the Gaussian window's std √2·σ_t; others unchanged."""
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        return math.sqrt(2.0) * value
    if isinstance(value, (list, tuple)) and all(isinstance(v, (int, float)) for v in value):
        return [math.sqrt(2.0) * v for v in value]
    return value


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
        stem, unit = key_stem(str(key))
        label = label_of(key)
        if str(key) in WINDOW_SPREAD_KEYS:
            value = _window_std(value)
        text = _value_text(value, unit)
        if stem in sources:
            text += f" ({_value_text(sources[stem])})"
        items.append((label[0].upper() + label[1:], text))
    return items
