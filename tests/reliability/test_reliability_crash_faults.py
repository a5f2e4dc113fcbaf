"""Seeded subset of reliability experiment 1: kill -9 a worker mid-job (also inside SQLite's own
COMMIT); corrupt its checkpoint."""
import pytest

from reliability import crash_faults

pytestmark = pytest.mark.slow


def test_killed_workers_resume_to_the_identical_filterbank():
    """A worker SIGKILLed during a round, inside SQLite's COMMIT of one of its write transactions
    after the transaction's WAL frames are on file (seed 9 draws ``commit:5:frames``: the kill
    must be seen to land with a valid commit frame in the WAL that the wal-index does not yet
    show) and in the middle of a checkpoint's blob write leaves a job that another worker
    reclaims when the lease expires and finishes with exactly the filterbank of an uninterrupted
    run, no checkpoint file left; a truncated checkpoint and a well-formed one of the wrong state
    (digest matching) are refused and the job restarts clean, never resuming from garbage; a job
    whose every attempt is killed ends failed with its last error kept (docs/design.md §5 and §7:
    leases, checkpoints, "a resumed job must end with the same filterbank as an uninterrupted
    one"; kill -9 semantics: POSIX signal(7), SIGKILL cannot be caught; WAL commit order and
    frame checksums: SQLite documentation, "Database File Format" §4)."""
    faults, corruptions, exhausted = crash_faults.run(faults=3, corruptions=2, seed=9, lanes=2,
                                                      time_budget_s=400)
    assert "commit 1/1" in faults.counts, faults.counts
    assert "1 with its frames written and not yet published" in faults.counts, faults.counts
    assert faults.met, (faults.counts, faults.result, faults.details)
    assert corruptions.met, (corruptions.counts, corruptions.result, faults.details)
    assert exhausted.met, (exhausted.counts, exhausted.result, exhausted.details)
