"""``diagnostics.json`` as typed records: :class:`Diagnostics` and its parts.

``FilterbankSearch.diagnostics_`` (search/fit/judge.py builds it; DEVELOPERS.md lists its keys)
is read here once, by :meth:`Diagnostics.from_json`, into frozen dataclasses; the report, the
verdict and the command-line summaries read those fields and never test the JSON themselves.
What a file lacks, or records as null or as a value of the wrong kind, becomes None, an empty
tuple or an empty record here, in this one place.

Schema (the file carries no format version of its own; ``version`` is the burstlens version
that wrote it), told apart by shape:

- schema 1, before the held-out judgement: no ``judgement`` key (it reads as None, as does
  everything judged: onset, scorecard, negative shares, bounds); ``per_window`` may lack
  ``windows`` (its scores are then in corpus order); baselines may lack ``negative_share``.
- schema 2 (today): ``judgement`` present, null for a cancelled run (``stop_reason``
  ``cancelled``, which also nulls ``result``, ``baselines``, ``bootstrap``, ``gain_bits`` and
  ``per_window``).

:meth:`to_json` of every record gives back the JSON object it was read from, unchanged (keys the
records do not type included), so ``search.documents.encode(d.to_json())`` is the file's bytes.

Conventions: numbers are finite floats or None (NaN, ±inf, booleans and strings read None);
counts are ints or None; intervals are ``(low, high)`` pairs in the parameter's units.
"""
from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Any

__all__ = ["SCHEMA", "Interval", "Gain", "Estimate", "NegativeShare", "BoundDetail",
           "OnsetSummary", "Onset", "ScorecardRepresentation", "Scorecard", "Judgement",
           "Baseline", "ChannelInterval", "Bootstrap", "PerWindow", "WindowCounts", "Fallback",
           "Evaluation", "BestSoFar", "RefinementRecord", "RunSettings", "CorpusRecord",
           "Diagnostics"]

SCHEMA = 2  # the newest shape read (module docstring)

_EMPTY: Mapping[str, Any] = MappingProxyType({})  # read-only: shared by every empty part


def _real(value) -> float | None:
    """A finite JSON number as float; None for anything else (booleans included)."""
    if isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value):
        return float(value)
    return None


def _number(value) -> int | float | None:
    """A finite JSON number as recorded (an int stays an int, as it is shown); else None."""
    return value if _real(value) is not None else None


def _count(value) -> int | None:
    """An int (not a boolean); None for anything else."""
    return value if isinstance(value, int) and not isinstance(value, bool) else None


def _text(value) -> str | None:
    return value if isinstance(value, str) else None


def _flag(value) -> bool | None:
    return value if isinstance(value, bool) else None


def _object(value) -> Mapping[str, Any]:
    """A JSON object as read; {} for anything else."""
    return value if isinstance(value, Mapping) else _EMPTY


def _array(value) -> list:
    """A JSON array as read; [] for anything else."""
    return value if isinstance(value, list) else []


def _pair(value) -> tuple[float | None, float | None] | None:
    """A recorded [low, high]: its two ends (None where not a finite number); None if not a pair."""
    if isinstance(value, (list, tuple)) and len(value) == 2:
        return _real(value[0]), _real(value[1])
    return None


@dataclass(frozen=True)
class _Record:
    """A typed reading of one JSON object; ``to_json`` gives the object back as read."""

    source: Mapping[str, Any] = field(default_factory=dict, repr=False, compare=False)

    def to_json(self) -> dict:
        return dict(self.source)


@dataclass(frozen=True)
class Interval(_Record):
    """A corpus objective (criterion units: bits for Rényi, lower is sharper) with its percentile
    bootstrap interval: ``{"objective", "low", "high"}``."""

    objective: float | None = None
    low: float | None = None
    high: float | None = None

    @classmethod
    def from_json(cls, obj) -> Interval:
        o = _object(obj)
        return cls(o, _real(o.get("objective")), _real(o.get("low")), _real(o.get("high")))


