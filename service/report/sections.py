"""The report page's HTML fragments: verdict lead, headline cards, judgement and channel
tables, rejections, corpus and trace tables, settings, figures and the one-line summary.

Each function returns a piece of markup from the two documents (``filterbank_json``, the
filterbank JSON of docs/design.md §8; ``diagnostics``, the search's diagnostics as
``search.diagnostics_doc.Diagnostics``); every text that comes from data goes through ``esc``.
The words themselves are ``service.report.wording``'s.
"""
from __future__ import annotations

import base64
import datetime
import html
import math
import re
from collections.abc import Mapping

from burstlens.search.diagnostics_doc import CorpusRecord, Diagnostics, Interval, WindowCounts
from burstlens.search.documents import FilterbankDocument
from burstlens.search.safe_io import finite_or_none
from burstlens.search.settings import CRITERION_DEFAULTS, SEARCH_KEYS, SETTINGS_DEFAULTS
from burstlens.service import verdict
from burstlens.service.report.figures import Plot
from burstlens.service.report.inputs import channel_column
from burstlens.service.report.terms import FWHM_PER_STD, stft_line, window_terms
from burstlens.service.report.wording import (JOB_SETTINGS, SETTING_ALIASES, equivalent_text, fmt,
                                              key_stem, label_of, onset_text, people_items,
                                              percent_text, plain_words, resolution_text,
                                              stability_text, utc_text)

REJECTION_LIST_LIMIT = 200
TRACE_LIST_LIMIT = 200
SITES_NAMED = 4  # stations named in the summary line before "and N more"
_UNSET = object()  # a job setting the job did not give (None is a value it may give)


def esc(value) -> str:
    """Any value as HTML text, quotes escaped too (safe inside attribute values)."""
    return html.escape(str(value), quote=True)


def flags_unbroken(text: str) -> str:
    """Escaped text with each command-line option (``--held-out``) kept on one line, so a
    wrapped warning never splits it at its hyphens."""
    return re.sub(r"--[a-z][a-z-]*", lambda m: f'<span class="flag">{m.group(0)}</span>', text)


def kv_table(mapping) -> str:
    """A two-column table of a dict's entries, each key said in words with the unit its name
    carries (``people_items``); keys already in words are kept as they are."""
    if not isinstance(mapping, Mapping) or not mapping:
        return '<p class="muted">none recorded</p>'
    rows = "".join(f"<tr><th scope=\"row\">{esc(k)}</th><td>{esc(v)}</td></tr>"
                   for k, v in people_items(mapping))
    return f'<table class="kv">{rows}</table>'


# (header, unit, data-field of the exact JSON value or None, text of one channel from its JSON
# and its service.report.terms.WindowTerms; the sample columns need the terms)
CHANNEL_COLUMNS = (
    ("centre", "Hz", "center_hz", lambda c, w: f"{c['center_hz']:.5g}"),
    ("Gaussian window std s", "ms", "time_spread_s",
     lambda c, w: f"{1e3 * math.sqrt(2.0) * c['time_spread_s']:.3g}"),
    ("FWHM of the same window", "ms", None,
     lambda c, w: f"{1e3 * FWHM_PER_STD * math.sqrt(2.0) * c['time_spread_s']:.3g}"),
    ("scipy gaussian std", "samples", None, lambda c, w: f"{w.std_samples:.4g}"),
    ("nearest Hann length", "samples", None, lambda c, w: f"{w.hann}"),
    ("window length / NFFT / hop", "samples", None, lambda c, w: f"{w.length} / {w.nfft} / {w.hop}"),
    ("resolution against a spectrogram", "cell area a", "cell_area",
     lambda c, w: resolution_text(float(c["cell_area"]))),
    ("matched sweep", "Hz/s", "chirp_hz_per_s", lambda c, w: f"{c['chirp_hz_per_s']:,.0f}"),
)


