"""search.fit.evaluate: scoring on window chunks never needs the whole image stack."""
import numpy as np

from burstlens.search.criteria import Criterion, cell_sizes
from burstlens.search.fit.evaluate import CHUNK, Evaluator, make_filterbank, row_masses
from burstlens.search.tfd import transform


def test_row_masses_pooled_by_chunk_equal_the_whole_stack_sums():
    """The per-channel negative and absolute masses the judgement pools for a non-separable
    criterion, computed chunk by chunk (evaluate.row_masses) and summed over windows, are
    bit for bit the sums over (windows, samples) of the whole float64 stack, whatever the
    chunking (common practice: an exact reorganisation of the same additions)."""
    rng = np.random.default_rng(3)
    images = (rng.standard_normal((53, 5, 300)) * rng.lognormal(size=(53, 5, 1))).astype(np.float32)
    x = images.astype(np.float64)
    whole = np.maximum(-x, 0.0).sum(axis=(0, 2)), np.abs(x).sum(axis=(0, 2))
    for chunk in (1, 7, CHUNK, 53):
        rows = np.concatenate([row_masses(images[k:k + chunk]) for k in range(0, 53, chunk)])
        assert np.array_equal(rows[:, :, 0].sum(axis=0), whole[0])
        assert np.array_equal(rows[:, :, 1].sum(axis=0), whole[1])


def test_gini_judgement_stats_are_row_masses_of_the_images():
    """With the Gini index (not separable) the evaluator's stats are each row's masses,
    (n, C, 2), equal to those of the whole transform, not the (n, C, N) images (common
    practice)."""
    rng = np.random.default_rng(4)
    fs, windows = 1000.0, rng.standard_normal((2 * CHUNK + 3, 128))
    centers = np.array([100.0, 200.0, 300.0])
    p = (centers, np.full(3, 0.01), np.ones(3), np.zeros(3))
    criterion = Criterion("sparsity", measure="gini")
    ev = Evaluator(windows, fs, criterion, 1e-6, 1, cell_sizes(centers, fs)[:, 0])
    try:
        scored = ev.score([p], want_stats=True)[0]
    finally:
        ev.close()
    images = transform(windows, make_filterbank(*p, fs))
    assert scored.stats.shape == (len(windows), 3, 2)
    assert np.array_equal(scored.stats, row_masses(images))
