"""The report page: its cautions, its style sheet and ``render_report``, which puts the sections
and figures together (docs/design.md §8).

``render_report(filterbank_json, diagnostics, windows, sampling_rate_hz)`` returns a complete
HTML page: inline CSS, every plot embedded as a base64 ``data:`` PNG with a text alternative, no
script and no external asset (a Content-Security-Policy meta tag forbids loading any), so the file
works offline, opened from disk. All text that comes from data is escaped with ``html.escape``.

Inputs: ``filterbank_json`` is the filterbank JSON of docs/design.md §8 (``Filterbank.to_json()``),
``diagnostics`` the ``FilterbankSearch.diagnostics_`` dict (DEVELOPERS.md lists its keys; read
once by ``search.diagnostics_doc.Diagnostics.from_json``, or given already typed),
``windows`` the corpus windows ``(M, N)`` float in window order (or None: the example-burst plot
is then omitted with a note), ``sampling_rate_hz`` their rate in Hz (None: the filterbank's).

The page leads with the gain on held-out windows and, when any applies, a box of warnings; both
come from ``service.verdict`` so the page and the command line never disagree.
"""
from __future__ import annotations

from collections.abc import Mapping

from burstlens.search.diagnostics_doc import Diagnostics
from burstlens.search.documents import FilterbankDocument
from burstlens.service import palette
from burstlens.service.report.figures import build_plots
from burstlens.service.report.inputs import channel_rows, window_counts
from burstlens.service.report.sections import (channel_table, checks_section, corpus_summary, esc,
                                               figure_html, headline, judgement_table, kv_table,
                                               rejections, scorecard_table, setting_cells,
                                               settings_note, settings_section, trace_table,
                                               verdict_lead, what_was_tuned, window_definition)
from burstlens.service.report.wording import people_items

CAUTIONS = (
    "burstlens is an analysis aid for choosing a signal representation. It is not a certified "
    "safety, monitoring or early-warning system, and its output is not a hazard assessment.",
    "Decisions about ground control, re-entry after blasting or seismic events, injection rates, "
    "traffic-light protocols or public safety follow local regulations and the judgement of "
    "licensed professionals.",
    "Check any tuned filterbank on your own data before you rely on it.",
)