def window_definition(filterbank_json: Mapping, diagnostics: Diagnostics) -> str:
    """The page's one definition of a window's spread, and the best plain spectrogram as a
    copyable ``scipy.signal.ShortTimeFFT`` line (when its time spread is recorded)."""
    text = ("<p class=\"muted\" id=\"window-definition\">Window spread, as used on this whole "
            "page: each channel amounts to a Gaussian window h(u) = exp(−u²/2s²) that multiplies "
            "the signal, the window <code>scipy.signal.windows.gaussian</code> draws; s is its "
            "standard deviation and the FWHM beside it is the full width at half maximum of the "
            "same h, 2√(2 ln 2)·s ≈ 2.355·s. (The filterbank file stores the kernel's time "
            "spread σ_t = s/√2, the standard deviation of h².) The sample columns give the same "
            "window in a spectrogram's terms: the std argument of scipy's gaussian, the periodic "
            "Hann window with the nearest FWHM, and the window length, FFT length and hop "
            "burstlens uses for that spectrogram.</p>")
    fs = FilterbankDocument(filterbank_json).sampling_rate_hz
    samples = filterbank_json.get("window_samples")
    spectrogram = diagnostics.spectrogram
    sigma = None if spectrogram is None else spectrogram.time_spread_s
    if not (fs and isinstance(samples, int) and sigma is not None and sigma > 0):
        return text
    best = window_terms(sigma, fs, samples)
    return text + (f"<p>The best plain spectrogram ({esc(verdict.spectrogram_words(diagnostics))}"
                   f"; FWHM {1e3 * best.fwhm_s:.3g} ms), in one line of Python; "
                   "<code>SFT.spectrogram(x)</code> then gives its power spectrogram of a trace "
                   f"<code>x</code> at {fs:g} Hz:</p>"
                   f'<pre id="stft-line"><code>{esc(stft_line(sigma, fs, samples))}</code></pre>')


def channel_table(channels: list[dict], diagnostics: Diagnostics,
                  sampling_rate_hz: float | None = None,
                  window_samples: int | None = None) -> str:
    """One row per channel (``CHANNEL_COLUMNS``, its stability interval, its reading); each
    drawn field carries ``data-field`` and the exact JSON float as ``data-value``. The sample
    columns need the rate (Hz) and the burst windows' length (samples); without them they
    read "not recorded"."""
    boot = None if diagnostics.bootstrap is None else diagnostics.bootstrap.channels
    boot = boot if boot is not None and len(boot) == len(channels) else (None,) * len(channels)
    head = '<th scope="col">#</th>' + "".join(
        '<th scope="col"' + (f' data-field="{field}"' if field else "") + f">{esc(title)}</th>"
        for title, _, field, _ in CHANNEL_COLUMNS) + \
        '<th scope="col">stability interval</th><th scope="col" data-field="equivalent">reading</th>'
    units = ("", *(u for _, u, _, _ in CHANNEL_COLUMNS), "refits on resampled windows", "")
    known = bool(sampling_rate_hz) and isinstance(window_samples, int) and window_samples > 0
    body = []
    for index, (channel, entry) in enumerate(zip(channels, boot, strict=True)):
        terms = window_terms(float(channel["time_spread_s"]), sampling_rate_hz, window_samples) \
            if known else None
        cells = [f"<td>{index}</td>"]
        for _, unit, field, text in CHANNEL_COLUMNS:
            exact = f' data-field="{field}" data-value="{float(channel[field])!r}"' if field else ""
            shown = "not recorded" if terms is None and unit == "samples" else text(channel, terms)
            cells.append(f'<td class="num"{exact}>{esc(shown)}</td>')
        cells.append(f"<td>{esc(stability_text(None if entry is None else entry.to_json()))}</td>")
        cells.append(f'<td data-field="equivalent">{esc(equivalent_text(channel.get("equivalent")))}</td>')
        body.append(f'<tr data-channel="{index}">{"".join(cells)}</tr>')
    unit_row = "".join(f"<td>{esc(u)}</td>" for u in units)
    return (f'<div class="scroll tall"><table id="channel-table" class="grid"><thead><tr>{head}</tr>'
            f'<tr class="units">{unit_row}</tr></thead><tbody>{"".join(body)}</tbody></table></div>')


def column_label(key: str) -> str:
    """A table column's key in words with its unit: "offset in the trace (s)"."""
    unit = key_stem(key)[1]
    return label_of(key) + (f" ({unit})" if unit else "")


def cell_text(key: str, value) -> str:
    """A table cell: file names and SEED ids as they are, ISO times in UTC words, other text
    in words, numbers by ``fmt``."""
    if key in ("file", "trace_id"):
        return str(value)
    if key == "start" and isinstance(value, str):
        return utc_text(value)
    return plain_words(fmt(value)) if isinstance(value, str) else fmt(value)


