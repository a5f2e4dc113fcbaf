"""The resumable state of one filterbank fit, typed, and its checkpoint layout.

:class:`SearchState` is what the stages of ``search.fit`` read and change, by attribute: the
phase to run next, the stage-1 subset, the convergence log, the fitted baselines
(:class:`Baselines`), the family search (:class:`FamilyState`, holding the scikit-optimize
``Optimizer`` itself) and the refinement (:class:`RefineState`).

A checkpoint is :meth:`SearchState.to_dict`: a dict in the layout of ``STATE_FORMAT`` version
``STATE_VERSION`` (plain dicts, lists and numbers, numpy arrays, the ``Optimizer`` and a
``search.diagnostics.ConvergenceLog``; it pickles). :meth:`SearchState.from_dict` reads that
layout back, and refuses anything else with a ``ValueError`` naming the field: another format,
another version (older or newer; the service's worker then starts the job over), a field
missing or of the wrong type.

Layout, version 3 (keys in this order; ``seconds`` and the refinement's ``steps`` only once
they hold something)::

    format, version, fingerprint (dict: corpus and settings the state belongs to),
    phase (baselines | family | refine | judge | done), round, elapsed_s, best, subset (indices
    into the fit windows), log, baselines {spectrogram?, scalogram?: {objective, evaluations,
    parameters}}, family (None | {optimizer, round, best_x, best_y, round_best, stall,
    stop_reason, pending_seeds}), refine (None | {start, params [σ_t, a, β: (C,) each], stats
    ((M, C, 4) or None), sweep, coord, objective, records {"<channel>": {channel, center_hz,
    status, objective_before, objective_after}}, changed_in_sweep, status, active, steps?}),
    stop_reason, seconds? ({stage: s})

Units: s, Hz, Hz/s; objectives in the criterion's units (bits for Rényi).
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field, fields
from typing import Any

import numpy as np

from burstlens.search.diagnostics import ConvergenceLog

STATE_FORMAT = "burstlens-search-state"
# 3: modules pickled in the state moved under the burstlens namespace (burstlens.search.…);
# 2: chirp signs as users see them. A state of another version is refused (ValueError), and the
# worker starts over instead of mixing two layouts.
STATE_VERSION = 3

# the phases in the order a run goes through them; ``phase`` names the next one to run
PHASES = ("baselines", "family", "refine", "judge", "done")

_NUMBER = (int, float)
_OPTIONAL_NUMBER = (int, float, type(None))
_OPTIONAL_STR = (str, type(None))


def _plain(record) -> dict:
    """A dataclass record as a dict of its fields, in field order (the values themselves, not
    copies: a checkpoint keeps the state's sharing of objects)."""
    return {f.name: getattr(record, f.name) for f in fields(record)}


def _fields(d, where: str, spec: dict) -> dict:
    """The values of ``spec``'s keys in the dict ``d``, each checked against its types;
    ``ValueError`` naming the field (``where`` + key) otherwise."""
    if not isinstance(d, dict):
        raise ValueError(f"resume_from: {where.rstrip('.') or 'the state'} is "
                         f"{type(d).__name__}, not a dict")
    out = {}
    for key, types in spec.items():
        if key not in d:
            raise ValueError(f"resume_from: {where}{key} is missing")
        value = d[key]
        # bool is an int to Python, never a count or an objective here
        if not isinstance(value, types) or (isinstance(value, bool) and bool not in types):
            raise ValueError(f"resume_from: {where}{key} is {type(value).__name__}, expected "
                             + " or ".join(t.__name__ for t in types))
        out[key] = value
    return out


@dataclass
class BaselineFit:
    """One fitted baseline (stage 0): its objective on the windows it was fitted on, the
    evaluations its 1-D search took, and its parameters as the diagnostics record them."""

    objective: float
    evaluations: int
    parameters: dict

    def to_dict(self) -> dict:
        return {"objective": self.objective, "evaluations": self.evaluations,
                "parameters": self.parameters}

    @classmethod
    def from_dict(cls, d, where: str) -> BaselineFit:
        return cls(**_fields(d, where, {"objective": _NUMBER, "evaluations": (int,),
                                        "parameters": (dict,)}))


@dataclass
class Baselines:
    """Stage 0's results: each baseline is None until its search ends (each resumes on its
    own)."""

    spectrogram: BaselineFit | None = None
    scalogram: BaselineFit | None = None

    @property
    def spectrogram_time_spread_s(self) -> float:
        """σ_t (s) of the best constant-window spectrogram."""
        return self.spectrogram.parameters["time_spread_s"]

    @property
    def scalogram_time_spread_s(self) -> float:
        """σ_t (s) of the best constant-Q scalogram at the reference frequency."""
        return self.scalogram.parameters["time_spread_at_reference_s"]

    def to_dict(self) -> dict:
        return {name: fit.to_dict() for name, fit in (("spectrogram", self.spectrogram),
                                                      ("scalogram", self.scalogram))
                if fit is not None}

    @classmethod
    def from_dict(cls, d, where: str) -> Baselines:
        _fields(d, where, {})
        unknown = sorted(set(d) - {"spectrogram", "scalogram"})
        if unknown:
            raise ValueError(f"resume_from: {where}{unknown[0]} is not a baseline")
        return cls(**{name: BaselineFit.from_dict(fit, f"{where}{name}.")
                      for name, fit in d.items()})


@dataclass
class FamilyState:
    """Stage 1, the family search: the scikit-optimize ``Optimizer`` (its GP, random state and
    initial design), the rounds done, the best point (family coordinates, ``SearchSpace.dims``
    order) and its objective on the subset, the best after each round, the rounds without
    improvement, why it stopped (None while running) and the seed points not yet scored."""

    optimizer: Any
    pending_seeds: list
    round: int = 0
    best_x: list | None = None
    best_y: float = math.inf
    round_best: list = field(default_factory=list)
    stall: int = 0
    stop_reason: str | None = None

    def to_dict(self) -> dict:
        return {"optimizer": self.optimizer, "round": self.round, "best_x": self.best_x,
                "best_y": self.best_y, "round_best": self.round_best, "stall": self.stall,
                "stop_reason": self.stop_reason, "pending_seeds": self.pending_seeds}

    @classmethod
    def from_dict(cls, d, where: str) -> FamilyState:
        return cls(**_fields(d, where, {
            "optimizer": (object,), "round": (int,), "best_x": (list, type(None)),
            "best_y": _NUMBER, "round_best": (list,), "stall": (int,),
            "stop_reason": _OPTIONAL_STR, "pending_seeds": (list,)}))


@dataclass
class ChannelRecord:
    """The refinement's record of one channel: ``status`` (improved | unchanged | skipped: …)
    and the objective before its first change and after its last."""

    channel: int
    center_hz: float
    status: str
    objective_before: float | None
    objective_after: float | None

    @classmethod
    def from_dict(cls, d, where: str) -> ChannelRecord:
        return cls(**_fields(d, where, {
            "channel": (int,), "center_hz": _NUMBER, "status": (str,),
            "objective_before": _OPTIONAL_NUMBER, "objective_after": _OPTIONAL_NUMBER}))


@dataclass
class RefineStep:
    """One applied refinement step: the coordinate and sweep, the combination chosen (greedy,
    full step, even or odd channels), the channels it moved and the objective after it."""

    coordinate: str
    sweep: int
    step: str
    channels: int
    objective: float

    @classmethod
    def from_dict(cls, d, where: str) -> RefineStep:
        return cls(**_fields(d, where, {"coordinate": (str,), "sweep": (int,), "step": (str,),
                                        "channels": (int,), "objective": _NUMBER}))


@dataclass
class RefineState:
    """Stage 2, the coordinate sweeps: where they started (family | spectrogram), the
    parameters ``params`` [σ_t (s), cell area, β (Hz/s)], each (C,), the per-row statistics
    ``stats`` (M, C, 4) on all fit windows (None when the criterion is not separable), the
    sweep and coordinate index to run next, the objective, per-channel records, the channels
    changed in this sweep, the status (running | converged | sweeps done | stopped: … |
    skipped: …), the channels refined (``active``) and the steps applied."""

    start: str
    params: list
    stats: np.ndarray | None
    status: str
    sweep: int = 0
    coord: int = 0
    objective: float | None = None
    records: dict[int, ChannelRecord] = field(default_factory=dict)
    changed_in_sweep: int = 0
    active: list[int] | None = None
    steps: list[RefineStep] = field(default_factory=list)

    def to_dict(self) -> dict:
        out = {"start": self.start, "params": self.params, "stats": self.stats,
               "sweep": self.sweep, "coord": self.coord, "objective": self.objective,
               "records": {str(c): _plain(r) for c, r in self.records.items()},
               "changed_in_sweep": self.changed_in_sweep, "status": self.status,
               "active": self.active}
        if self.steps:
            out["steps"] = [_plain(s) for s in self.steps]
        return out

    @classmethod
    def from_dict(cls, d, where: str) -> RefineState:
        values = _fields(d, where, {
            "start": (str,), "params": (list,), "stats": (np.ndarray, type(None)),
            "sweep": (int,), "coord": (int,), "objective": _OPTIONAL_NUMBER,
            "records": (dict,), "changed_in_sweep": (int,), "status": (str,),
            "active": (list, type(None))})
        records = {}
        for key, rec in values["records"].items():
            if not (isinstance(key, str) and key.isdigit()):
                raise ValueError(f"resume_from: {where}records key {key!r} is not a channel "
                                 "number")
            records[int(key)] = ChannelRecord.from_dict(rec, f"{where}records.{key}.")
        values["records"] = records
        steps = d.get("steps", [])
        if not isinstance(steps, list):
            raise ValueError(f"resume_from: {where}steps is {type(steps).__name__}, expected list")
        values["steps"] = [RefineStep.from_dict(s, f"{where}steps.{i}.")
                           for i, s in enumerate(steps)]
        return cls(**values)


@dataclass
class SearchState:
    """The resumable state of one fit (see the module docstring for the checkpoint layout).

    ``fingerprint``: the corpus and settings it belongs to (``RunContext.fingerprint``);
    ``subset``: indices into the fit windows of the stage-1 subset; ``phase``: the stage to
    run next (``PHASES``); ``round``: rounds done over all stages; ``elapsed_s``: run time
    before this attempt (s); ``best``: the current stage's best objective; ``log``: every
    evaluation; ``stop_reason``: why the run stopped (None while running); ``seconds``: time
    spent per stage (s).
    """

    fingerprint: dict
    subset: list[int]
    phase: str = "baselines"
    round: int = 0
    elapsed_s: float = 0.0
    best: float = math.inf
    log: ConvergenceLog = field(default_factory=ConvergenceLog)
    baselines: Baselines = field(default_factory=Baselines)
    family: FamilyState | None = None
    refine: RefineState | None = None
    stop_reason: str | None = None
    seconds: dict[str, float] = field(default_factory=dict)

    def to_dict(self) -> dict:
        """The checkpoint: this state in the layout of version ``STATE_VERSION``. Shares its
        objects with the state (the ``Optimizer``, the log, the arrays): copy it to keep it."""
        out = {"format": STATE_FORMAT, "version": STATE_VERSION,
               "fingerprint": self.fingerprint, "phase": self.phase, "round": self.round,
               "elapsed_s": self.elapsed_s, "best": self.best, "subset": self.subset,
               "log": self.log, "baselines": self.baselines.to_dict(),
               "family": None if self.family is None else self.family.to_dict(),
               "refine": None if self.refine is None else self.refine.to_dict(),
               "stop_reason": self.stop_reason}
        if self.seconds:
            out["seconds"] = self.seconds
        return out

    @classmethod
    def from_dict(cls, d) -> SearchState:
        """Read a checkpoint (:meth:`to_dict`'s layout; version 3 is the layout every
        checkpoint since the modules moved under ``burstlens`` has). ``ValueError`` when ``d``
        is not a search state, is of another version, or has a field missing or mistyped. The
        result shares ``d``'s objects."""
        if not isinstance(d, dict) or d.get("format") != STATE_FORMAT:
            raise ValueError("resume_from is not a burstlens search state")
        if d.get("version") != STATE_VERSION:
            raise ValueError(f"resume_from has state version {d.get('version')}, "
                             f"this code reads version {STATE_VERSION}")
        values = _fields(d, "", {
            "fingerprint": (dict,), "phase": (str,), "round": (int,), "elapsed_s": _NUMBER,
            "best": _NUMBER, "subset": (list,), "log": (ConvergenceLog,),
            "baselines": (dict,), "family": (dict, type(None)), "refine": (dict, type(None)),
            "stop_reason": _OPTIONAL_STR})
        if values["phase"] not in PHASES:
            raise ValueError(f"resume_from: phase {values['phase']!r} is not one of "
                             f"{', '.join(PHASES)}")
        seconds = d.get("seconds", {})
        if not isinstance(seconds, dict):
            raise ValueError(f"resume_from: seconds is {type(seconds).__name__}, expected dict")
        values.update(
            baselines=Baselines.from_dict(values["baselines"], "baselines."),
            family=None if values["family"] is None
            else FamilyState.from_dict(values["family"], "family."),
            refine=None if values["refine"] is None
            else RefineState.from_dict(values["refine"], "refine."),
            seconds=seconds)
        return cls(**values)