@dataclass(frozen=True)
class Gain(_Record):
    """The paired-bootstrap gain over the best plain spectrogram, bits (> 0: sharper):
    ``{"estimate", "low", "high", "level", "resamples"}``."""

    estimate: float | None = None
    low: float | None = None
    high: float | None = None
    level: float | None = None
    resamples: int | None = None

    @classmethod
    def from_json(cls, obj) -> Gain:
        o = _object(obj)
        return cls(o, _real(o.get("estimate")), _real(o.get("low")), _real(o.get("high")),
                   _real(o.get("level")), _count(o.get("resamples")))


@dataclass(frozen=True)
class Estimate(_Record):
    """One scorecard difference against the best plain spectrogram: ``{"estimate", "low",
    "high"}`` (the row's unit: dB, ms or bits)."""

    estimate: float | None = None
    low: float | None = None
    high: float | None = None

    @classmethod
    def from_json(cls, obj) -> Estimate | None:
        """None when ``obj`` is not an object or is empty (nothing was measured)."""
        if not isinstance(obj, Mapping) or not obj:
            return None
        return cls(obj, _real(obj.get("estimate")), _real(obj.get("low")), _real(obj.get("high")))


@dataclass(frozen=True)
class NegativeShare(_Record):
    """Share of the judged images' absolute mass below zero: ``overall`` (mean over windows),
    ``per_channel`` (C,) and the ceiling the search allowed (``max_allowed``), all 0–1."""

    overall: float | None = None
    per_channel: tuple[float | None, ...] = ()
    max_allowed: float | None = None

    @classmethod
    def from_json(cls, obj) -> NegativeShare:
        o = _object(obj)
        return cls(o, _real(o.get("overall")),
                   tuple(_real(v) for v in _array(o.get("per_channel"))),
                   _real(o.get("max_allowed")))


@dataclass(frozen=True)
class BoundDetail(_Record):
    """A setting whose bound the result sits on: ``setting``, ``bound`` ("lower", "upper" or
    words), the bound's ``value`` and the ``channels`` (indices) on it."""

    setting: str | None = None
    bound: str | None = None
    value: float | None = None
    channels: tuple[int, ...] = ()

    @classmethod
    def from_json(cls, obj) -> BoundDetail:
        o = _object(obj)
        setting, bound = o.get("setting"), o.get("bound")
        return cls(o, str(setting) if setting else None, str(bound) if bound else None,
                   _real(o.get("value")),
                   tuple(c for c in _array(o.get("channels")) if _count(c) is not None))


@dataclass(frozen=True)
class OnsetSummary(_Record):
    """AIC onset error against the trigger onsets, ms: ``median_ms``, ``p90_ms`` over
    ``windows`` bursts."""

    median_ms: float | None = None
    p90_ms: float | None = None
    windows: int | None = None

    @classmethod
    def from_json(cls, obj) -> OnsetSummary:
        o = _object(obj)
        return cls(o, _real(o.get("median_ms")), _real(o.get("p90_ms")), _count(o.get("windows")))


@dataclass(frozen=True)
class Onset(_Record):
    """Onset timing of the result and of the best plain spectrogram (``judgement.onset``)."""

    result: OnsetSummary = OnsetSummary()
    spectrogram: OnsetSummary = OnsetSummary()

    @classmethod
    def from_json(cls, obj) -> Onset | None:
        """None when not measured (no trigger offsets: null in the file)."""
        if not isinstance(obj, Mapping):
            return None
        return cls(obj, OnsetSummary.from_json(obj.get("result")),
                   OnsetSummary.from_json(obj.get("spectrogram")))


@dataclass(frozen=True)
class ScorecardRepresentation(_Record):
    """One scorecard column (the result, the best plain spectrogram, the user's own, the raw
    envelope): burst sharpness (bits), onset error median / p90 (ms), detection threshold (dB)."""

    sharpness_bits: float | None = None
    onset_median_ms: float | None = None
    onset_p90_ms: float | None = None
    detection_threshold_db: float | None = None
    description: str | None = None

    @classmethod
    def from_json(cls, obj) -> ScorecardRepresentation:
        o = _object(obj)
        return cls(o, _real(o.get("sharpness_bits")), _real(o.get("onset_median_ms")),
                   _real(o.get("onset_p90_ms")), _real(o.get("detection_threshold_db")),
                   _text(o.get("description")))


