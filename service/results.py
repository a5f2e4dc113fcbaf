"""The names of the result files a tuning writes (docs/design.md §8), defined once.

``burstlens tune --out DIR`` and a search job (``results/<job>/attempt-<n>/``) write them through
``service.tuning``; the API serves them and ``burstlens submit`` saves them under these names.
A module of names only, so a client can import it without the engine.
"""
from __future__ import annotations

FILTERBANK_JSON = "filterbank.json"    # search.documents.FilterbankDocument
DIAGNOSTICS_JSON = "diagnostics.json"  # search.documents.DiagnosticsDocument
REPORT_HTML = "report.html"            # service.report.render_report; a job's on first request
WINDOWS_NPY = "windows.npy"            # a job's window sample for the report's plots
