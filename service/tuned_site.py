"""The worker's jobs on a tuned site: a drift check and a continuous transform.

Both hang off a search that is done (its ``parent_id``) and read a corpus uploaded after it:

- **check** (``POST /v1/jobs/{id}/checks``): reads the new files as the search read its corpus
  (``FilterbankDocument.reading_options``), runs :func:`search.drift.check_drift` and keeps the
  answer as ``check.json`` (the object ``burstlens check --json`` prints). The job's summary
  carries the verdict (``keep`` or ``retune``) and what moved, in words.
- **transform** (``POST /v1/jobs/{id}/transforms``): the search's filterbank over every trace of
  the new files, whole, into a Zarr store (:func:`search.continuous.transform_continuous`). The
  store lives under ``results/<job>/store.zarr`` for every attempt of the job, so an attempt
  that dies resumes from the last complete chunk instead of starting over.

Each function takes the attempt (:class:`service.worker.JobRun`) and returns ``(result_dir,
summary)`` for :meth:`Store.finish`; bad input raises ``PermanentError``, a withdrawal or a
stopping worker raises what ``JobRun.execute`` maps to ``withdrawn`` or a released lease.
"""
from __future__ import annotations

import json
from pathlib import Path

from burstlens.search.continuous import transform_continuous
from burstlens.search.corpus import CorpusError
from burstlens.search.documents import DiagnosticsDocument, FilterbankDocument
from burstlens.search.drift import MAX_WINDOWS, check_drift
from burstlens.service.corpus_check import (CorpusRejected, enforce_limits, jsonable, load_corpus,
                                            renamer)
from burstlens.service.results import DIAGNOSTICS_JSON, FILTERBANK_JSON
from burstlens.service.store import NotFound, write_blob

# service.worker imports this module, so its PermanentError is imported where it is raised

CHECK_FILE = "check.json"
STORE_DIR = "store.zarr"


class Interrupted(Exception):
    """A transform job stopped between chunks (withdrawn, lease lost or the worker stopping);
    its store stays resumable."""


def parent_documents(run):
    """The parent search's filterbank and diagnostics documents (PermanentError when gone)."""
    from burstlens.service.worker import PermanentError

    try:
        parent = run.store.get_job(run.job["parent_id"], None)
        folder = run.store.path(parent["result_dir"])
        filterbank = FilterbankDocument.read(json.loads((folder / FILTERBANK_JSON).read_text()))
        diagnostics = DiagnosticsDocument(json.loads((folder / DIAGNOSTICS_JSON).read_text()))
    except (NotFound, OSError, TypeError, ValueError) as exc:
        raise PermanentError(f"the search {run.job['parent_id']} has no readable filterbank "
                             f"({exc})") from None
    return filterbank, diagnostics


def corpus_of(run):
    """The job's corpus record, its stored paths and the client's names for them."""
    from burstlens.service.worker import PermanentError

    try:
        record = run.store.get_corpus(run.job["corpus_id"], None)
    except NotFound:
        raise PermanentError(f"corpus {run.job['corpus_id']} no longer exists") from None
    return record, run.store.corpus_paths(record), [f["name"] for f in record["files"]]


def run_check(run) -> tuple[Path, dict]:
    """Judge the parent's filterbank on the job's corpus; write ``check.json``."""
    from burstlens.service.worker import PermanentError

    filterbank, diagnostics = parent_documents(run)
    record, paths, names = corpus_of(run)
    try:
        options = filterbank.reading_options(record["summary"].get("read_options"))
        options["max_windows"] = MAX_WINDOWS
        run.progress({"stage": "reading", "fraction": 0.0})
        corpus = load_corpus(paths, names, options, mapper=run.worker.reading_mapper(paths))
        enforce_limits(corpus, run.settings)
        answer = check_drift(filterbank, corpus, diagnostics.data,
                             progress=lambda f: run.progress({"stage": "check", "fraction": f}))
    except (CorpusRejected, ValueError) as exc:
        raise PermanentError(str(exc)) from None
    names_only = renamer(paths, names)
    document = jsonable(answer.to_json(), names_only)
    folder = run.store.result_folder(run.job)
    write_blob(folder / CHECK_FILE, (json.dumps(document, indent=1) + "\n").encode("utf-8"))
    return folder, {"verdict": answer.verdict, "words": [names_only(w) for w in answer.words()],
                    "moved": [m["what"] for m in document.get("moved", [])], "files": names}


def run_transform(run) -> tuple[Path, dict]:
    """The parent's filterbank over the job's corpus into ``results/<job>/store.zarr``."""
    from burstlens.service.worker import PermanentError

    filterbank, _ = parent_documents(run)
    record, paths, names = corpus_of(run)
    folder = run.store.blob_dir / "results" / run.job["id"]
    folder.mkdir(parents=True, exist_ok=True)
    total = [0]

    def plan(chunks: int) -> None:
        total[0] = chunks
        run.progress({"stage": "transform", "chunks": 0, "of": chunks, "fraction": 0.0})

    def written(done: int) -> None:
        run.progress({"stage": "transform", "chunks": done, "of": total[0],
                      "fraction": done / total[0] if total[0] else 1.0})

    def between_chunks(_group: str, _steps: int) -> None:
        if run.should_stop() or run.worker.stopping.is_set():
            raise Interrupted("stopped between chunks")

    try:
        result = transform_continuous(
            [str(p) for p in paths], filterbank, str(folder / STORE_DIR),
            step_s=run.job["settings"].get("time_step_s"),
            reading=filterbank.reading_options(record["summary"].get("read_options")),
            progress=written, on_plan=plan, on_chunk=between_chunks)
    except (CorpusError, ValueError) as exc:
        raise PermanentError(renamer(paths, names)(str(exc))) from None
    parts = [{"seed_id": p.trace_id, "group": p.group, "start_ns": p.start_ns, "steps": p.n_steps}
             for p in result.parts]
    return folder, {"time_step_s": result.step.seconds, "parts": parts,
                    "channels": len(filterbank.channels), "files": names}
