"""The tuning pipeline: corpus and job settings in, the result files out (docs/design.md §5, §8).

``burstlens tune`` and the worker's search jobs both run :func:`tune`: read the corpus (or take
one already read), fit ``FilterbankSearch`` with the caller's callbacks, make the filterbank and
diagnostics documents and write the result files (names in ``service.results``). What differs
between the two is passed in, not written twice: the CLI's progress bar and Ctrl-C, the
worker's leases, checkpoints and store records, its renaming of server paths to the client's
file names (``service.corpus_check.renamer``), how a file is written (``write``), whether the
JSON files end with a newline (``final_newline``: ``tune`` has always written them without one,
the service with one) and which other files go beside them (``extra``: ``tune`` renders
report.html, a job keeps a window sample for the report it renders on request).
"""
from __future__ import annotations

import io
import logging
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from burstlens.search.corpus.given import read_corpus_as_given
from burstlens.search.documents import DiagnosticsDocument, FilterbankDocument, JobRecord
from burstlens.search.optimize import FilterbankSearch
from burstlens.search.safe_io import atomic_write
from burstlens.search.settings import JobSettings
from burstlens.service.corpus_check import jsonable
from burstlens.service.results import DIAGNOSTICS_JSON, FILTERBANK_JSON, REPORT_HTML, WINDOWS_NPY

log = logging.getLogger("burstlens.tuning")

REPORT_MAX_VALUES = 4_000_000  # windows × samples kept in windows.npy for the report's plots


class ResultsNotWritten(Exception):
    """The fit is done but its filterbank or diagnostics file could not be written; the cause
    is ``__cause__``."""


@dataclass(frozen=True)
class Tuned:
    """What a tuning made: the fitted ``search``, the ``corpus`` it was fitted on, the two
    documents as written, and the names of the files written, in order."""

    search: FilterbankSearch
    corpus: Any
    filterbank: FilterbankDocument
    diagnostics: DiagnosticsDocument
    written: tuple[str, ...]


def write_file(path: Path, data: bytes) -> None:
    """Write ``data`` to ``path`` through a temp file renamed into place
    (``search.safe_io.atomic_write``): the default ``write`` of :func:`tune`."""
    atomic_write(path, lambda fh: fh.write(data))


def fit(corpus, settings: JobSettings, *, progress=None, should_stop=None, checkpoint=None,
        resume_from=None,
        on_resume_refused: Callable[[ValueError], bool] | None = None) -> FilterbankSearch:
    """``FilterbankSearch.from_settings(settings).fit(corpus, ...)`` with the callbacks of
    ``FilterbankSearch.fit``. When the fit refuses ``resume_from`` with a ``ValueError`` (another
    version, other settings or another corpus), ``on_resume_refused(error)`` returning True
    starts it over without the state; without the callback, or when it returns False, the
    error propagates."""
    def run(state):
        return FilterbankSearch.from_settings(settings).fit(
            corpus, progress=progress, checkpoint=checkpoint, resume_from=state,
            should_stop=should_stop)

    try:
        return run(resume_from)
    except ValueError as exc:
        if resume_from is None or on_resume_refused is None or not on_resume_refused(exc):
            raise
    return run(None)


def documents(search: FilterbankSearch, *, job: JobRecord | None = None,
              rename: Callable[[str], str] | None = None
              ) -> tuple[FilterbankDocument, DiagnosticsDocument]:
    """The filterbank and diagnostics documents of a fitted search; ``job`` (the service job
    that made it) is recorded in the filterbank. ``rename``: every text in both documents
    passed through it and the values made plain JSON (``service.corpus_check.jsonable``), so
    no server path reaches a client; None leaves them as the search made them."""
    filterbank = FilterbankDocument.of(search.filterbank_, job)
    diagnostics = DiagnosticsDocument(search.diagnostics_)
    if rename is not None:
        diagnostics = DiagnosticsDocument(jsonable(diagnostics.data, rename))
        filterbank = FilterbankDocument(jsonable(filterbank.data, rename))
    return filterbank, diagnostics


