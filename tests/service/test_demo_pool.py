"""`make demo` on two processes: no pool worker is restarted as leaking (search/fit/evaluate.py).

The demo fits with ``jobs=2``, so candidates are scored on joblib's loky pool. loky restarts a
worker whose resident memory has grown by more than its leak bound (``_MAX_MEMORY_LEAK_SIZE``,
300 MB in joblib 1.6's ``joblib/externals/loky/process_executor.py``) since its first task,
and warns "A worker stopped while some jobs were given to the executor" when jobs were pending.
The demo's workers grew so because each kept the transform weights of every candidate it had
scored (tens of MB for a chirped 96-channel grid), though a search scores a candidate on its
chunks and never again.
"""
import warnings

import numpy as np
import pytest

FS = 4000.0
N = 1024
CHANNELS = 96


def _chirped_candidate(seed: int, centers: np.ndarray) -> tuple:
    """A family point like the demo's: σ_t(f) = σ_ref (f/300 Hz)^q, one cell area, one chirp
    rate of 20–55 kHz/s (the demo's chirp bound is 57 kHz/s)."""
    rng = np.random.default_rng(seed)
    sigma = rng.uniform(0.01, 0.04) * (centers / 300.0) ** rng.uniform(-0.4, 0.2)
    beta = rng.choice([-1.0, 1.0]) * rng.uniform(2e4, 5.5e4)
    return centers, sigma, np.full(CHANNELS, rng.uniform(0.3, 1.0)), np.full(CHANNELS, beta)


def test_two_workers_scoring_many_chirped_candidates_are_not_restarted():
    """Property: scoring 12 distinct chirped 96-channel candidates, each on two 16-window chunks
    at 4 kHz (so both workers build every candidate's weights), on a 2-process loky pool raises
    no pool warning: each worker keeps only the weights of the filterbank it is scoring. Without
    that rule the same run pushed both workers past loky's leak bound (about 520 MB resident
    against about 230 MB after their first task) and loky restarted them with this warning."""
    pytest.importorskip("psutil")  # loky measures its workers' memory only with psutil
    from burstlens.search.criteria import Criterion, cell_sizes
    from burstlens.search.filterbank import center_grid
    from burstlens.search.fit.evaluate import Evaluator

    centers = np.asarray(center_grid((40.0, 1800.0), CHANNELS, "log"))
    windows = np.random.default_rng(0).standard_normal((32, N))
    criterion = Criterion(name="renyi", alpha=3.0, excess=True)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")  # the pool warns from its manager thread
        evaluator = Evaluator(windows, FS, criterion, 1e-6, 2, cell_sizes(centers, FS)[:, 0],
                              chunk=16)
        try:
            assert evaluator.one_plan  # a process pool: the rule applies
            for seed in range(12):
                scored = evaluator.score([_chirped_candidate(seed, centers)])[0]
                assert scored.scores.shape == (32,)
        finally:
            evaluator.close()
    pool = [str(w.message) for w in caught if "worker stopped" in str(w.message)]
    assert pool == []


def test_keeping_one_plan_changes_no_score():
    """Property: the rule frees memory only; the scores of a candidate are the same bit for bit
    with it (a process pool) and without it (in process), in window order."""
    from burstlens.search.criteria import Criterion, cell_sizes
    from burstlens.search.filterbank import center_grid
    from burstlens.search.fit.evaluate import Evaluator

    centers = np.asarray(center_grid((40.0, 1800.0), 12, "log"))
    windows = np.random.default_rng(1).standard_normal((8, 256))
    criterion = Criterion(name="renyi", alpha=3.0, excess=True)
    cell = cell_sizes(centers, FS)[:, 0]
    params = [(centers, np.full(12, 0.004), np.full(12, 1.0), np.full(12, b))
              for b in (0.0, 3e4, -3e4)]
    found = {}
    for jobs in (1, 2):
        evaluator = Evaluator(windows, FS, criterion, 1e-6, jobs, cell, chunk=2)
        try:
            found[jobs] = [s.scores for s in evaluator.score(params) + evaluator.score(params[::-1])]
        finally:
            evaluator.close()
    for one, two in zip(found[1], found[2], strict=True):
        np.testing.assert_array_equal(one, two)
