"""Scoring filterbanks on the windows of one fit: chunk tasks, window sharing, the worker pool.

A filterbank's images S ``(M, C, N)`` are scored per window by ``search.criteria.Criterion``
through per-row statistics (:func:`row_stats`): each (window, channel) row is reduced to the
sums of ``Criterion.row_stats`` times the channel's cell area ΔA_c (s·Hz), an ``(M, C, 4)``
array, so the refinement rescores a trial by replacing one row of it. The Gini index is not a
function of row sums: for it the "statistics" are the images themselves, ``(M, C, N)`` float32.

Parallel work goes through joblib over (candidate, window chunk) pairs; the windows are shared
once per fit (a memory map for process backends, ``Client.scatter`` for the Dask backend), chunk
boundaries (``CHUNK`` windows) do not depend on the number of workers, and results come back in
window order, so scores are the same for any ``n_jobs`` and backend.
"""
from __future__ import annotations

import os
import shutil
import tempfile
import threading
import time
import uuid
from collections import OrderedDict
from dataclasses import dataclass

import numpy as np

from burstlens.search.criteria import Criterion, negative_share, shares_from_totals
from burstlens.search.filterbank import Channel, Filterbank
from burstlens.search.spectrogram import spectrogram_scores
from burstlens.search.tfd import clear_plans, prepare, transform

CHUNK = 16                      # windows per task; fixed so results never depend on n_jobs

# ---------------------------------------------------------------------------------------------
# Work done in joblib workers (module level so that every backend can import it)
# ---------------------------------------------------------------------------------------------

_PREPARED: OrderedDict[tuple, object] = OrderedDict()
_PREPARED_LOCK = threading.Lock()
_PREPARED_MAX = 128             # cached prepared chunks per process (LRU)


def _prepared(token: str, windows, start: int, stop: int):
    """Prepared form (search.tfd.prepare) of windows[start:stop], cached per process."""
    key = (token, start, stop)
    with _PREPARED_LOCK:
        hit = _PREPARED.get(key)
        if hit is not None:
            _PREPARED.move_to_end(key)
            return hit
    if not hasattr(windows, "shape"):
        # joblib's Dask backend runs a batch in the calling process when the cluster has one
        # thread; the scattered array then arrives as its distributed Future
        windows = windows.result()
    hit = prepare(np.ascontiguousarray(windows[start:stop], dtype=np.float64))
    with _PREPARED_LOCK:
        _PREPARED[key] = hit
        while len(_PREPARED) > _PREPARED_MAX:
            _PREPARED.popitem(last=False)
    return hit


def _forget(token: str) -> None:
    with _PREPARED_LOCK:
        for key in [k for k in _PREPARED if k[0] == token]:
            del _PREPARED[key]


# The filterbank whose transform weights this worker process keeps (see _transform_kept).
_KEPT_PLAN: list = [None]


def _transform_kept(prepared, filterbank, eps: float, one_plan: bool) -> np.ndarray:
    """``search.tfd.transform(prepared, filterbank, eps=eps)``; with ``one_plan`` (a
    worker process of its own) only this filterbank's cached weights are kept. A search scores
    each candidate on its chunks and then never again, so older weights (tens of MB for a
    chirped 96-channel grid) would pile up to the transform's cache bound in every worker,
    which loky reads as a memory leak and answers by restarting the worker mid-batch."""
    if one_plan:
        key = filterbank.key()
        if _KEPT_PLAN[0] != key:
            clear_plans()
            _KEPT_PLAN[0] = key
    return transform(prepared, filterbank, eps=eps)


def make_filterbank(centers_hz, sigma_s, area, beta, fs, provenance=None, steady_lines_hz=()):
    """Filterbank from per-channel arrays (Hz, s, dimensionless, Hz/s) at sampling rate fs (Hz)
    (``steady_lines_hz``: the lines its transform removes first; the search's own scoring
    filterbanks have none, their windows are already clean)."""
    channels = [Channel(float(f), float(s), float(a), float(b))
                for f, s, a, b in zip(centers_hz, sigma_s, area, beta, strict=True)]
    return Filterbank(channels, float(fs), provenance=provenance, steady_lines_hz=steady_lines_hz)


def make_criterion(spec: dict) -> Criterion:
    """The Criterion of a resolved settings ``criterion`` dict (its ``reduce`` is the reducer's).
    The detection criterion scores a corpus, not an image (``search.fit.detect``): its runs
    score sharpness (the ceiling, the refinement's rows, the judgement's bits) by the Rényi
    entropy of the bursts' excess."""
    if spec["name"] == "detection":
        return Criterion(name="renyi", alpha=3.0, excess=True)
    return Criterion(name=spec["name"], alpha=spec["alpha"], p=spec["p"], measure=spec["measure"],
                     negative_mass_penalty=spec["negative_mass_penalty"],
                     excess=spec.get("excess", False))


