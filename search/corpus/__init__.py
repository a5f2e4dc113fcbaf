"""Corpus reading: waveform files → preprocessed burst windows at one sampling rate.

``read_corpus(paths, **options) -> Corpus``; every failure is a ``CorpusError`` naming the file
(or option) and the cause. ``TRIGGERS`` are the accepted STA/LTA kinds (``trigger=``),
``TRIGGER_KINDS`` says what each averages, ``DEFAULT_TRIGGER`` is the one used when none is given.
``folder_files`` and ``is_waveform_file`` say which files of a folder the reader reads (the one
definition, also used by ``burstlens submit`` to choose what to upload). ``read_corpus(...,
progress=callback)`` passes a ``ReadProgress`` (stage one of ``READ_STAGES``) after each file and
segment.
"""
from burstlens.search.corpus.ingest import (DEFAULT_TRIGGER, READ_STAGES, TRIGGER_KINDS, TRIGGERS, ReadProgress,
                                            folder_files, is_waveform_file, read_corpus)
from burstlens.search.corpus.model import REJECTION_REASONS, Corpus, CorpusError

__all__ = ["read_corpus", "Corpus", "CorpusError", "REJECTION_REASONS", "TRIGGERS", "TRIGGER_KINDS",
           "DEFAULT_TRIGGER", "folder_files", "is_waveform_file", "ReadProgress", "READ_STAGES"]
