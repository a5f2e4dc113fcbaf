"""Seeded subset of reliability experiment 4: generated bad input for readers, API and uploads."""
import pytest

from reliability import bad_input

pytestmark = pytest.mark.slow


def test_generated_bad_input_never_gives_5xx_or_leaves_state():
    """Arbitrary and mutated waveform files of every format, read through the corpus reader and at
    the reader (whole and streamed), only ever raise ``CorpusError`` naming the file, are never
    unpickled and leave no file behind; a real miniSEED file cut at every record boundary reads
    to the samples its remaining records declare, and cut inside a record or with a garbage record
    is a ``CorpusError`` naming that record's byte offset (SEED Reference Manual v2.4, IRIS/FDSN
    2012, ch. 8); schemathesis (all checks, every phase) gets no 5xx and only parseable JSON from
    the JSON API and leaves no orphans; hostile multipart uploads get no 5xx and leave the data
    dir's files and tables exactly as they were (docs/design.md §6–7; OWASP "Unrestricted File Upload";
    NumPy docs, ``numpy.load``: allow_pickle=False refuses object arrays)."""
    rows = bad_input.run(reader_cases=200, api_examples=5, multipart_cases=100, seed=7,
                         api_max_time_s=10, min_cases=1000, bulk_cases=400, sweep="boundaries",
                         sweep_sources=1)
    assert [row.experiment for row in rows][:3] == ["4 bad input: readers (read_corpus)",
                                                    "4 bad input: readers, every format",
                                                    "4 bad input: miniSEED cuts and garbage records"]
    for row in rows:
        assert row.met, (row.experiment, row.counts, row.result, row.details)