def row_stats(images: np.ndarray, criterion: Criterion, cell: np.ndarray) -> np.ndarray:
    """``(M, C, 4)`` statistics of each (window, channel) row of ``images`` (M, C, N):
    ``criterion.row_stats`` of the row times its channel's cell area ``cell`` (C,) (s·Hz,
    ``search.criteria.cell_sizes``). Summed over channels they are the totals the criterion
    scores a window from. A non-separable criterion (Gini) keeps the rows, ``(M, C, N)``."""
    if not criterion.separable:
        return np.asarray(images, dtype=np.float32)
    return criterion.row_stats(images) * np.asarray(cell, dtype=np.float64)[:, None]


def row_masses(images: np.ndarray) -> np.ndarray:
    """``(M, C, 2)`` float64: the negative mass Σ max(−S, 0) and the absolute mass Σ |S| of
    each (window, channel) row of ``images`` (M, C, N), summed over its samples. What the
    judgement pools per channel for a non-separable criterion, whose row stats are the images:
    summed over windows in window order they equal the sums over (windows, samples) of the
    whole stack, so it never has to hold one."""
    x = np.asarray(images, dtype=np.float64)
    return np.stack([np.maximum(-x, 0.0).sum(axis=2), np.abs(x).sum(axis=2)], axis=-1)


def scores_from_stats(stats: np.ndarray, criterion: Criterion, n_samples: int, cell: np.ndarray):
    """``(M,)`` per-window scores and ``(M,)`` negative shares from :func:`row_stats` output
    (summed over channels in channel order; for a non-separable criterion the images are scored
    whole by ``Criterion.score``)."""
    cell = np.asarray(cell, dtype=np.float64)
    if not criterion.separable:
        shares = np.nan_to_num(negative_share(stats, cell[:, None]), nan=0.0)
        return np.asarray(criterion.score(stats, cell[:, None]), dtype=np.float64), shares
    total = stats.sum(axis=1)
    return (criterion.scores_from_totals(total, stats.shape[1] * n_samples, float(np.mean(cell))),
            shares_from_totals(total))


def _score_task(token, windows, start, stop, fs, centers, sigma, area, beta, cell, criterion,
                eps, want_stats, one_plan=False):
    """Per-window criterion and negative share (and optionally row stats; for a non-separable
    criterion the rows' masses, :func:`row_masses`, not the images) of one filterbank on
    windows[start:stop]."""
    t0 = time.perf_counter()
    images = _transform_kept(_prepared(token, windows, start, stop),
                             make_filterbank(centers, sigma, area, beta, fs), eps, one_plan)
    stats = row_stats(images, criterion, cell)
    scores, shares = scores_from_stats(stats, criterion, images.shape[-1], cell)
    if want_stats and not criterion.separable:
        stats = row_masses(stats)
    return scores, shares, (stats if want_stats else None), time.perf_counter() - t0


def _spectrogram_task(token, windows, start, stop, fs, sigma, band, criterion, eps):
    """Per-window scores of the plain Gaussian spectrogram of time spread ``sigma`` (s) on its
    own FFT grid over ``band`` (search.spectrogram) on windows[start:stop]."""
    t0 = time.perf_counter()
    prepared = _prepared(token, windows, start, stop)
    scores = spectrogram_scores(prepared.analytic, fs, sigma, band, criterion, eps)
    return scores, time.perf_counter() - t0


def _stats_task(token, windows, start, stop, fs, centers, sigma, area, beta, cell, criterion, eps,
                one_plan=False):
    """Row stats of a (usually one-channel) filterbank on windows[start:stop]."""
    images = _transform_kept(_prepared(token, windows, start, stop),
                             make_filterbank(centers, sigma, area, beta, fs), eps, one_plan)
    return row_stats(images, criterion, cell)


# ---------------------------------------------------------------------------------------------
# Sharing the windows with workers once, and mapping tasks in a fixed order
# ---------------------------------------------------------------------------------------------

@dataclass
class Scored:
    """One filterbank scored on an evaluator's windows: per-window ``scores`` (n,), negative
    ``shares`` (n,), row ``stats`` (n, C, k) when asked for (:func:`row_stats`; for a
    non-separable criterion :func:`row_masses` (n, C, 2), so no image stack is held), and the
    work's ``seconds``."""

    scores: np.ndarray
    shares: np.ndarray
    stats: np.ndarray | None
    seconds: float