@dataclass(frozen=True)
class Scorecard(_Record):
    """``judgement.scorecard`` (search.scorecard): per representation its values, and per row
    (``sharpness_bits``, ``onset_ms``, ``detection_db``) each representation's paired
    difference against the best plain spectrogram; a row is None when not measured (e.g.
    ``detection_db`` without noise windows). ``method``: the engine's words per measurement."""

    representations: Mapping[str, ScorecardRepresentation] = field(default_factory=dict)
    rows: Mapping[str, Mapping[str, Estimate | None] | None] = field(default_factory=dict)
    method: Mapping[str, Any] = field(default_factory=dict)

    @classmethod
    def from_json(cls, obj) -> Scorecard | None:
        """None when the file has no scorecard (runs from before it)."""
        if not isinstance(obj, Mapping):
            return None
        reps = {str(k): ScorecardRepresentation.from_json(v)
                for k, v in _object(obj.get("representations")).items() if isinstance(v, Mapping)}
        rows = {str(k): ({str(n): Estimate.from_json(e) for n, e in v.items()}
                         if isinstance(v, Mapping) else None)
                for k, v in _object(obj.get("rows")).items()}
        return cls(obj, reps, rows, _object(obj.get("method")))

    def row(self, row: str, name: str) -> Estimate | None:
        """The ``row`` difference of representation ``name``, None when not recorded."""
        return (self.rows.get(row) or {}).get(name)


@dataclass(frozen=True)
class Judgement(_Record):
    """The held-out judgement (``diagnostics['judgement']``, docs/design.md §8): how windows were
    split, the gain over the best plain spectrogram, the result's and the spectrogram's
    objectives, negative shares, bounds hit, onset timing and the scorecard."""

    in_sample: bool | None = None
    held_out_share: int | float | None = None
    held_out_windows: int | None = None
    fit_windows: int | None = None
    guard_windows: int | None = None
    grouping: str | None = None
    gain_bits: Gain = Gain()
    result: Interval = Interval()
    spectrogram: Interval = Interval()
    negative_share: NegativeShare = NegativeShare()
    bounds_hit: tuple[str, ...] = ()
    bounds_detail: tuple[BoundDetail, ...] = ()
    onset: Onset | None = None
    scorecard: Scorecard | None = None

    @classmethod
    def from_json(cls, obj) -> Judgement | None:
        """None when there is no judgement (a cancelled run, or schema 1)."""
        if not isinstance(obj, Mapping):
            return None
        return cls(
            obj, _flag(obj.get("in_sample")), _number(obj.get("held_out_share")),
            _count(obj.get("held_out_windows")), _count(obj.get("fit_windows")),
            _count(obj.get("guard_windows")), _text(obj.get("grouping")),
            Gain.from_json(obj.get("gain_bits")), Interval.from_json(obj.get("result")),
            Interval.from_json(obj.get("spectrogram")),
            NegativeShare.from_json(obj.get("negative_share")),
            tuple(str(s) for s in _array(obj.get("bounds_hit"))),
            tuple(BoundDetail.from_json(d) for d in _array(obj.get("bounds_detail"))
                  if isinstance(d, Mapping)),
            Onset.from_json(obj.get("onset")), Scorecard.from_json(obj.get("scorecard")))


@dataclass(frozen=True)
class Baseline(_Record):
    """A reference representation judged beside the result: its objective and interval on the
    judged windows, its objective on the fit windows (None when only judged, not fitted), its
    negative share, its ``parameters`` as the engine recorded them (they differ per baseline:
    ``time_spread_s`` and ``window_samples`` for the spectrogram, ``cycles`` for the scalogram)
    and the evaluations its fit took."""

    objective: float | None = None
    low: float | None = None
    high: float | None = None
    objective_fit: float | None = None
    negative_share: float | None = None
    parameters: Mapping[str, Any] = field(default_factory=dict)
    evaluations: int | None = None

    @classmethod
    def from_json(cls, obj) -> Baseline:
        o = _object(obj)
        return cls(o, _real(o.get("objective")), _real(o.get("low")), _real(o.get("high")),
                   _real(o.get("objective_fit")), _real(o.get("negative_share")),
                   _object(o.get("parameters")), _count(o.get("evaluations")))

    @property
    def time_spread_s(self) -> float | None:
        """The baseline's kernel time spread σ_t, s (spectrogram baselines)."""
        return _real(self.parameters.get("time_spread_s"))

    @property
    def window_samples(self) -> int | None:
        """Length of the spectrogram's window, samples."""
        return _count(self.parameters.get("window_samples"))

    @property
    def cycles(self) -> float | None:
        """Cycles per wavelet of the scalogram."""
        return _real(self.parameters.get("cycles"))


