"""One run of ``FilterbankSearch.fit``: what every stage shares.

:class:`RunContext` holds the resolved settings ``s``, the :class:`~search.fit.space.SearchSpace`,
the held-out split, the site's steady lines (``lines``, search.noise) and the windows with them
removed (``all_windows`` (M, N) float64; ``windows``, the fit windows stages 0–2 see;
``noise_windows`` (K, N), the corpus's noise sample), the criterion, the evaluators
(created on first use, closed by :meth:`close`) and the resumable ``state``
(:class:`~search.fit.state.SearchState`) that is checkpointed after every round, as the dict of
:meth:`~search.fit.state.SearchState.to_dict`. Each stage module (baselines, family, refine,
judge) is a function of it.
"""
from __future__ import annotations

import copy
import time

import numpy as np

from burstlens.search.criteria import ceiling_objective
from burstlens.search.fit.evaluate import Evaluator, make_criterion
from burstlens.search.fit.state import SearchState
from burstlens.search.noise import site_lines
from burstlens.search.safe_io import finite_or_none


class Cancelled(Exception):
    """Raised inside a stage when ``should_stop()`` says so; the run then goes to the record."""


class RunContext:
    """Settings, windows, state and callbacks of one fit (see the module docstring)."""

    # share of the progress fraction each stage reports in
    STAGE_SPAN = {"baselines": (0.0, 0.1), "family": (0.1, 0.55), "refine": (0.55, 0.9),
                  "judge": (0.9, 1.0)}

    def __init__(self, corpus, settings, space, split, progress, checkpoint, should_stop,
                 lines=None):
        self.corpus, self.s, self.space, self.split = corpus, settings, space, split
        self.progress_cb, self.checkpoint_cb, self.should_stop = progress, checkpoint, should_stop
        # the site's steady lines leave every window before anything is scored (search.noise)
        self.lines = site_lines(corpus) if lines is None else lines
        fs = corpus.sampling_rate_hz
        self.all_windows = np.ascontiguousarray(self.lines.remove(corpus.windows, fs))
        noise = getattr(corpus, "noise_windows", None)
        self.noise_windows = np.ascontiguousarray(self.lines.remove(
            np.zeros((0, self.all_windows.shape[1])) if noise is None else noise, fs))
        # stages 0–2 see only the fit windows; the judgement sees only the held-out ones
        self.windows = self.all_windows[self.split.fit]
        self.spec = settings["criterion"]
        if self.spec["name"] == "detection" and len(self.noise_windows) == 0:
            raise ValueError("criterion 'detection' needs the site's noise windows (quiet "
                             "stretches between triggers), and this corpus has none ('whole' or "
                             "'sliding' windows, or no trigger-free stretch): use 'renyi'")
        self.how = self.spec["reduce"]
        self.criterion = make_criterion(self.spec)
        self.t_start = time.perf_counter()
        self.full = None
        self.sub = None
        self.held = None
        self.state: SearchState | None = None

    # -- the resumable state ----------------------------------------------------------------

    def fingerprint(self) -> dict:
        s = {k: v for k, v in self.s.items() if k not in ("time_limit_s", "jobs")}
        return {"source_hash": getattr(self.corpus, "source_hash", None),
                "windows": list(self.all_windows.shape), "settings": s,
                "checksum": float(np.sum(self.all_windows[:, ::7])),
                "held_out": self.split.held_out.tolist()}

    def new_state(self) -> SearchState:
        """A fresh state: phase ``baselines``, the stage-1 subset drawn from ``seed``."""
        m = len(self.windows)
        rng = np.random.default_rng(np.random.SeedSequence([self.s["seed"], 1]))
        subset = np.sort(rng.choice(m, size=self.s["subset"], replace=False)) if self.s["subset"] < m \
            else np.arange(m)
        return SearchState(fingerprint=self.fingerprint(), subset=subset.tolist())

    def start(self, resume_from) -> None:
        """Set ``state``: a fresh one, or a copy of the checkpoint dict ``resume_from``
        (``SearchState.from_dict``) after checking that it was taken on this corpus with these
        settings (``ValueError`` otherwise, as for another format or version)."""
        if resume_from is None:
            self.state = self.new_state()
            return
        state = SearchState.from_dict(resume_from)
        if state.fingerprint != self.fingerprint():
            raise ValueError("resume_from was taken on a different corpus or different settings")
        self.state = copy.deepcopy(state)

    # -- time, cancel, progress -------------------------------------------------------------

    def elapsed(self) -> float:
        return self.state.elapsed_s + (time.perf_counter() - self.t_start)

    def out_of_time(self) -> bool:
        limit = self.s["time_limit_s"]
        return limit is not None and self.elapsed() >= limit

    def cancelled(self) -> bool:
        return bool(self.should_stop and self.should_stop())

    def check_cancel(self):
        if self.cancelled():
            raise Cancelled()

    def report(self, stage: str, fraction_in_stage: float, save: bool = True, **extra):
        """Progress message for ``stage`` (and a checkpoint of the state unless ``save`` is
        False)."""
        lo, hi = self.STAGE_SPAN[stage]
        st = self.state
        msg = {"stage": stage, "round": st.round, "evaluations": st.log.count("family"),
               "evaluations_total": st.log.count(),
               "budget": self.s["evaluations"], "best_objective": finite_or_none(st.best),
               "fraction": float(lo + (hi - lo) * min(max(fraction_in_stage, 0.0), 1.0))}
        msg.update(extra)
        if self.progress_cb:
            self.progress_cb(msg)
        if self.checkpoint_cb and save:
            snap = copy.deepcopy(self.state.to_dict())
            snap["elapsed_s"] = self.elapsed()
            self.checkpoint_cb(snap)

    # -- scoring ----------------------------------------------------------------------------

    def evaluator(self, which: str) -> Evaluator:
        """``full``: all fit windows; ``subset``: the stage-1 subset of them; ``held``: the
        held-out windows."""
        def make(windows):
            return Evaluator(windows, self.space.fs, self.criterion, self.s["eps"], self.s["jobs"],
                             self.space.cell)
        if which == "full":
            if self.full is None:
                self.full = make(self.windows)
            return self.full
        if which == "held":
            if self.held is None:
                self.held = make(self.all_windows[self.split.held_out])
            return self.held
        if self.sub is None:
            self.sub = make(self.windows[np.asarray(self.state.subset, dtype=np.int64)])
        return self.sub

    def ceiling(self, scores, shares):
        """Corpus objective of per-window scores and negative shares, (M,) → float or (M, n) →
        (n,): the reduced scores, +inf above ``max_negative_share``
        (``search.criteria.ceiling_objective``)."""
        return ceiling_objective(scores, shares, self.how, self.s["max_negative_share"])

    def close(self):
        for ev in (self.full, self.sub, self.held):
            if ev is not None:
                ev.close()