STYLE = palette.css_variables() + """
* { box-sizing: border-box; }
body { margin: 0; color: var(--ink); background: var(--paper);
       font: 15px/1.5 system-ui, -apple-system, "Segoe UI", Roboto, "DejaVu Sans", sans-serif; }
header { padding: 14px 32px 10px; border-bottom: 3px solid var(--accent); }
header h1 { margin: 0; font-size: 1.2rem; }
header p { margin: 2px 0 0; }
header p.tuned { font-size: 1rem; }
header p.aid { color: var(--muted); font-size: .85rem; }
nav { padding: 6px 32px; background: var(--band); border-bottom: 1px solid var(--line); }
nav a { margin-right: 18px; color: var(--accent); }
main { max-width: 1240px; padding: 0 32px 40px; }
h2 { margin: 28px 0 10px; font-size: 1.25rem; border-bottom: 1px solid var(--line); padding-bottom: 4px; }
h3 { margin: 20px 0 6px; font-size: 1.05rem; }
h4 { margin: 14px 0 4px; font-size: .95rem; }
.cards { display: grid; grid-template-columns: repeat(auto-fit, minmax(160px, 1fr)); gap: 10px; }
.card { border: 1px solid var(--line); border-radius: 6px; padding: 10px 12px; background: var(--paper); }
.card .label { color: var(--muted); font-size: .82rem; }
.card .value { font-size: 1.1rem; font-weight: 600; overflow-wrap: anywhere; }
.settings { display: grid; grid-template-columns: repeat(auto-fill, minmax(340px, 1fr)); gap: 4px 24px; }
.setting { border-bottom: 1px solid var(--band); padding: 2px 0; font-size: .88rem; }
.setting .key { color: var(--muted); }
.setting .value { overflow-wrap: anywhere; }
.tag { font-size: .72rem; padding: 0 5px; border-radius: 8px; background: var(--band); border: 1px solid var(--line); }
.columns { display: grid; grid-template-columns: repeat(auto-fit, minmax(420px, 1fr)); gap: 0 28px; }
table { border-collapse: collapse; font-size: .88rem; }
table.kv th { text-align: left; font-weight: 500; color: var(--muted); padding: 2px 14px 2px 0;
              vertical-align: top; white-space: nowrap; }
table.kv td { padding: 2px 0; overflow-wrap: anywhere; }
table.grid { width: 100%; }
table.grid th, table.grid td { border-bottom: 1px solid var(--line); padding: 4px 8px; text-align: left; }
table.grid thead th { background: var(--band); position: sticky; top: 0; }
table.grid tbody tr:nth-child(even) { background: var(--stripe); }
table.grid td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
tr.units td { color: var(--muted); font-size: .78rem; background: var(--band); position: sticky; top: 31px; }
table.small { width: auto; }
.scroll { max-height: 360px; overflow: auto; border: 1px solid var(--line); }
.scroll.tall { max-height: 560px; }
.scroll table.small { width: 100%; }
table.traces td { white-space: nowrap; }
details summary { cursor: pointer; color: var(--accent); margin: 6px 0; }
details#details > summary { font-size: 1.15rem; font-weight: 600; }
figure.plot { margin: 14px 0 22px; }
figure.plot img { max-width: 100%; height: auto; border: 1px solid var(--line); }
figcaption { color: var(--muted); font-size: .88rem; margin-top: 4px; }
.note, .muted { color: var(--muted); }
.note { border-left: 3px solid var(--line); padding: 6px 12px; background: var(--band); }
section#verdict { padding: 12px 32px 6px; }
p.lead { margin: 0 0 2px; font-size: 1.45rem; font-weight: 650; line-height: 1.3; }
p.lead.note { font-size: 1.15rem; font-weight: 500; }
.warnings { border: 1px solid var(--warn-line); border-left-width: 5px; background: var(--warn-bg);
            border-radius: 6px; padding: 2px 18px 6px; margin: 8px 0 4px; }
.warnings h2 { border: none; margin: 6px 0 2px; font-size: 1.05rem; color: var(--bad); }
.flag { white-space: nowrap; }
.warnings ul { margin: 2px 0; padding-left: 20px; font-size: .92rem; }
section#cautions { border: 1px solid var(--caution-line); background: var(--caution-bg);
                   padding: 4px 18px 10px; margin-top: 30px; border-radius: 6px; }
section#cautions h2 { border: none; }
pre { margin: 4px 0 12px; padding: 8px 12px; background: var(--band); border: 1px solid var(--line);
      overflow-x: auto; white-space: pre-wrap; overflow-wrap: anywhere; font-size: .85rem; }
footer { color: var(--muted); font-size: .82rem; padding: 0 32px 24px; }
"""


