"""``read_corpus_as_given``: the reader, with the options a person set recorded apart from those
the reader chose (the result's provenance)."""
from __future__ import annotations

from burstlens.search.corpus.ingest import read_corpus
from burstlens.search.corpus.model import Corpus


def read_corpus_as_given(paths, options: dict, *, progress=None, mapper=None) -> Corpus:
    """``read_corpus(paths, **options, progress=progress, mapper=mapper)``, with ``options``
    (checked corpus options, ``search.settings.JobSettings.read_options()``) recorded as
    ``Corpus.defaults["given"]``: the reader's record holds the value of every option, this says
    which of them a person set rather than the reader chose. ``progress`` is the reader's
    callback (``search.corpus.ReadProgress``), ``mapper`` runs its tasks elsewhere (a Dask
    cluster); neither changes the result."""
    corpus = read_corpus(paths, **options, progress=progress, mapper=mapper)
    corpus.defaults["given"] = dict(options)
    return corpus
