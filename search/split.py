"""Held-out split of a corpus's windows, grouped so that overlapping windows never straddle it.

A fitted filterbank judged on the windows it was fitted on reports optimism, not sharpness: the
search has 3·C free parameters per channel grid. The judgement therefore uses windows kept out
of every fitting stage (common practice: a hold-out set, e.g. Hastie, Tibshirani & Friedman,
"The Elements of Statistical Learning", 2009, §7.2). Windows that share samples (overlapping
burst windows, sliding windows) carry the same data, so they are kept on one side: windows of
one trace whose spans overlap form a chain, chains are the units drawn, and a chain longer
than a quarter of the held-out share is cut into pieces, with every fit window that overlaps a
held-out one dropped from the fit ("guard" windows) so that no sample is on both sides.

All indices refer to the corpus's window order; every result is sorted and depends only on the
windows' metadata, the share and the seed.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class WindowSplit:
    """Indices (sorted int arrays) of the fit, held-out and guard windows, and how they were
    grouped. ``fit`` and ``held_out`` are disjoint; ``guard`` windows are in neither."""

    fit: np.ndarray
    held_out: np.ndarray
    guard: np.ndarray
    grouping: str

    def to_json(self) -> dict:
        return {"fit": self.fit.tolist(), "held_out": self.held_out.tolist(),
                "guard": self.guard.tolist(), "grouping": self.grouping}


def _spans(window_meta, n_windows: int, window_s: float):
    """(trace key, start s) per window, or None when the metadata cannot place windows."""
    if window_meta is None or len(window_meta) != n_windows:
        return None
    spans = []
    for meta in window_meta:
        if not isinstance(meta, dict) or meta.get("offset_s") is None:
            return None
        spans.append((str(meta.get("trace_id")), float(meta["offset_s"])))
    return spans


def _chains(spans, window_s: float) -> list[list[int]]:
    """Windows of one trace whose spans overlap (start gap < window length), in time order."""
    order = sorted(range(len(spans)), key=lambda i: (spans[i][0], spans[i][1], i))
    chains: list[list[int]] = []
    for i in order:
        last = chains[-1][-1] if chains else None
        if last is not None and spans[last][0] == spans[i][0] \
                and spans[i][1] - spans[last][1] < window_s:
            chains[-1].append(i)
        else:
            chains.append([i])
    return chains


def held_out_split(window_meta, n_windows: int, window_s: float, share: float,
                   seed: int) -> WindowSplit:
    """Seeded split of ``n_windows`` windows into fit and held-out sets.

    Parameters
    ----------
    window_meta : list of dict or None
        Per window ``trace_id`` and ``offset_s`` (start within the trace, s), as in
        ``Corpus.window_meta``; without them every window is its own group.
    n_windows : int
        M, the number of windows.
    window_s : float
        Window length, s (two windows of one trace overlap when their starts are closer).
    share : float in [0, 0.9]
        Target share of windows held out; 0 holds out none (``held_out`` is then empty).
    seed : int
        Seed of the draw.

    At least one window is held out and at least one is fitted whenever ``share > 0`` and
    ``n_windows ≥ 2``; a single window cannot be split (``ValueError``).
    """
    m = int(n_windows)
    empty = np.zeros(0, dtype=np.int64)
    if share <= 0:
        return WindowSplit(np.arange(m), empty, empty, "none: judged on the fitted windows")
    if m < 2:
        raise ValueError(f"held_out = {share:g} needs at least 2 windows to split, the corpus has "
                         f"{m}; set held_out to 0 to judge on the fitted windows")
    target = min(max(1, int(round(share * m))), m - 1)
    spans = _spans(window_meta, m, window_s)
    if spans is None:
        groups = [[i] for i in range(m)]
        grouping = "each window alone (no trace times in the metadata)"
    else:
        groups = []
        longest = max(1, target // 4)
        for chain in _chains(spans, window_s):
            groups.extend(chain[k:k + longest] for k in range(0, len(chain), longest))
        grouping = (f"windows of one trace that overlap kept together (pieces of at most "
                    f"{longest}); fit windows overlapping a held-out one are dropped")
    rng = np.random.default_rng(np.random.SeedSequence([int(seed), 4]))
    held: list[int] = []
    for g in rng.permutation(len(groups)):
        if len(held) >= target:
            break
        if len(held) + len(groups[g]) > m - 1:
            continue
        held.extend(groups[g])
    held_set = set(held)
    guard: list[int] = []
    if spans is not None:
        starts = {}
        for i in held:
            starts.setdefault(spans[i][0], []).append(spans[i][1])
        for i in range(m):
            if i in held_set:
                continue
            trace, t0 = spans[i]
            if any(abs(t0 - t) < window_s for t in starts.get(trace, ())):
                guard.append(i)
    fit = np.array(sorted(set(range(m)) - held_set - set(guard)), dtype=np.int64)
    if fit.size == 0:
        raise ValueError(f"held_out = {share:g}: every window left for the fit overlaps a held-out "
                         f"one; use fewer overlapping windows or set held_out to 0")
    return WindowSplit(fit, np.array(sorted(held), dtype=np.int64),
                       np.array(sorted(guard), dtype=np.int64), grouping)