def render_report(filterbank_json: Mapping, diagnostics: Diagnostics | Mapping, windows=None,
                  sampling_rate_hz: float | None = None, *, checks: list[dict] | None = None) -> str:
    """The complete, self-contained HTML report of one tuned filterbank (see module docstring).

    ``checks``: drift checks of this filterbank on newer data, each the answer ``burstlens check
    --json`` prints (``search.drift.DriftCheck.to_json()``) plus ``id`` (str), ``finished_at``
    (UTC epoch seconds) and ``files`` (file names); shown newest first in their own section,
    which is absent when there are none."""
    channels = channel_rows(filterbank_json)
    d = diagnostics if isinstance(diagnostics, Diagnostics) else Diagnostics.from_json(diagnostics)
    figures = {p.name: p for p in build_plots(filterbank_json, d, windows, sampling_rate_hz)}
    corpus = d.corpus
    resolved, reader_defaults = d.settings.to_json(), corpus.defaults
    # the job's own settings, as the service records them beside the resolved ones (None for
    # a filterbank from `burstlens tune`: settings then carry no given/default tag)
    given = FilterbankDocument(filterbank_json).job_settings
    run = {k: v for k, v in (("stop_reason", d.stop_reason), ("origin", d.origin),
                             ("seed", d.seed), ("elapsed_s", d.elapsed_s),
                             ("version", d.version)) if v is not None}
    if d.fallback is not None and d.fallback.reason:
        run["fallback"] = f"{d.fallback.to or ''}: {d.fallback.reason}"
    recorded = people_items({k: v for k, v in filterbank_json.items()
                             if k not in ("channels", "settings", "job")})
    tuned = what_was_tuned(filterbank_json, d, channels)
    drift = checks_section(checks)
    fs = FilterbankDocument(filterbank_json).sampling_rate_hz
    samples = filterbank_json.get("window_samples")
    body = f"""
<header><h1>burstlens report: tuned time–frequency filterbank</h1>
<p class="tuned" id="tuned">{esc(tuned)}</p>
{settings_note(given, resolved, reader_defaults)}
<p class="aid">An analysis aid, not a safety or warning system: see the cautions below.</p></header>
{verdict_lead(d)}
<nav><a href="#examples">Example bursts</a><a href="#channels">Channels</a>\
<a href="#tiling">Tiling and convergence</a><a href="#judgement">Judgement in numbers</a>\
{'<a href="#checks">Drift checks</a>' if drift else ""}\
<a href="#cautions">Cautions</a><a href="#details">Settings and files</a></nav>
<main>
<section id="examples"><h2>Example bursts: best plain spectrogram against the tuned filterbank</h2>
{figure_html(figures["examples"])}</section>
<section id="channels"><h2>Channels</h2>
<p class="muted">One row per channel: the Gaussian window each channel amounts to, how much finer
(super-resolution) or coarser (smoothing) than a spectrogram its time–frequency cell is, the
sweep rate it is matched to, and how stable its window and cell area were when refitted on
resampled windows.</p>
{window_definition(filterbank_json, d)}
{channel_table(channels, d, fs, samples if isinstance(samples, int) else None)}
{figure_html(figures["channels"])}</section>
<section id="tiling"><h2>Tiling and convergence</h2>
{figure_html(figures["tiling"])}{figure_html(figures["convergence"])}</section>
<section id="judgement"><h2>Judgement in numbers</h2>
{scorecard_table(d)}
{headline(filterbank_json, d, channels)}
<div class="columns">
<div><h3>On held-out windows</h3>{judgement_table(d)}</div>
<div>{figure_html(figures["baselines"])}</div>
</div></section>
{drift}
<section id="cautions"><h2>Cautions</h2>{"".join(f"<p>{esc(c)}</p>" for c in CAUTIONS)}</section>
<details id="details"><summary>Settings, defaults chosen from the data, and files</summary>
<div class="columns">
<div><h3>Site corpus</h3>{corpus_summary(corpus)}
<h3>Run</h3>{kv_table(run)}</div>
<div><h3>Windows</h3>{kv_table(window_counts(d.windows))}
<h4>Rejected windows by reason</h4>{rejections(d.windows, corpus)}</div>
</div>
{settings_section(resolved, given, reader_defaults)}
{trace_table(corpus)}
<h3>Recorded in the filterbank file</h3>
{setting_cells((*i, None) for i in recorded)}
</details>
</main>
<footer>Generated by burstlens {esc(d.version or "")}. \
This page is self-contained: it loads nothing from the network.</footer>"""
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
            "<meta http-equiv=\"Content-Security-Policy\" content=\"default-src 'none'; "
            "img-src data:; style-src 'unsafe-inline'\">"
            "<link rel=\"icon\" href=\"data:,\">"  # no favicon request when served over HTTP
            f"<title>burstlens report: {esc(tuned)}</title><style>{STYLE}</style></head>"
            f"<body>{body}\n</body></html>\n")
