"""FilterbankSearch: fit a Gaussian-smoothed Wigner–Ville filterbank to a corpus (docs/design.md §5).

The estimator resolves the settings, splits the windows (``search.split``), bounds the chirp
rate on the fit windows (``search.sweeps``) and runs the stages of ``search.fit`` in order on
one :class:`~search.fit.context.RunContext`:

0. ``search.fit.baselines``: the best constant-window spectrogram (a = 1, β = 0, one σ_t for
   all channels) and the best constant-Q Gaussian scalogram (σ_t ∝ 1/f_c, a = 1), by 1-D
   searches on the fit windows; both seed stage 1.
1. ``search.fit.family``: a Gaussian-process search (scikit-optimize) over the family
   σ_t(f) = σ_ref·(f/f_ref)^q, a(f) = a0, β(f) = β0, scored on a seeded subset of the fit
   windows.
2. ``search.fit.refine``: per-channel coordinate sweeps over (log σ_t, log a, β) by bounded
   Brent on all fit windows, each trial rescored by replacing one (window, channel) row of the
   per-row statistics, plus a smoothness penalty.
3. ``search.fit.judge``: the result and the baselines scored on the held-out windows, the gain
   over the best spectrogram with a paired bootstrap interval, the fallback to the best
   spectrogram window on the grid when the result scores worse there, parameter stability
   intervals, and the diagnostics record.

Every score is a criterion of ``search.criteria`` on the t–f plane (cell sizes of the grid);
a candidate whose mean negative share exceeds ``max_negative_share`` scores +inf. The state
after every round is a picklable checkpoint; resuming from it ends with the filterbank of an
uninterrupted run. Scores do not depend on ``jobs`` or the joblib backend
(``search.fit.evaluate``).
"""
from __future__ import annotations

import time

import numpy as np

from burstlens.search.fit import baselines, family, judge, refine
from burstlens.search.fit.context import Cancelled, RunContext
from burstlens.search.fit.evaluate import CHUNK
from burstlens.search.fit.space import SearchSpace
from burstlens.search.noise import site_lines
from burstlens.search.settings import SEARCH_KEYS, JobSettings
from burstlens.search.split import held_out_split
from burstlens.search.sweeps import sweep_rate_bound
from burstlens.search.tfd import transform

# the stages before the judgement, in order, by the state's phase name
STAGES = (("baselines", baselines.run), ("family", family.run), ("refine", refine.run))
# the defaults of the job settings, the one source of the keyword defaults below
_DEFAULT = JobSettings()