def rejections(windows: WindowCounts, corpus: CorpusRecord) -> str:
    """Counts by reason, then each rejection (file, trace, offset, reason, detail) folded away."""
    reasons = windows.rejected_by_reason
    if not reasons:
        return '<p class="muted">no window was rejected</p>'
    rows = "".join(f"<tr><td>{esc(k)}</td><td class=\"num\">{esc(fmt(v))}</td></tr>"
                   for k, v in sorted(reasons.items(), key=lambda kv: str(kv[0])))
    out = ('<table class="grid small"><thead><tr><th scope="col">reason</th>'
           f'<th scope="col">windows</th></tr></thead><tbody>{rows}</tbody></table>')
    each = corpus.rejections
    if each:
        keys = ("file", "trace_id", "offset_s", "reason", "detail")
        head = "".join(f'<th scope="col">{esc(column_label(k))}</th>' for k in keys)
        body = "".join("<tr>" + "".join(f"<td>{esc(cell_text(k, r.get(k, '')))}</td>" for k in keys)
                       + "</tr>"
                       for r in each[:REJECTION_LIST_LIMIT] if isinstance(r, Mapping))
        more = (f'<p class="muted">{len(each) - REJECTION_LIST_LIMIT} more not listed</p>'
                if len(each) > REJECTION_LIST_LIMIT else "")
        out += (f"<details><summary>each rejection ({len(each)})</summary><div class=\"scroll\">"
                f'<table class="grid small"><thead><tr>{head}</tr></thead><tbody>{body}</tbody>'
                f"</table></div>{more}</details>")
    return out


def headline(filterbank_json: Mapping, diagnostics: Diagnostics, channels: list[dict]) -> str:
    """The judgement's cards: gain, objective, negative share, onset timing, stop reason, windows,
    channels and sampling rate."""
    gain = diagnostics.gain_bits
    result = diagnostics.result or Interval()
    objective, low, high = result.objective, result.low, result.high
    used, rejected = diagnostics.windows.used, diagnostics.windows.rejected
    judged = diagnostics.judgement
    held_out = judged is not None and judged.in_sample is not True
    negative = None if judged is None else judged.negative_share
    ceiling = None if negative is None else negative.max_allowed
    fs = FilterbankDocument(filterbank_json).sampling_rate_hz
    cards = [
        ("gain over the best spectrogram" + (", held-out" if held_out else ""),
         f"{gain:+.3f} bits" if gain is not None else "not recorded"),
        (("held-out objective" if held_out else "objective") + " of the result",
         (f"{objective:.4g}" if objective is not None else "not recorded")
         + (f" [{low:.4g}, {high:.4g}]" if low is not None and high is not None else "")),
        ("negative share of the image", percent_text(None if negative is None else negative.overall)
         + (f" (ceiling {100 * ceiling:.2g} %)" if ceiling is not None else "")),
        ("onset timing, median / p90",
         onset_text(judged.onset)
         if judged is not None else "not recorded"),
        ("stop reason", diagnostics.stop_reason or "not recorded"),
        ("windows used / rejected", f"{'?' if used is None else used} / "
                                     f"{'?' if rejected is None else rejected}"),
        ("channels", str(len(channels))),
        ("sampling rate", f"{fs:g} Hz" if fs else "not recorded"),
    ]
    return '<div class="cards">' + "".join(
        f'<div class="card"><div class="label">{esc(k)}</div><div class="value">{esc(v)}</div></div>'
        for k, v in cards) + "</div>"


