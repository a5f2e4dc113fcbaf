"""The files a tuning hands on: ``filterbank.json``, ``diagnostics.json`` and the transform NPZ.

Every writer (``burstlens tune``, the service's worker) and every reader (the transform route and
command, the report, the result routes) goes through this module, so they agree on the keys.

- :class:`FilterbankDocument`: ``filterbank.json``, ``format`` "burstlens-filterbank",
  ``version`` 3 (docs/design.md §8). Top level: ``sampling_rate_hz``, ``steady_lines_hz``, what the engine recorded
  (``window_samples``, ``criterion``, ``objective``, ``gain_bits``, ``judged_on``,
  ``corpus_hash``, ``settings`` as the engine resolved them, ``burstlens_version``), from the
  service ``job`` {``id``, ``settings`` as submitted}, and ``channels``. Version 1 files are read
  by :meth:`search.filterbank.Filterbank.from_json` (chirp signs negated, noted in the
  provenance); their other keys are the same.
- :class:`DiagnosticsDocument`: ``diagnostics.json``, ``FilterbankSearch.diagnostics_``
  (DEVELOPERS.md lists its keys). It has no format version of its own (``version`` is the
  burstlens version that wrote it); ``typed`` reads it into the dataclasses of
  :mod:`search.diagnostics_doc` (schema 1, from before the held-out judgement, whose
  ``judgement`` then reads as None, and schema 2, today's).
- :func:`npz_members`: the arrays of the transform NPZ, for the route and the command alike.

A document keeps the JSON object as read or as it will be written (``data``) and writes only
that, so a written document has the bytes it always had and a read one loses no key; its
properties are typed readings of it (the diagnostics' through ``typed``). Properties return None
(or an empty dict) for a part the file lacks; only :attr:`FilterbankDocument.filterbank` and
:meth:`FilterbankDocument.read` check.
"""
from __future__ import annotations

import json
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from functools import cached_property
from typing import Any

import numpy as np

from burstlens.search.diagnostics_doc import Diagnostics
from burstlens.search.filterbank import FORMAT, VERSION, Filterbank
from burstlens.search.safe_io import finite_or_none
from burstlens.search.settings import CORPUS_OPTIONS, check_corpus_options

__all__ = ["FORMAT", "VERSION", "CARRIED_OPTIONS", "JobRecord", "FilterbankDocument",
           "DiagnosticsDocument", "Diagnostics", "encode", "npz_members", "CHANNEL_TABLE"]

# Corpus options a filterbank does not hand on to new files: its own rate and window length fix
# the first two, and the last two chose the tuning's sample of windows, not how windows are cut.
_NOT_CARRIED = ("sampling_rate_hz", "window_s", "max_windows", "seed")
# The corpus options new files are read with, as the tuning read its corpus (windowing,
# preprocessing, STA/LTA trigger), unless the caller overrides them.
CARRIED_OPTIONS = tuple(name for name in CORPUS_OPTIONS if name not in _NOT_CARRIED)


def encode(obj: Any, *, final_newline: bool = True) -> bytes:
    """The JSON encoding of every document: strict JSON (``allow_nan=False``), indent 1, UTF-8.

    ``final_newline``: the service's files end with a newline; ``burstlens tune`` has always
    written its files without one, and keeps doing so (its output stays byte-identical).
    """
    text = json.dumps(obj, indent=1, allow_nan=False)
    return (text + "\n" if final_newline else text).encode("utf-8")


@dataclass(frozen=True)
class JobRecord:
    """The service job that made a filterbank: its ``id`` and its ``settings`` as submitted
    (job settings of docs/design.md §7, only the keys the client set)."""

    id: str | None
    settings: dict

    def to_json(self) -> dict:
        return {"id": self.id, "settings": self.settings}