def write_results(out: Path, search: FilterbankSearch, corpus, *, job: JobRecord | None = None,
                  rename: Callable[[str], str] | None = None, final_newline: bool = True,
                  write: Callable[[Path, bytes], Any] = write_file,
                  extra: Sequence[str] = ()) -> Tuned:
    """Write the documents of :func:`documents` into the folder ``out`` (made if missing):
    ``filterbank.json`` and ``diagnostics.json`` (``final_newline``: whether each ends with a
    newline), then each of ``extra``: ``report.html`` (rendered from the documents and the
    corpus's windows) or ``windows.npy`` (at most ``REPORT_MAX_VALUES`` of the windows, for a
    report rendered later; a failure there is logged, never raised). ``write(path, bytes)``
    writes one file. ``ResultsNotWritten`` when a document cannot be written."""
    out = Path(out)
    try:
        filterbank, diagnostics = documents(search, job=job, rename=rename)
        out.mkdir(parents=True, exist_ok=True)
        for name, document in ((FILTERBANK_JSON, filterbank), (DIAGNOSTICS_JSON, diagnostics)):
            write(out / name, document.encode(final_newline=final_newline))
    except Exception as exc:
        raise ResultsNotWritten(f"{type(exc).__name__}: {exc}") from exc
    written = [FILTERBANK_JSON, DIAGNOSTICS_JSON]
    for name in extra:
        if name == REPORT_HTML:
            write(out / name, _report(filterbank, diagnostics, corpus).encode("utf-8"))
        elif name == WINDOWS_NPY:
            if not _keep_windows(out / name, corpus, write):
                continue
        else:
            raise ValueError(f"extra: {name!r} is not a result file ({REPORT_HTML}, {WINDOWS_NPY})")
        written.append(name)
    return Tuned(search, corpus, filterbank, diagnostics, tuple(written))


def tune(source, settings: JobSettings, out: Path, *, progress=None, should_stop=None,
         checkpoint=None, resume_from=None,
         on_resume_refused: Callable[[ValueError], bool] | None = None,
         fitted: Callable[[FilterbankSearch], bool] | None = None,
         job: JobRecord | None = None, rename: Callable[[str], str] | None = None,
         final_newline: bool = True, write: Callable[[Path, bytes], Any] = write_file,
         extra: Sequence[str] = (REPORT_HTML,)) -> Tuned | None:
    """Tune a filterbank on ``source`` with ``settings`` and write the results into ``out``.

    ``source``: waveform files or folders (read with ``settings.read_options()``, recorded as
    given: ``search.corpus.given.read_corpus_as_given``), or a corpus already read (anything
    with ``windows``). ``progress``, ``should_stop``, ``checkpoint``, ``resume_from`` and
    ``on_resume_refused`` go to :func:`fit`; ``fitted(search)``, called once the fit returns,
    returning False writes nothing and makes this return None (a job withdrawn or lost
    meanwhile). ``job``, ``rename``, ``final_newline``, ``write`` and ``extra`` go to
    :func:`write_results`. Returns the :class:`Tuned`. Raises the reader's ``CorpusError``,
    the search's ``ValueError`` and :class:`ResultsNotWritten`.
    """
    corpus = source if hasattr(source, "windows") else read_corpus_as_given(
        source, settings.read_options())
    search = fit(corpus, settings, progress=progress, should_stop=should_stop,
                 checkpoint=checkpoint, resume_from=resume_from,
                 on_resume_refused=on_resume_refused)
    if fitted is not None and not fitted(search):
        return None
    return write_results(out, search, corpus, job=job, rename=rename, final_newline=final_newline,
                         write=write, extra=extra)


def _report(filterbank: FilterbankDocument, diagnostics: DiagnosticsDocument, corpus) -> str:
    # imported here: the report loads matplotlib, which only a tuning that renders it pays
    from burstlens.service.report import render_report

    return render_report(filterbank.to_json(), diagnostics.data, corpus.windows,
                         corpus.sampling_rate_hz)


def _keep_windows(path: Path, corpus, write) -> bool:
    """Keep a window sample for the report's plots; whether it was written (a failure is
    logged: the report then goes without its examples)."""
    windows = corpus.windows
    if windows.size > REPORT_MAX_VALUES:
        windows = windows[: max(1, REPORT_MAX_VALUES // windows.shape[1])]
    try:
        buffer = io.BytesIO()
        np.save(buffer, np.ascontiguousarray(windows), allow_pickle=False)
        write(path, buffer.getvalue())
    except Exception:
        log.exception("keeping the report's window sample %s failed", path)
        return False
    return True