def verdict_lead(diagnostics: Diagnostics) -> str:
    """The lead under the title: the scorecard (detection margin and onset fidelity against the
    best plain spectrogram, and the user's own spectrogram), the held-out sharpness gain
    sentence, how it was measured, and a warnings box only when some warning applies."""
    judged = diagnostics.judgement
    kind = "lead note" if judged is None else "lead"
    rows = verdict.scorecard_rows(diagnostics, result_sharpness=False)
    lead = ('<ul class="lead" id="scorecard">' + "".join(f"<li>{esc(r)}</li>" for r in rows)
            + "</ul>") if rows else ""
    lead += f'<p class="{kind}" id="gain">{esc(verdict.gain_words(diagnostics))}</p>'
    if judged is not None:
        level, resamples = judged.gain_bits.level, judged.gain_bits.resamples
        judged_on = "fitted" if judged.in_sample is True else "held-out"
        interval = f"{100 * level:.0f} % interval" if level is not None else "interval"
        if resamples:
            interval += f" from {resamples} resamples of the {judged_on} windows"
        how = [interval,
               f"{judged.fit_windows} windows fitted" if judged.fit_windows is not None else None,
               f"{judged.guard_windows} left out of the fit because they overlap held-out ones"
               if judged.guard_windows else None]
        lead += f'<p class="muted">{esc("; ".join(h for h in how if h))}.</p>'
    found = verdict.warnings(diagnostics)
    if found:
        items = "".join(f"<li>{flags_unbroken(esc(w))}</li>" for w in found)
        lead += (f'<div class="warnings" id="warnings" role="note"><h2>Warnings</h2>'
                 f"<ul>{items}</ul></div>")
    return f'<section id="verdict">{lead}</section>'


SCORECARD_NAMES = {"result": "tuned filterbank", "spectrogram": "best plain spectrogram",
                   "yours": "your spectrogram", "envelope": "raw envelope"}


# How each scorecard row was measured, in words (docs/design.md §5.1); the engine's own record of the
# method stays in the diagnostics file.
SCORECARD_METHOD = {
    "detection": "Detected at gain: each held-out burst is added to the site's noise windows at "
                 "gains from −60 to +20 dB; the row is the gain at which an energy detector "
                 "(the image's summed energy, peak over median, like an STA/LTA ratio) tells "
                 "them from noise alone at ROC AUC 0.9. Lower finds weaker bursts.",
    "onset": "Onset error: the AIC onset of the image's summed energy against the same pick on "
             "the waveform's envelope, median and 90th percentile over the bursts, in ms.",
    "sharpness": "Burst sharpness: the criterion's mean score per burst on each "
                 "representation's own cells, in bits; lower is sharper.",
}


def scorecard_table(diagnostics: Diagnostics) -> str:
    """The scorecard per representation: the burst gain an energy detector needs (dB, lower
    finds weaker bursts), onset error against the waveform's envelope (median / 90th
    percentile, ms) and burst sharpness (bits, lower is sharper); then how each was measured."""
    card = None if diagnostics.judgement is None else diagnostics.judgement.scorecard
    if card is None:
        return ""

    def number(value: float | None, spec: str) -> str:
        return "—" if value is None else format(value, spec)

    rows = "".join(
        f'<tr><th scope="row">{esc(SCORECARD_NAMES.get(name, name))}</th>'
        f'<td>{esc(number(r.detection_threshold_db, "+.1f"))}</td>'
        f'<td>{esc(number(r.onset_median_ms, ".1f"))} / '
        f'{esc(number(r.onset_p90_ms, ".1f"))}</td>'
        f'<td>{esc(number(r.sharpness_bits, ".3f"))}</td></tr>'
        for name, r in card.representations.items())
    notes = "".join(f"<li>{esc(SCORECARD_METHOD[k])}</li>" for k in SCORECARD_METHOD
                    if k in card.method)
    return ('<table class="scorecard" id="scorecard-table"><thead><tr><th scope="col"></th>'
            '<th scope="col">detected at gain, dB</th><th scope="col">onset error, median / '
            'p90 ms</th><th scope="col">burst sharpness, bits</th></tr></thead>'
            f"<tbody>{rows}</tbody></table>"
            + (f'<ul class="muted">{notes}</ul>' if notes else ""))