@dataclass(frozen=True)
class ChannelInterval(_Record):
    """One channel's parameter stability interval (``bootstrap.channels[c]``): [low, high] of
    ``time_spread_s`` (s), ``cell_area`` and ``chirp_hz_per_s`` (Hz/s), how it was found
    (``method``) and whether the estimate lies within its refits (``at_optimum``)."""

    time_spread_s: tuple[float | None, float | None] | None = None
    cell_area: tuple[float | None, float | None] | None = None
    chirp_hz_per_s: tuple[float | None, float | None] | None = None
    method: str | None = None
    at_optimum: bool | None = None

    @classmethod
    def from_json(cls, obj) -> ChannelInterval | None:
        if not isinstance(obj, Mapping):
            return None
        return cls(obj, _pair(obj.get("time_spread_s")), _pair(obj.get("cell_area")),
                   _pair(obj.get("chirp_hz_per_s")), _text(obj.get("method")),
                   _flag(obj.get("at_optimum")))


@dataclass(frozen=True)
class Bootstrap(_Record):
    """Parameter stability intervals (``bootstrap``): ``resamples`` of the fit windows and one
    entry per channel (None for an entry the file does not record), or None when the criterion
    gave none."""

    resamples: int | None = None
    channels: tuple[ChannelInterval | None, ...] | None = None

    @classmethod
    def from_json(cls, obj) -> Bootstrap | None:
        if not isinstance(obj, Mapping):
            return None
        channels = obj.get("channels")
        return cls(obj, _count(obj.get("resamples")),
                   tuple(ChannelInterval.from_json(c) for c in channels)
                   if isinstance(channels, list) else None)


@dataclass(frozen=True)
class PerWindow(_Record):
    """Per-window scores of the judged windows (criterion units): the result's and the best
    plain spectrogram's, and their corpus indices (``windows``; None in schema 1, where the
    scores are in corpus order). A score that is not finite reads None."""

    result: tuple[float | None, ...] = ()
    spectrogram: tuple[float | None, ...] = ()
    windows: tuple[int, ...] | None = None

    @classmethod
    def from_json(cls, obj) -> PerWindow:
        o = _object(obj)
        where = o.get("windows")
        return cls(o, tuple(_real(v) for v in _array(o.get("result"))),
                   tuple(_real(v) for v in _array(o.get("spectrogram"))),
                   None if where is None else tuple(i for i in _array(where) if _count(i) is not None))


def _count_or_length(value) -> int | None:
    if isinstance(value, list):
        return len(value)
    return _count(value)


@dataclass(frozen=True)
class WindowCounts(_Record):
    """``windows``: how many corpus windows the run used and rejected (a list counts its
    items), and the rejections by reason."""

    used: int | None = None
    rejected: int | None = None
    rejected_by_reason: Mapping[str, Any] = field(default_factory=dict)

    @classmethod
    def from_json(cls, obj) -> WindowCounts:
        o = _object(obj)
        return cls(o, _count_or_length(o.get("used")), _count_or_length(o.get("rejected")),
                   _object(o.get("rejected_by_reason")))


@dataclass(frozen=True)
class Fallback(_Record):
    """Why the best plain spectrogram was returned instead of the searched filterbank: to what
    (``to``), from which origin (``from_origin``) and the ``reason`` in words."""

    to: str | None = None
    from_origin: str | None = None
    reason: str | None = None

    @classmethod
    def from_json(cls, obj) -> Fallback | None:
        if not isinstance(obj, Mapping):
            return None
        reason = obj.get("reason")
        return cls(obj, _text(obj.get("to")), _text(obj.get("from")),
                   str(reason) if reason else None)


