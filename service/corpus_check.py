"""Reading stored uploads with the engine's corpus reader, in the client's terms.

Files are stored under server-chosen names; the reader's messages and summaries would show those
paths, so everything that goes back to a client is rewritten to the client's own file names.
"""
from __future__ import annotations

import logging
import math
from pathlib import Path
from typing import Any

import numpy as np

from burstlens.search.corpus import CorpusError
from burstlens.search.corpus.given import read_corpus_as_given
from burstlens.search.settings import CORPUS_OPTIONS, check_corpus_options

log = logging.getLogger("burstlens.corpus")


class CorpusRejected(ValueError):
    """The files cannot be read as a corpus, or the reading options are wrong (the message names
    the client's file or the option, and the cause). The API answers it with a 422."""


class CorpusTooLarge(ValueError):
    """The corpus passes a server limit (windows or samples). The API answers it with a 413."""


def parse_read_options(fields: dict[str, str]) -> dict[str, Any]:
    """Form fields of an upload (named as the corpus options, ``search.settings.CORPUS_OPTIONS``,
    values as text) → checked corpus reader options; a bad one is a :class:`CorpusRejected`
    naming it."""
    try:
        return check_corpus_options({name: CORPUS_OPTIONS[name].parse(text)
                                     for name, text in fields.items()})
    except ValueError as exc:
        raise CorpusRejected(str(exc)) from None


def renamer(paths: list[Path], names: list[str]):
    """A function that rewrites the stored files' paths (and their folders) in a text to the
    client's own file names, so no server path reaches a client."""
    pairs = sorted(((str(p), n) for p, n in zip(paths, names, strict=True)), key=lambda x: -len(x[0]))
    folders = sorted({str(p.parent) for p in paths}, key=len, reverse=True)

    def rename(text: str) -> str:
        for path, name in pairs:
            text = text.replace(path, name)
        for folder in folders:
            text = text.replace(folder + "/", "").replace(folder, "")
        return text
    return rename


def jsonable(obj: Any, rename=lambda s: s) -> Any:
    """Plain JSON types: numpy scalars/arrays unwrapped, non-finite floats → None, names mapped."""
    if isinstance(obj, dict):
        return {str(k): jsonable(v, rename) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [jsonable(v, rename) for v in obj]
    if isinstance(obj, np.ndarray):
        return jsonable(obj.tolist(), rename)
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        value = float(obj)
        return value if math.isfinite(value) else None
    if isinstance(obj, (str, Path)):
        return rename(str(obj))
    if obj is None:
        return None
    return rename(str(obj))


def load_corpus(paths: list[Path], names: list[str], options: dict[str, Any], mapper=None):
    """``search.read_corpus`` over stored files (its tasks on a cluster with ``mapper``); errors
    become :class:`CorpusRejected`."""
    rename = renamer(paths, names)
    try:
        return read_corpus_as_given([str(p) for p in paths], options, mapper=mapper)
    except CorpusError as exc:
        raise CorpusRejected(rename(str(exc))) from None
    except (ValueError, TypeError) as exc:
        raise CorpusRejected(f"could not read the files: {rename(str(exc))}") from None
    except Exception as exc:  # a reader library failing on hostile bytes is still bad input
        log.warning("corpus reader failed: %r", exc)
        raise CorpusRejected(f"could not read the files: {rename(str(exc))}") from None


def corpus_samples(corpus) -> int:
    """Samples read over all traces (duration × rate), the quantity ``max_samples`` bounds."""
    return int(sum(round(float(t.get("duration_s", 0)) * float(t.get("sampling_rate_hz", 0)))
                   for t in corpus.traces))


def enforce_limits(corpus, settings) -> None:
    if corpus.n_windows > settings.max_windows:
        raise CorpusTooLarge(f"the corpus has {corpus.n_windows} windows, more than the server's "
                             f"limit of {settings.max_windows}")
    samples = corpus_samples(corpus)
    if samples > settings.max_samples:
        raise CorpusTooLarge(f"the corpus has {samples} samples, more than the server's limit of "
                             f"{settings.max_samples}")
    if corpus.n_windows == 0:
        reasons = sorted({r.get("reason", "?") for r in corpus.rejections})
        raise CorpusRejected("no usable windows in the files" +
                             (f" (rejected: {', '.join(reasons)})" if reasons else ""))


def read_for_client(paths: list[Path], names: list[str], options: dict[str, Any], settings):
    """The corpus of an upload within the service's limits: :class:`CorpusRejected` when it
    cannot be read (the message names the client's file), :class:`CorpusTooLarge` when it is
    over a limit."""
    corpus = load_corpus(paths, names, options)
    enforce_limits(corpus, settings)
    return corpus


def check_corpus(paths: list[Path], files: list[dict], options: dict[str, Any], settings
                 ) -> tuple[dict[str, Any], str | None]:
    """Read an upload as the jobs will; returns (summary for the client, source hash).

    Raises :class:`CorpusRejected` (unreadable, no windows) or :class:`CorpusTooLarge`.
    """
    names = [f["name"] for f in files]
    corpus = read_for_client(paths, names, options, settings)
    summary = jsonable(corpus.to_json(), renamer(paths, names))
    summary.pop("window_meta", None)  # one entry per window: too much for a record
    return summary, getattr(corpus, "source_hash", None)