def judgement_table(diagnostics: Diagnostics) -> str:
    """The held-out judgement in numbers, or a note when the diagnostics carry none."""
    judged = diagnostics.judgement
    if judged is None:
        return ('<p class="muted">no judgement on held-out windows recorded (an older run or a '
                "cancelled one): objectives and gain here were measured on the windows the fit "
                "used</p>")

    def objective(entry: Interval) -> str:
        value, low, high = entry.objective, entry.low, entry.high
        if value is None:
            return "not recorded"
        return f"{value:.4g}" + (f" [{low:.4g}, {high:.4g}]" if low is not None and high is not None
                                 else "")

    negative = judged.negative_share
    worst = max((v for v in negative.per_channel if v is not None), default=None)
    rows = {
        "judged in-sample": judged.in_sample,
        "held-out share": judged.held_out_share,
        "windows held out / fitted / guard": " / ".join(
            "?" if n is None else str(n)
            for n in (judged.held_out_windows, judged.fit_windows, judged.guard_windows)),
        "result objective, judged windows": objective(judged.result),
        "best spectrogram objective, judged windows": objective(judged.spectrogram),
        "negative share, largest channel": percent_text(worst),
        "negative share allowed": percent_text(negative.max_allowed),
        "settings on a search bound": ", ".join(judged.bounds_hit) or "none",
    }
    if judged.grouping:  # how windows were kept apart, as the search words it
        rows["held-out grouping"] = judged.grouping
    return kv_table(rows)


def corpus_summary(corpus: CorpusRecord) -> str:
    """The corpus record's scalars (every one the file records, in its order), with files and
    traces as counts."""
    recorded = corpus.to_json()
    if not recorded:
        return '<p class="muted">no corpus summary recorded</p>'
    scalars = {k: v for k, v in recorded.items()
               if not isinstance(v, (list, dict)) and k != "defaults"}
    if corpus.files:
        scalars["files"] = len(corpus.files)
    if isinstance(recorded.get("traces"), list):
        scalars["traces"] = len(recorded["traces"])
    return kv_table(scalars)


def trace_table(corpus: CorpusRecord) -> str:
    """Every trace segment read (file, SEED id, rate, start, duration, windows it gave)."""
    traces = corpus.traces
    if not traces:
        return ""
    keys = [k for k in ("file", "trace_id", "sampling_rate_hz", "start", "duration_s", "windows")
            if any(k in t for t in traces)]
    head = "".join(f'<th scope="col">{esc(column_label(k))}</th>' for k in keys)
    rows = "".join("<tr>" + "".join(f"<td>{esc(cell_text(k, t.get(k, '')))}</td>" for k in keys)
                   + "</tr>"
                   for t in traces[:TRACE_LIST_LIMIT])
    more = (f'<p class="muted">{len(traces) - TRACE_LIST_LIMIT} more traces not listed</p>'
            if len(traces) > TRACE_LIST_LIMIT else "")
    return (f'<h3>Traces read ({len(traces)})</h3><div class="scroll"><table class="grid traces">'
            f"<thead><tr>{head}</tr></thead><tbody>{rows}</tbody></table></div>{more}")


def setting_cells(items) -> str:
    """Cells of (label, text, tag); the tag says whether the job gave the setting."""
    cells = []
    for label, text, tag in items:
        badge = f' <span class="tag">{esc(tag)}</span>' if tag else ""
        cells.append(f'<div class="setting"><span class="key">{esc(label)}{badge}</span> '
                     f'<span class="value">{esc(text)}</span></div>')
    return f'<div class="settings">{"".join(cells)}</div>'


def settings_section(resolved, given, reader_defaults) -> str:
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
        source = f"{key_stem(str(key))[0]}_source"
        one = {key: value, **({source: record[source]} if source in record else {})}
        reader += [(*item, "given" if key in asked else None) for item in people_items(one)]
    none = '<p class="muted">none recorded</p>'
    return ("<h3>Settings of the run</h3>" + (setting_cells(chosen) if chosen else none)
            + "<h3>Corpus reading: options given, and defaults chosen from the data</h3>"
            + (setting_cells(reader) if reader else none)
            + "<h3>Defaults the search derived</h3>"
            + (setting_cells((*i, None) for i in engine) if engine else none))


def figure_html(plot: Plot) -> str:
    """A plot as a figure with its PNG inline as a base64 ``data:`` URL, or its note if omitted."""
    if plot.png is None:
        return (f'<figure class="plot omitted" id="plot-{plot.name}"><p class="note">'
                f"{esc(plot.caption)}</p></figure>")
    data = base64.b64encode(plot.png).decode("ascii")
    return (f'<figure class="plot" id="plot-{plot.name}"><img src="data:image/png;base64,{data}" '
            f'alt="{esc(plot.alt)}"><figcaption>{esc(plot.caption)}</figcaption></figure>')