@dataclass(frozen=True)
class Evaluation(_Record):
    """One scored candidate: ``stage``, ``round``, ``params``, ``objective`` (None when the
    candidate was invalid) and ``seconds``."""

    stage: str = ""
    round: int | None = None
    params: Mapping[str, Any] = field(default_factory=dict)
    objective: float | None = None
    seconds: float | None = None

    @classmethod
    def from_json(cls, obj) -> Evaluation:
        o = _object(obj)
        return cls(o, str(o.get("stage", "")), _count(o.get("round")), _object(o.get("params")),
                   _real(o.get("objective")), _real(o.get("seconds")))


@dataclass(frozen=True)
class BestSoFar(_Record):
    """A stage's best improving: at ``evaluation`` (0-based index into the evaluations)."""

    evaluation: int | None = None
    stage: str = ""
    objective: float | None = None

    @classmethod
    def from_json(cls, obj) -> BestSoFar:
        o = _object(obj)
        return cls(o, _count(o.get("evaluation")), str(o.get("stage", "")),
                   _real(o.get("objective")))


@dataclass(frozen=True)
class RefinementRecord(_Record):
    """The refinement's record of one channel (kept for every channel): its centre (Hz), its
    status and its objective before and after."""

    channel: int | None = None
    center_hz: float | None = None
    status: str | None = None
    objective_before: float | None = None
    objective_after: float | None = None

    @classmethod
    def from_json(cls, obj) -> RefinementRecord:
        o = _object(obj)
        return cls(o, _count(o.get("channel")), _real(o.get("center_hz")), _text(o.get("status")),
                   _real(o.get("objective_before")), _real(o.get("objective_after")))


@dataclass(frozen=True)
class RunSettings(_Record):
    """Every setting of the run as the engine resolved it (``settings``; ``to_json`` has them
    all) and the ones the readers need, typed: the rate (Hz), the criterion (a dict with
    ``name``, or a name), the user's own spectrogram (``compare_to``), the positivity ceiling,
    the sweep-rate bound (Hz/s) and the channel spacing."""

    sampling_rate_hz: float | None = None
    criterion: Mapping[str, Any] | str | None = None
    compare_to: str | None = None
    max_negative_share: float | None = None
    chirp_bound_hz_per_s: float | None = None
    spacing: str | None = None

    @classmethod
    def from_json(cls, obj) -> RunSettings:
        o = _object(obj)
        criterion = o.get("criterion")
        return cls(o, _real(o.get("sampling_rate_hz")),
                   criterion if isinstance(criterion, (Mapping, str)) else None,
                   _text(o.get("compare_to")) or None, _real(o.get("max_negative_share")),
                   _real(o.get("chirp_bound_hz_per_s")), _text(o.get("spacing")) or None)

    @property
    def criterion_name(self) -> str | None:
        name = self.criterion.get("name") if isinstance(self.criterion, Mapping) else self.criterion
        return name if isinstance(name, str) else None


@dataclass(frozen=True)
class CorpusRecord(_Record):
    """The corpus summary (``Corpus.to_json()``; ``to_json`` has every key): the files and
    trace segments read, the rejections, each window's metadata (``window_meta``: file, trace
    id, start, offset, trigger offset) and every choice the reader made (``defaults``, with
    ``given``: the options the caller set)."""

    source_hash: str | None = None
    files: tuple | None = None
    traces: tuple[Mapping[str, Any], ...] = ()
    rejections: tuple | None = None
    window_meta: tuple | None = None
    defaults: Mapping[str, Any] | None = None

    @classmethod
    def from_json(cls, obj) -> CorpusRecord:
        o = _object(obj)
        files, rejections, meta, defaults = (o.get(k) for k in ("files", "rejections",
                                                                "window_meta", "defaults"))
        return cls(o, _text(o.get("source_hash")) or None,
                   tuple(files) if isinstance(files, list) else None,
                   tuple(t for t in _array(o.get("traces")) if isinstance(t, Mapping)),
                   tuple(rejections) if isinstance(rejections, list) else None,
                   tuple(meta) if isinstance(meta, list) else None,
                   defaults if isinstance(defaults, Mapping) else None)

    @property
    def windowing(self) -> str | None:
        """How the corpus was cut (``bursts``, ``whole``, ``sliding``), as the reader recorded."""
        return _text((self.defaults or {}).get("windowing"))

    def meta_of(self, index: int) -> Mapping[str, Any]:
        """The metadata of corpus window ``index``; {} when not recorded."""
        meta = self.window_meta or ()
        return _object(meta[index]) if 0 <= index < len(meta) else _EMPTY


