"""Corpus reading: waveform files → preprocessed burst windows at one sampling rate.

``read_corpus(paths, **options) -> Corpus``; every failure is a ``CorpusError`` naming the file
(or option) and the cause.
"""
from .ingest import read_corpus
from .model import REJECTION_REASONS, Corpus, CorpusError

__all__ = ["read_corpus", "Corpus", "CorpusError", "REJECTION_REASONS"]