def what_was_tuned(filterbank_json: Mapping, diagnostics: Diagnostics, channels: list[dict]) -> str:
    """One line: the site (stations), the files, the channels and band, the windows."""
    corpus = diagnostics.corpus
    traces = corpus.traces
    stations = list(dict.fromkeys(".".join(str(t["trace_id"]).split(".")[:2]) for t in traces
                                  if t.get("trace_id")))
    site = (", ".join(stations[:SITES_NAMED]) + (f" and {len(stations) - SITES_NAMED} more"
                                                  if len(stations) > SITES_NAMED else "")
            if stations else "corpus " + str(corpus.source_hash or
                                             filterbank_json.get("corpus_hash") or "?")[:12])
    files = corpus.files
    if files is not None:
        site += (f" ({len(files)} file{'s' if len(files) != 1 else ''}, {len(traces)} "
                 f"trace{'s' if len(traces) != 1 else ''})")
    fc = channel_column(channels, "center_hz")
    spacing = diagnostics.settings.spacing
    spacing = f", {spacing} spacing" if spacing else ""
    parts = [site, f"{len(channels)} channels at {fc.min():.4g}–{fc.max():.4g} Hz{spacing}"]
    used = diagnostics.windows.used
    fs = FilterbankDocument(filterbank_json).sampling_rate_hz
    samples = filterbank_json.get("window_samples")
    if used is not None and fs and isinstance(samples, int):
        kind = "burst windows" if corpus.windowing == "bursts" else "windows"
        parts.append(f"{used} {kind} of {1e3 * samples / fs:.4g} ms at {fs:g} Hz")
    return " · ".join(parts)


def _differs(value, default) -> bool:
    if isinstance(value, (int, float)) and isinstance(default, (int, float)) \
            and not isinstance(value, bool) and not isinstance(default, bool):
        return not math.isclose(float(value), float(default), rel_tol=1e-9)
    if isinstance(value, (list, tuple)) and isinstance(default, (list, tuple)):
        return len(value) != len(default) or any(_differs(v, d) for v, d in zip(value, default,
                                                                            strict=True))
    return value != default


def non_default_settings(given, resolved, reader_defaults) -> list[tuple[str, str]]:
    """(setting in words and value, the default in words) for every setting that made the run
    and differs from ``search.settings.SETTINGS_DEFAULTS``. ``given``: the job's settings as
    submitted (None for a run of ``burstlens tune``, whose resolved ``settings`` and the
    reader's ``given`` options are compared instead)."""
    resolved = resolved if isinstance(resolved, Mapping) else {}
    if isinstance(given, Mapping):
        chosen = {k: v for k, v in given.items() if v is not None}
    else:
        chosen = {}
        for key in SEARCH_KEYS:
            value = resolved.get("n_jobs" if key == "jobs" else key)  # resolved as n_jobs
            if value is not None and (SETTINGS_DEFAULTS.get(key) is not None or key in
                                      ("time_limit_s", "compare_to")):
                chosen[key] = value
        fs = finite_or_none(resolved.get("sampling_rate_hz"))
        band = resolved.get("band_hz")
        if fs and isinstance(band, (list, tuple)) and _differs(list(band), [fs / 100, 0.45 * fs]):
            chosen["band_hz"] = list(band)
        record = reader_defaults.get("given") if isinstance(reader_defaults, Mapping) else None
        chosen.update({k: v for k, v in (record or {}).items() if v is not None})
    out = []
    for key, value in chosen.items():
        default = SETTINGS_DEFAULTS.get(key)
        if key == "criterion":
            name = value.get("name") if isinstance(value, Mapping) else value
            full = {**CRITERION_DEFAULTS, **(value if isinstance(value, Mapping) else {"name": name})}
            if full == CRITERION_DEFAULTS:
                continue
            default = CRITERION_DEFAULTS
        elif default is not None and not _differs(value, default):
            continue
        (label, text), = people_items({key: value})
        if default is None:
            default_text = "chosen from the data" if key in resolved or key in (
                reader_defaults or {}) else "none"
            if key == "band_hz":
                default_text = "fs/100 to 0.45·fs"
        else:
            default_text = people_items({key: default})[0][1]
        out.append((f"{label} {text}", default_text))
    return out


