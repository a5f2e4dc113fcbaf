"""One self-contained HTML report per tuned filterbank (docs/design.md §8), and its PNG plots.

``render_report(filterbank_json, diagnostics, windows, sampling_rate_hz, *, checks=None)``
returns the complete HTML page (plots inline, no script, nothing loaded from the network;
``checks``: the filterbank's drift checks, in a section of their own); ``report_plots(...)`` the
same plots as PNG bytes by name (``PLOT_NAMES``) for the service's PNG routes. One module a job:

- ``inputs``: reading the filterbank JSON and diagnostics (channels, criterion, counts, windows)
- ``figures``: the PNG figures with their alt text and captions (``build_plots``, ``report_plots``)
- ``wording``: values and settings in words and units for people
- ``terms``: a channel's window in the user's terms (scipy Gaussian std, Hann length, NFFT, hop)
- ``sections``: the HTML fragments (verdict, cards, tables, settings, figures)
- ``page``: the cautions, the style sheet and ``render_report``
"""
from burstlens.service.report.figures import PLOT_NAMES, Plot, build_plots, example_indices, report_plots
from burstlens.service.report.inputs import CHANNEL_FIELDS, channel_rows
from burstlens.service.report.page import render_report

__all__ = ["CHANNEL_FIELDS", "PLOT_NAMES", "Plot", "build_plots", "channel_rows", "example_indices",
           "render_report", "report_plots"]
