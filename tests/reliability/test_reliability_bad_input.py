"""Seeded subset of reliability experiment 4: generated bad input for readers, API and uploads."""
import pytest

from reliability import bad_input

pytestmark = pytest.mark.slow


def test_generated_bad_input_never_gives_5xx_or_leaves_state():
    """Arbitrary and mutated waveform files only ever raise ``CorpusError`` naming the file and
    are never unpickled; schemathesis (all checks, every phase) gets no 5xx from the JSON API and
    leaves no orphans; hostile multipart uploads get no 5xx and leave the data dir's files and
    tables exactly as they were (DESIGN §6–7; OWASP "Unrestricted File Upload"; NumPy docs,
    ``numpy.load``: allow_pickle=False refuses object arrays)."""
    rows = bad_input.run(reader_cases=200, api_examples=5, multipart_cases=100, seed=7,
                         api_max_time_s=10, min_cases=300)
    for row in rows:
        assert row.met, (row.experiment, row.counts, row.result, row.details)
