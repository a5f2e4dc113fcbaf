"""search.split: the held-out split keeps overlapping windows on one side (hold-out evaluation:
Hastie, Tibshirani & Friedman, "The Elements of Statistical Learning", 2009, §7.2; grouping
dependent samples on one side of a split is common practice)."""
import numpy as np
import pytest

from burstlens.search.split import held_out_split


def meta(offsets, trace="XX.A..HHZ"):
    return [{"trace_id": trace, "offset_s": float(t)} for t in offsets]


def overlapping_pairs(m, offsets, window_s):
    return {(i, j) for i in range(m) for j in range(m)
            if i != j and offsets[i][0] == offsets[j][0] and abs(offsets[i][1] - offsets[j][1]) < window_s}


@pytest.mark.parametrize("hop", [0.25, 0.5, 2.0])
def test_no_window_overlaps_a_window_on_the_other_side(hop):
    """Sliding windows (hop below the window length) and separate bursts: held-out and fit
    windows never share samples, the sets are disjoint, and about a quarter is held out."""
    window_s, m = 1.0, 80
    rows = meta(np.arange(m) * hop)
    split = held_out_split(rows, m, window_s, 0.25, seed=3)
    held, fit = set(split.held_out.tolist()), set(split.fit.tolist())
    assert held and fit and not held & fit and not set(split.guard.tolist()) & (held | fit)
    assert len(held) + len(fit) + len(split.guard) == m
    spans = [(r["trace_id"], r["offset_s"]) for r in rows]
    for i, j in overlapping_pairs(m, spans, window_s):
        assert not (i in held and j in fit)
    assert abs(len(held) - 20) <= 5


def test_the_split_is_seeded_and_independent_of_metadata_order_details():
    """Same seed, same split; another seed, another split; traces are kept apart by their id."""
    rows = meta(np.arange(40) * 2.0, "XX.A..HHZ") + meta(np.arange(40) * 2.0, "XX.B..HHZ")
    a = held_out_split(rows, 80, 1.0, 0.25, seed=1)
    b = held_out_split(rows, 80, 1.0, 0.25, seed=1)
    c = held_out_split(rows, 80, 1.0, 0.25, seed=2)
    assert a.held_out.tolist() == b.held_out.tolist() and a.held_out.tolist() != c.held_out.tolist()
    assert a.guard.size == 0          # windows of different traces never overlap


def test_no_share_judges_in_sample_and_one_window_cannot_be_split():
    """held_out = 0 keeps every window for the fit; a single window cannot be split and the
    error names the setting."""
    split = held_out_split(meta([0.0, 5.0]), 2, 1.0, 0.0, seed=0)
    assert split.fit.tolist() == [0, 1] and split.held_out.size == 0
    with pytest.raises(ValueError, match="held_out"):
        held_out_split(meta([0.0]), 1, 1.0, 0.25, seed=0)
    two = held_out_split(None, 2, 1.0, 0.25, seed=0)
    assert two.fit.size == 1 and two.held_out.size == 1