class FilterbankSearch:
    """Unsupervised filterbank fit (docs/design.md §5), scikit-learn style.

    Parameters (settings of docs/design.md §7; defaults and checks in
    ``search.settings.JobSettings``; :meth:`from_settings` builds the search from one):
    ``channels``, ``band_hz`` ([lo, hi] Hz; default [fs/100, 0.45 fs]), ``spacing`` (log|linear),
    ``criterion`` (name or dict: name, alpha, p, measure, negative_mass_penalty, reduce),
    ``cell_area`` ([min, max]), ``chirp``, ``refine``, ``evaluations`` (stage-1 budget: filterbanks
    scored on the subset), ``time_limit_s``, ``bootstrap`` (resamples; 0 for none), ``seed``,
    ``jobs`` (candidates scored at once, one process each; -1: every core), ``subset`` (windows
    in the stage-1 subset), ``compare_to`` (the user's own
    spectrogram, e.g. ``"hann:256:128"``, scored in the scorecard: ``search.compare``), ``guard``
    (True: fall back to the best spectrogram when the result detects or picks worse on the fit
    windows, ``search.fit.judge.pipeline_guard``). Tuning knobs (recorded too):
    ``batch`` points per round, ``initial_points`` of the Latin-hypercube design (default
    2·dims + 2), ``stall_rounds``/``stall_tol``, ``refine_sweeps``, ``refine_maxiter`` (Brent
    iterations per coordinate), ``refine_min_share`` (channels whose mean share of the image mass
    is below this fraction of 1/C are left as they are), ``smoothness`` (weight of the
    second-difference penalty, bits), ``eps`` (kernel truncation, docs/design.md §3).

    Learned attributes: ``filterbank_`` (search.filterbank.Filterbank), ``diagnostics_``
    (JSON-ready dict, keys in DEVELOPERS.md), ``objective_`` (bits on the grid for Rényi).

    Example: twelve 256-sample windows at 1 kHz, each a Gaussian burst at 100 Hz (time spread
    7 ms) at a random onset in light noise; a quick fit of 8 channels (4 family evaluations,
    no refinement, no bootstrap) and the images of two windows, (M, C, N):

    >>> import numpy as np
    >>> from burstlens.search.corpus import Corpus
    >>> fs, n, m = 1000.0, 256, 12
    >>> rng = np.random.default_rng(0)
    >>> u = np.arange(n) / fs - rng.uniform(0.08, 0.16, (m, 1))
    >>> windows = (np.exp(-(u / 0.01) ** 2) * np.cos(2 * np.pi * 100 * u)
    ...            + 0.01 * rng.standard_normal((m, n)))
    >>> meta = [{"file": "made up", "trace_id": "XX.DOC..HHZ", "start": None,
    ...          "offset_s": 0.5 * i} for i in range(m)]
    >>> corpus = Corpus(windows, fs, meta, [], [], {}, "made up")
    >>> search = FilterbankSearch(channels=8, evaluations=4, refine=False, bootstrap=0)
    >>> len(search.fit(corpus).filterbank_.channels)
    8
    >>> search.transform(windows[:2]).shape
    (2, 8, 256)
    """

    def __init__(self, channels=_DEFAULT.channels, band_hz=_DEFAULT.band_hz,
                 spacing=_DEFAULT.spacing, criterion=None, cell_area=_DEFAULT.cell_area,
                 chirp=_DEFAULT.chirp, refine=_DEFAULT.refine, evaluations=_DEFAULT.evaluations,
                 time_limit_s=_DEFAULT.time_limit_s, bootstrap=_DEFAULT.bootstrap,
                 seed=_DEFAULT.seed, jobs=_DEFAULT.jobs, subset=_DEFAULT.subset, batch=4,
                 initial_points=None, stall_rounds=3, stall_tol=1e-3, refine_sweeps=1,
                 refine_maxiter=2, refine_min_share=0.1, smoothness=1.0, eps=1e-6,
                 max_negative_share=_DEFAULT.max_negative_share, held_out=_DEFAULT.held_out,
                 compare_to=_DEFAULT.compare_to, guard=_DEFAULT.guard):
        self.channels = channels
        self.band_hz = band_hz
        self.spacing = spacing
        self.criterion = criterion
        self.cell_area = cell_area
        self.chirp = chirp
        self.refine = refine
        self.evaluations = evaluations
        self.time_limit_s = time_limit_s
        self.bootstrap = bootstrap
        self.seed = seed
        self.jobs = jobs
        self.subset = subset
        self.batch = batch
        self.initial_points = initial_points
        self.stall_rounds = stall_rounds
        self.stall_tol = stall_tol
        self.refine_sweeps = refine_sweeps
        self.refine_maxiter = refine_maxiter
        self.refine_min_share = refine_min_share
        self.smoothness = smoothness
        self.eps = eps
        self.max_negative_share = max_negative_share
        self.held_out = held_out
        self.compare_to = compare_to
        self.guard = guard

    @classmethod
    def from_settings(cls, settings: JobSettings, **tuning) -> FilterbankSearch:
        """The search of checked job settings (``search.settings.JobSettings``; its corpus
        options are the reader's, not the search's), with ``tuning`` knobs (``batch``, ``eps``,
        ...) as keywords."""
        return cls(**settings.search_options(), **tuning)

    # -- settings ---------------------------------------------------------------------------

    def _resolve(self, corpus) -> dict:
        settings = JobSettings.from_mapping({name: getattr(self, name) for name in SEARCH_KEYS})
        windows = np.asarray(corpus.windows)
        if windows.ndim != 2 or windows.shape[0] < 1:
            raise ValueError(f"corpus.windows must be a non-empty (M, N) array, got shape {windows.shape}")
        if not np.all(np.isfinite(windows)):
            raise ValueError("corpus.windows holds NaN or Inf samples")
        s = settings.resolve(corpus.sampling_rate_hz, windows.shape[1])
        for name, value, ok in (("batch", self.batch, isinstance(self.batch, int) and self.batch >= 1),
                                ("initial_points", self.initial_points,
                                 self.initial_points is None or (isinstance(self.initial_points, int)
                                                                 and self.initial_points >= 1)),
                                ("stall_rounds", self.stall_rounds,
                                 isinstance(self.stall_rounds, int) and self.stall_rounds >= 1),
                                ("stall_tol", self.stall_tol, self.stall_tol >= 0),
                                ("refine_sweeps", self.refine_sweeps,
                                 isinstance(self.refine_sweeps, int) and self.refine_sweeps >= 1),
                                ("refine_maxiter", self.refine_maxiter,
                                 isinstance(self.refine_maxiter, int) and self.refine_maxiter >= 1),
                                ("refine_min_share", self.refine_min_share, self.refine_min_share >= 0),
                                ("smoothness", self.smoothness, self.smoothness >= 0),
                                ("eps", self.eps, 0 < self.eps < 1)):
            if not ok:
                raise ValueError(f"setting {name!r} = {value!r} is out of range")
        n_dims = 2 + (s["cell_area"][1] > s["cell_area"][0]) + bool(s["chirp"])
        s.update(batch=self.batch, stall_rounds=self.stall_rounds, stall_tol=self.stall_tol,
                 initial_points=min(s["evaluations"], self.initial_points or 2 * n_dims + 2),
                 refine_sweeps=self.refine_sweeps, refine_maxiter=self.refine_maxiter,
                 refine_min_share=self.refine_min_share, smoothness=self.smoothness, eps=self.eps,
                 subset=min(s["subset"], windows.shape[0]), chunk_windows=CHUNK,
                 family_reference="geometric mean of band_hz" if s["spacing"] == "log"
                 else "midpoint of band_hz")
        return s

    # -- public API -------------------------------------------------------------------------

    def fit(self, corpus, *, progress=None, checkpoint=None, resume_from=None, should_stop=None):
        """Fit the filterbank to ``corpus`` (search.corpus.Corpus or any object with
        ``windows`` (M, N), ``sampling_rate_hz``, ``rejections``, ``source_hash``, ``to_json()``).

        ``progress(dict)`` is called after every round with ``stage`` (baselines | family |
        refine | judge), ``round``, ``evaluations`` (stage-1 evaluations done) of ``budget``,
        ``evaluations_total``, ``best_objective`` and ``fraction`` (0–1, never decreasing).

        ``checkpoint(state)`` gets, after every round, a snapshot dict that pickles
        (``search.fit.state.SearchState.to_dict``, layout ``STATE_VERSION``): the
        scikit-optimize ``Optimizer`` itself (its GP, its random state and its initial design),
        the refinement state (parameters and the ``(M, C, 4)`` row sums), the baselines, the
        convergence log and the elapsed time. Every other random choice is derived from
        ``seed`` (the subset is stored as indices), so ``fit(corpus, resume_from=state)`` on the
        same corpus and settings ends with exactly the filterbank of an uninterrupted run (any
        ``jobs`` or backend); another corpus or other settings raise ``ValueError``, as does a
        dict that is not a search state or is of another state version (the worker then starts
        over).

        ``should_stop()`` returning True cancels at the next check (stop reason ``cancelled``;
        ``filterbank_`` is the best so far and the judgement is skipped). ``time_limit_s`` stops
        the family search and the refinement (stop reason ``time_limit``); the baselines and
        the judgement always run, since the gain needs them. Returns self.
        """
        settings = self._resolve(corpus)
        windows = np.asarray(corpus.windows)
        split = held_out_split(getattr(corpus, "window_meta", None), len(windows),
                               settings["window_s"], settings["held_out"], settings["seed"])
        lines = site_lines(corpus)
        if settings["chirp"]:
            # the bound is part of the search space: found on the fit windows only, without
            # the site's steady lines
            fit = lines.remove(windows[split.fit], settings["sampling_rate_hz"])
            found = sweep_rate_bound(fit, settings["sampling_rate_hz"], settings["band_hz"])
            settings.update(chirp_bound_hz_per_s=float(found["chirp_bound_hz_per_s"]),
                            chirp_bound_source=found["source"])
        ctx = RunContext(corpus, settings, SearchSpace.from_settings(settings), split, progress,
                         checkpoint, should_stop, lines)
        try:
            ctx.start(resume_from)
            self._run(ctx)
        finally:
            ctx.close()
        return self

    def _run(self, ctx) -> None:
        """The stages from the state's phase on, then the judgement (always: a cancelled run
        still gets its record and its best filterbank so far)."""
        try:
            for phase, stage in STAGES:
                if ctx.state.phase == phase:
                    t0 = time.perf_counter()
                    try:
                        stage(ctx)
                    finally:
                        spent = ctx.state.seconds
                        spent[phase] = spent.get(phase, 0.0) + time.perf_counter() - t0
        except Cancelled:
            ctx.state.stop_reason = "cancelled"
        t0 = time.perf_counter()
        self.filterbank_, self.diagnostics_, self.objective_ = judge.run(ctx)
        self.diagnostics_["stage_seconds"] = {**ctx.state.seconds,
                                              "judge": time.perf_counter() - t0}

    def transform(self, windows):
        """Apply the fitted filterbank: ``(M, N)`` windows -> ``(M, C, N)`` float32 images."""
        if not hasattr(self, "filterbank_"):
            raise ValueError("FilterbankSearch is not fitted yet: call fit(corpus) first")
        return transform(windows, self.filterbank_, eps=self.eps)