@dataclass(frozen=True)
class FilterbankDocument:
    """``filterbank.json`` (see the module docstring); ``data`` is the JSON object."""

    data: Mapping[str, Any]

    # -- writing and reading ---------------------------------------------------------------
    @classmethod
    def of(cls, filterbank: Filterbank, job: JobRecord | None = None) -> FilterbankDocument:
        """The document of a fitted filterbank: its provenance, plus ``job`` when a service job
        made it (``FilterbankSearch.filterbank_.to_json(job=...)``, key order included)."""
        extra = {} if job is None else {"job": job.to_json()}
        return cls(filterbank.to_json(**extra))

    @classmethod
    def read(cls, obj) -> FilterbankDocument:
        """A document read from JSON, checked: the channels (any supported version) and the
        corpus options its job recorded. ``ValueError`` names the field."""
        if not isinstance(obj, Mapping):
            raise ValueError(f"filterbank JSON must be an object, got {type(obj).__name__}")
        document = cls(obj)
        _ = document.filterbank, document.corpus_options  # parsed now: a bad file fails here
        return document

    @classmethod
    def loads(cls, text: str | bytes) -> FilterbankDocument:
        """:meth:`read` of JSON text; text that is not JSON is a ``ValueError`` too."""
        try:
            obj = json.loads(text)
        except ValueError as exc:
            raise ValueError(f"not JSON ({exc})") from None
        return cls.read(obj)

    def to_json(self) -> dict:
        return dict(self.data)

    def encode(self, *, final_newline: bool = True) -> bytes:
        return encode(self.data, final_newline=final_newline)

    # -- the filterbank ---------------------------------------------------------------------
    @cached_property
    def filterbank(self) -> Filterbank:
        """The channels as a :class:`Filterbank` (versions 3, 2 and 1; ``ValueError`` naming the
        field when the file is not a filterbank)."""
        return Filterbank.from_json(self.data)

    @property
    def version(self):
        """The file's format version as written (3; 2 without steady lines, or 1 for files read
        with converted signs)."""
        return self.data.get("version")

    @property
    def channels(self) -> list:
        """The channel entries as written (dicts; see ``Channel.to_json``), [] when absent."""
        channels = self.data.get("channels")
        return channels if isinstance(channels, list) else []

    @property
    def sampling_rate_hz(self) -> float | None:
        value = self.data.get("sampling_rate_hz")
        return float(value) if isinstance(value, (int, float)) and not isinstance(value, bool) \
            else None

    @property
    def window_samples(self) -> int | float | None:
        """Samples per window of the tuning corpus, when recorded as a positive number."""
        value = self.data.get("window_samples")
        if isinstance(value, (int, float)) and not isinstance(value, bool) and value > 0:
            return value
        return None

    @property
    def window_s(self) -> float | None:
        """Window length of the tuning corpus, s (``window_samples`` / fs)."""
        samples, fs = self.window_samples, self.sampling_rate_hz
        return None if samples is None or not fs else float(samples) / fs

    # -- what the tuning recorded -----------------------------------------------------------
    @property
    def criterion(self):
        """The criterion as recorded: a dict (``name``, ``alpha``, ...) or a name; None if absent."""
        return self.data.get("criterion")

    @property
    def objective(self) -> float | None:
        """The result's corpus objective (bits for Rényi; lower is sharper)."""
        return finite_or_none(self.data.get("objective"))

    @property
    def gain_bits(self) -> float | None:
        """Gain over the best spectrogram, bits (judged on held-out windows when recorded so)."""
        return finite_or_none(self.data.get("gain_bits"))

    @property
    def corpus_hash(self) -> str | None:
        value = self.data.get("corpus_hash")
        return value if isinstance(value, str) else None

    @property
    def tuning_settings(self) -> Mapping:
        """Every setting of the run as the engine resolved it (``settings``); {} when absent."""
        settings = self.data.get("settings")
        return settings if isinstance(settings, Mapping) else {}

    @property
    def job(self) -> JobRecord | None:
        """The service job that made the filterbank, or None (e.g. ``burstlens tune``)."""
        job = self.data.get("job")
        if not isinstance(job, Mapping) or not isinstance(job.get("settings"), Mapping):
            return None
        return JobRecord(job.get("id"), dict(job["settings"]))

    @property
    def job_settings(self) -> dict | None:
        """The job's settings as submitted (what a person set), None without a job record."""
        job = self.job
        return None if job is None else job.settings

    @property
    def corpus_options(self) -> dict:
        """The corpus options of :data:`CARRIED_OPTIONS` the tuning set (from the job's
        settings), checked; {} when none is recorded. ``ValueError`` names a bad one."""
        given = self.job_settings or {}
        carried = {k: given[k] for k in CARRIED_OPTIONS if given.get(k) is not None}
        try:
            return check_corpus_options(carried)
        except ValueError as exc:
            raise ValueError(f"job.settings: {exc}") from None

    def reading_options(self, upload_options: Mapping | None = None) -> dict:
        """``read_corpus`` options that cut new files as the tuning cut its corpus: the
        filterbank's rate and window length, then the carried corpus options.

        ``upload_options``: the service corpus's own reading options (``read_options`` of its
        upload), which the job's settings override, as the worker merged them. Options the
        caller gives for the new files go on top of the result.
        """
        read: dict = {"sampling_rate_hz": float(self.filterbank.sampling_rate_hz)}
        if self.window_s is not None:
            read["window_s"] = self.window_s
        upload = {k: v for k, v in (upload_options or {}).items() if k in CARRIED_OPTIONS}
        read.update(check_corpus_options({**upload, **self.corpus_options}))
        return read