def settings_note(given, resolved, reader_defaults) -> str:
    """One line under the title: the settings that made the run where they differ from the
    defaults, or that the defaults made it."""
    differing = non_default_settings(given, resolved, reader_defaults)
    if not differing:
        return '<p class="aid" id="settings-used">Made with the default settings.</p>'
    items = "; ".join(f"{setting if setting[:2].isupper() else setting[0].lower() + setting[1:]}"
                      f" (default {default})" for setting, default in differing)
    return (f'<p class="aid" id="settings-used">Made with settings that differ from the '
            f"defaults: {esc(items)}.</p>")


def _check_gain(answer: Mapping) -> str:
    rows = (answer.get("scorecard") or {}).get("rows") if isinstance(answer.get("scorecard"),
                                                                       Mapping) else None
    entry = ((rows or {}).get("sharpness_bits") or {}).get("filterbank") if isinstance(rows, Mapping) \
        else None
    entry = entry if isinstance(entry, Mapping) else {}
    estimate, low, high = (finite_or_none(entry.get(k)) for k in ("estimate", "low", "high"))
    if estimate is None:
        return "not measured"
    interval = f" [{low:+.2f}, {high:+.2f}]" if low is not None and high is not None else ""
    return f"{estimate:+.2f} bits{interval}"


CHECK_VERDICTS = {"keep": "keep: the filterbank still serves", "retune": "re-tune"}


def checks_section(checks) -> str:
    """The drift checks (``burstlens check --json`` answers with ``id``, ``finished_at`` UTC
    epoch seconds and ``files``), newest first: date, files, verdict, what moved and the
    filterbank's sharpness gain over the new data's best plain spectrogram with its 90 %
    interval; empty without checks. ValueError naming the entry and field for a malformed one."""
    if not checks:
        return ""
    if not isinstance(checks, (list, tuple)):
        raise ValueError(f"checks: expected a list of check answers, got {type(checks).__name__}")
    for index, answer in enumerate(checks):
        if not isinstance(answer, Mapping):
            raise ValueError(f"checks[{index}]: expected a dict, got {type(answer).__name__}")
        if answer.get("verdict") not in CHECK_VERDICTS:
            raise ValueError(f"checks[{index}]['verdict']: expected 'keep' or 'retune', got "
                             f"{answer.get('verdict')!r}")
        when = answer.get("finished_at")
        if isinstance(when, bool) or not isinstance(when, (int, float)) or not math.isfinite(when):
            raise ValueError(f"checks[{index}]['finished_at']: expected UTC epoch seconds, got "
                             f"{when!r}")
    rows = []
    for answer in sorted(checks, key=lambda a: -float(a["finished_at"])):
        when = datetime.datetime.fromtimestamp(float(answer["finished_at"]), tz=datetime.UTC)
        files = [str(f) for f in answer.get("files") or []]
        shown = ", ".join(files[:3]) + (f" and {len(files) - 3} more" if len(files) > 3 else "")
        moved = [str(m.get("words")) for m in answer.get("moved") or [] if isinstance(m, Mapping)
                 and m.get("words")]
        rows.append(f'<tr data-check="{esc(answer.get("id", ""))}">'
                    f"<td>{esc(when.strftime('%Y-%m-%d %H:%M UTC'))}</td><td>{esc(shown or '—')}</td>"
                    f"<td>{esc(CHECK_VERDICTS[answer['verdict']])}</td>"
                    f"<td>{esc('; '.join(moved) or 'nothing moved')}</td>"
                    f'<td class="num">{esc(_check_gain(answer))}</td></tr>')
    return ('<section id="checks"><h2>Drift checks on newer data</h2><p class="muted">Each '
            "check judged this filterbank on newer files against those files' own best plain "
            "spectrogram and a quick refit, and compared the site with the tuning's record. "
            "Sharpness gain: how much sharper the filterbank draws the new bursts than that "
            "spectrogram (bits per burst, 90 % interval; positive is sharper).</p>"
            '<table class="grid" id="checks-table"><thead><tr><th scope="col">checked</th>'
            '<th scope="col">files</th><th scope="col">verdict</th><th scope="col">what moved'
            '</th><th scope="col">sharpness gain</th></tr></thead>'
            f"<tbody>{''.join(rows)}</tbody></table></section>")