class Evaluator:
    """Scores filterbanks on fixed chunks of one window array, serially or through joblib.

    ``windows`` (n, N) float64; ``fs`` Hz; ``criterion`` a search.criteria.Criterion; ``eps``
    the kernel truncation; ``cell`` (C,) the cell areas (s·Hz) of the channel grid. The array is
    shared once: as a read-only memory map for process backends (joblib then pickles only the
    file reference), scattered to every Dask worker for the Dask backend, and as it is
    in-process. Results come back in chunk order whatever the backend. ``close()`` releases it.
    """

    def __init__(self, windows: np.ndarray, fs: float, criterion: Criterion, eps: float,
                 n_jobs: int, cell: np.ndarray, chunk: int = CHUNK):
        # joblib loads with the first Evaluator, not with the stages: the drift check and the
        # commands importing the judgement's constants never score
        from joblib import Parallel
        from joblib.parallel import get_active_backend

        self.fs, self.criterion, self.eps = float(fs), criterion, eps
        self.cell = np.asarray(cell, dtype=np.float64)    # (C,) cell areas of the channel grid
        self.n = len(windows)
        self.chunks = [(s, min(s + chunk, self.n)) for s in range(0, self.n, chunk)]
        self.token = uuid.uuid4().hex
        self._tmp = None
        self.parallel = None
        self.one_plan = False       # True where each task runs in a worker process of its own
        backend = get_active_backend()[0]
        kind = type(backend).__name__
        if kind == "DaskDistributedBackend":      # the cluster's workers, whatever n_jobs says
            self.parallel = Parallel(n_jobs=-1)
            self.shared = backend.client.scatter(np.ascontiguousarray(windows), broadcast=True,
                                                 hash=False)
        elif n_jobs == 1 or kind == "SequentialBackend":
            self.shared = windows
        else:
            self.parallel = Parallel(n_jobs=n_jobs)
            if kind in ("LokyBackend", "MultiprocessingBackend"):
                import joblib

                self._tmp = tempfile.mkdtemp(prefix="burstlens-windows-")
                path = os.path.join(self._tmp, "windows.npy")
                joblib.dump(np.ascontiguousarray(windows, dtype=np.float64), path)
                self.shared = joblib.load(path, mmap_mode="r")
                self.one_plan = True
            else:
                self.shared = windows
        if self.parallel is not None:
            self.parallel.__enter__()

    def _run(self, calls):
        if self.parallel is None:
            return [fn(*args) for fn, args in calls]
        from joblib import delayed

        return self.parallel(delayed(fn)(*args) for fn, args in calls)

    def score(self, params: list[tuple], want_stats: bool = False) -> list[Scored]:
        """Per-window scores of each whole-grid filterbank in ``params`` (tuples of per-channel
        arrays centers, sigma, area, beta), in window order."""
        calls = [(_score_task, (self.token, self.shared, s, e, self.fs, *p, self.cell,
                                self.criterion, self.eps, want_stats, self.one_plan))
                 for p in params for s, e in self.chunks]
        out = self._run(calls)
        k = len(self.chunks)
        results = []
        for i in range(len(params)):
            part = out[i * k:(i + 1) * k]
            results.append(Scored(np.concatenate([r[0] for r in part]),
                                  np.concatenate([r[1] for r in part]),
                                  np.concatenate([r[2] for r in part]) if want_stats else None,
                                  float(sum(r[3] for r in part))))
        return results

    def spectrogram(self, sigma: float, band) -> Scored:
        """The plain Gaussian spectrogram (time spread ``sigma`` s) scored on its own FFT grid
        over ``band`` (Hz), in window order; it has no negative values."""
        calls = [(_spectrogram_task, (self.token, self.shared, s, e, self.fs, float(sigma),
                                      [float(b) for b in band], self.criterion, self.eps))
                 for s, e in self.chunks]
        out = self._run(calls)
        scores = np.concatenate([r[0] for r in out])
        return Scored(scores, np.zeros_like(scores), None, float(sum(r[1] for r in out)))

    def stats(self, p: tuple, channels=None) -> np.ndarray:
        """Row stats ``(n, c, k)`` on all windows of the filterbank ``p`` (per-channel arrays)
        whose rows are the grid's ``channels`` (default: the whole grid)."""
        cell = self.cell if channels is None else self.cell[np.asarray(channels)]
        calls = [(_stats_task, (self.token, self.shared, s, e, self.fs, *p, cell, self.criterion,
                                self.eps, self.one_plan)) for s, e in self.chunks]
        return np.concatenate(self._run(calls))

    def close(self):
        if self.parallel is not None:
            self.parallel.__exit__(None, None, None)
            self.parallel = None
        _forget(self.token)
        if self._tmp:
            shutil.rmtree(self._tmp, ignore_errors=True)
            self._tmp = None