@dataclass(frozen=True)
class DiagnosticsDocument:
    """``diagnostics.json`` (see the module docstring); ``data`` is the JSON object, ``typed`` its
    reading as :class:`search.diagnostics_doc.Diagnostics` (what every reader uses)."""

    data: Mapping[str, Any]

    def to_json(self) -> dict:
        return dict(self.data)

    def encode(self, *, final_newline: bool = True) -> bytes:
        return encode(self.data, final_newline=final_newline)

    @cached_property
    def typed(self) -> Diagnostics:
        """The document as typed records (``Diagnostics.from_json(data)``); ``ValueError`` when
        ``data`` is not a JSON object."""
        return Diagnostics.from_json(self.data)

    @property
    def version(self) -> str | None:
        """The burstlens version that wrote the file."""
        return self.typed.version

    @property
    def stop_reason(self) -> str | None:
        return self.typed.stop_reason

    @property
    def judgement(self) -> Mapping | None:
        """The held-out judgement as recorded; None for a cancelled run or a file from before it
        existed (``typed.judgement`` is its typed reading)."""
        judged = self.typed.judgement
        return None if judged is None else judged.source

    @property
    def result(self) -> Mapping:
        """The result's objective and interval (``objective``, ``low``, ``high``); {} if absent."""
        result = self.typed.result
        return {} if result is None else result.source

    @property
    def objective(self) -> float | None:
        result = self.typed.result
        return None if result is None else result.objective

    @property
    def gain_bits(self) -> float | None:
        """Gain over the best spectrogram, bits (the judgement's estimate when judged)."""
        return self.typed.gain_bits

    @property
    def evaluations(self) -> list:
        """Every stage-1 and stage-2 evaluation ({``stage``, ``round``, ``params``,
        ``objective``, ``seconds``}) as recorded, [] when absent."""
        return [e.source for e in self.typed.evaluations]

    @property
    def settings(self) -> Mapping:
        """Every setting of the run as the engine resolved it; {} when absent."""
        return self.typed.settings.source

    @property
    def corpus(self) -> Mapping:
        """The corpus summary (``Corpus.to_json()``); {} when absent."""
        return self.typed.corpus.source

    @property
    def reader_defaults(self) -> Mapping | None:
        """Every choice the corpus reader made (``corpus.defaults``, with ``given``: the
        options the caller set); None when not recorded."""
        return self.typed.corpus.defaults

    @property
    def windowing(self) -> str | None:
        """How the tuning corpus was cut (``bursts``, ``whole``, ``sliding``), as the reader
        recorded it."""
        return self.typed.corpus.windowing


# ---------------------------------------------------------------------------------------------
# The transform NPZ
# ---------------------------------------------------------------------------------------------

# The channel table of the NPZ: one (C,) float64 array per Filterbank property.
CHANNEL_TABLE = ("center_hz", "time_spread_s", "freq_spread_hz", "cell_area", "chirp_hz_per_s",
                 "correlation")


def npz_members(representation, filterbank: Filterbank, window_meta,
                file_name: Callable[[str], str] = str) -> dict[str, np.ndarray]:
    """The arrays of the transform NPZ (docs/design.md §8), plain arrays only (no object arrays, so
    ``np.load`` never needs ``allow_pickle``), in the order they are written:

    - ``representation`` (M, C, N) float32: the filterbank image of each window;
    - ``times_s`` (N,) float64: sample times within a window, s (n / fs);
    - ``center_hz``, ``time_spread_s``, ``freq_spread_hz``, ``cell_area``, ``chirp_hz_per_s``,
      ``correlation`` (C,) float64: the channel table;
    - ``sampling_rate_hz`` () float64;
    - per window, (M,): ``window_file`` and ``window_trace_id`` (unicode), ``window_offset_s``
      (float64, s from the start of its trace; NaN when the reader recorded none).

    ``window_meta``: ``Corpus.window_meta`` (one dict per window; None gives empty entries);
    ``file_name`` maps the reader's file name to the one shown (the service's client names).
    """
    representation = np.asarray(representation, dtype=np.float32)
    fs = float(filterbank.sampling_rate_hz)
    n = representation.shape[-1]
    meta = list(window_meta) if window_meta is not None else [{}] * representation.shape[0]
    members = {"representation": representation,
               "times_s": np.arange(n, dtype=np.float64) / fs}
    for name in CHANNEL_TABLE:
        members[name] = np.asarray(getattr(filterbank, name), dtype=np.float64)
    members["sampling_rate_hz"] = np.float64(fs)
    members["window_file"] = np.array([file_name(str(w.get("file", ""))) for w in meta],
                                      dtype=np.str_)
    members["window_trace_id"] = np.array([str(w.get("trace_id", "")) for w in meta],
                                          dtype=np.str_)
    members["window_offset_s"] = np.array([float(w.get("offset_s", np.nan)) for w in meta],
                                          dtype=np.float64)
    return members