@dataclass(frozen=True)
class Diagnostics(_Record):
    """``diagnostics.json`` read into typed parts (module docstring). ``schema``: 1 or 2, from
    the shape. Parts a file lacks read None (``judgement``, ``result``, ``bootstrap``,
    ``fallback``, ``gain_bits``, ...) or empty (``baselines``, ``evaluations``, ``settings``,
    ``corpus``, ``windows``, ``per_window``)."""

    schema: int = SCHEMA
    stop_reason: str | None = None
    evaluations: tuple[Evaluation, ...] = ()
    best_so_far: tuple[BestSoFar, ...] = ()
    refinement: tuple[RefinementRecord, ...] = ()
    judgement: Judgement | None = None
    result: Interval | None = None
    baselines: Mapping[str, Baseline] = field(default_factory=dict)
    gain_bits: float | None = None
    per_window: PerWindow = PerWindow()
    bootstrap: Bootstrap | None = None
    fallback: Fallback | None = None
    origin: str | None = None
    windows: WindowCounts = WindowCounts()
    corpus: CorpusRecord = CorpusRecord()
    settings: RunSettings = RunSettings()
    seed: int | None = None
    elapsed_s: float | None = None
    version: str | None = None

    @classmethod
    def from_json(cls, obj) -> Diagnostics:
        """Read a diagnostics object of schema 1 or 2 (module docstring). ``ValueError`` when
        ``obj`` is not a JSON object."""
        if not isinstance(obj, Mapping):
            raise ValueError(f"diagnostics: expected a JSON object, got {type(obj).__name__}")
        result = obj.get("result")
        return cls(
            obj, 2 if "judgement" in obj else 1, _text(obj.get("stop_reason")),
            tuple(Evaluation.from_json(e) for e in _array(obj.get("evaluations"))),
            tuple(BestSoFar.from_json(b) for b in _array(obj.get("best_so_far"))),
            tuple(RefinementRecord.from_json(r) for r in _array(obj.get("refinement"))),
            Judgement.from_json(obj.get("judgement")),
            Interval.from_json(result) if isinstance(result, Mapping) and result else None,
            {str(k): Baseline.from_json(v) for k, v in _object(obj.get("baselines")).items()},
            _real(obj.get("gain_bits")), PerWindow.from_json(obj.get("per_window")),
            Bootstrap.from_json(obj.get("bootstrap")), Fallback.from_json(obj.get("fallback")),
            _text(obj.get("origin")), WindowCounts.from_json(obj.get("windows")),
            CorpusRecord.from_json(obj.get("corpus")), RunSettings.from_json(obj.get("settings")),
            _count(obj.get("seed")), _real(obj.get("elapsed_s")), _text(obj.get("version")))

    @classmethod
    def of(cls, diagnostics) -> Diagnostics:
        """``diagnostics`` as typed: a :class:`Diagnostics` as it is, a JSON object read by
        :meth:`from_json`, None as a run that records nothing (schema 1, every part missing)."""
        if isinstance(diagnostics, Diagnostics):
            return diagnostics
        return cls.from_json(_EMPTY if diagnostics is None else diagnostics)

    @property
    def cancelled(self) -> bool:
        return self.stop_reason == "cancelled"

    @property
    def in_sample(self) -> bool:
        """True when the judgement was made on the fitted windows (none held out)."""
        return self.judgement is not None and self.judgement.in_sample is True

    @property
    def channel_centres(self) -> tuple[float, ...] | None:
        """Each channel's centre frequency (Hz) in channel order, from the refinement's
        per-channel record (kept for every channel); None when any is not recorded."""
        centres = tuple(r.center_hz for r in self.refinement)
        return centres if centres and None not in centres else None

    @property
    def spectrogram(self) -> Baseline | None:
        """The best plain spectrogram baseline, None when not recorded."""
        return self.baselines.get("spectrogram")
