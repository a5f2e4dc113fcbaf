"""Job settings: :class:`JobSettings`, their one set of names, defaults and checks.

A job's settings (docs/design.md §7, the CLI flags of §9 in snake_case) mix options for reading the
corpus (every ``read_corpus`` keyword, defined once in :data:`CORPUS_OPTIONS`) with options for
the search. The CLI (``service.commands.options.settings_from_args``), the API
(``service.models.JobSettings.to_settings``) and Python callers build one frozen
:class:`JobSettings` (``JobSettings.from_mapping(dict)``); its ``read_options()`` go to
``read_corpus`` and its ``search_options()`` to ``FilterbankSearch``, under the same names
(``jobs`` included). Every check here raises ``ValueError`` naming the setting, the value and
the cause, so an HTTP 422 or a CLI exit 2 can show the message as it is.

Checks that need the corpus (the band against the Nyquist frequency, time spreads against the
window length) live in :meth:`JobSettings.resolve`, which ``FilterbankSearch.fit`` calls; it
also fills the data-dependent defaults and returns every value the run will use, for the record.
The criteria's names and defaults are ``search.criteria_options``'s.
"""
from __future__ import annotations

import math
import numbers
import re
from collections.abc import Mapping
from dataclasses import dataclass, field, fields, replace
from importlib import import_module

from burstlens.search.criteria_options import (CRITERIA, CRITERION_DEFAULTS, REDUCERS,
                                               SPARSITY_MEASURES)


def _reader(name: str):
    """A constant of the corpus reader, looked up on use: importing ``search.corpus`` loads
    scipy.signal (over a second), which the CLI's start and corpus-free checks should not pay."""
    return getattr(import_module("burstlens.search.corpus.ingest"), name)


@dataclass(frozen=True)
class CorpusOption:
    """One ``read_corpus`` option, defined once for the job settings, the CLI flags and the
    upload form fields: the same name, default, help and check everywhere.

    ``kind``: ``positive`` (finite number > 0), ``share`` (number in [0, 1)), ``integer``
    (``minimum``..``maximum``), ``choice`` (one of the reader's constant ``choices_from``),
    ``band`` ([low, high] Hz, 0 ≤ low < high) or ``codes`` (SEED orientation letters).
    ``reader_default``: the default is the reader's, its ``ReadOptions`` field of the same name
    (``search.corpus.ingest``); without it the default is ``default_words`` (the reader chooses
    it, usually from the data). ``flag`` is the CLI flag
    when it is not ``--name-with-dashes``.
    """

    name: str
    kind: str
    help: str
    reader_default: bool = False
    default_words: str = "chosen from the data"
    choices_from: str | None = None
    minimum: int | None = None
    maximum: float | None = None
    flag: str | None = None

    @property
    def cli_flag(self) -> str:
        return self.flag or "--" + self.name.replace("_", "-")

    @property
    def default(self):
        """The reader's default value, or None when the reader chooses it (from the data)."""
        return getattr(_reader("ReadOptions"), self.name) if self.reader_default else None

    @property
    def choices(self) -> tuple:
        return tuple(_reader(self.choices_from)) if self.kind == "choice" else ()

    def default_text(self) -> str:
        if not self.reader_default:
            return self.default_words
        value = self.default
        return f"{value:g}" if isinstance(value, float) else str(value)

    def sentence(self) -> str:
        """The help as a sentence with the default, for the API's documents."""
        return f"{self.help[:1].upper()}{self.help[1:]} (default {self.default_text()})."

    def bounds(self) -> dict:
        """Numeric bounds as pydantic / annotated-types keywords (``gt``, ``ge``, ``lt``, ``le``)."""
        if self.kind == "positive":
            out = {"gt": 0}
        elif self.kind == "share":
            out = {"ge": 0, "lt": 1}
        elif self.kind == "integer":
            out = {"ge": self.minimum}
        else:
            return {}
        if self.maximum is not None:
            out["le"] = self.maximum
        return out

    def check(self, value):
        """The checked value (normalised: floats, upper-case codes, a [low, high] list), or
        ``ValueError`` naming the setting."""
        name = self.name
        if self.kind == "positive":
            value = _real(name, value, positive=True)
        elif self.kind == "share":
            value = _real(name, value, nonnegative=True)
            if value >= 1:
                _fail(name, value, "is a share of the window, below 1")
        elif self.kind == "integer":
            value = _int(name, value, minimum=self.minimum)
        elif self.kind == "choice":
            if value not in self.choices:
                _fail(name, value, f"choose one of {', '.join(self.choices)}")
        elif self.kind == "band":
            lo, hi = _pair(name, value)
            if lo < 0 or hi <= lo:
                _fail(name, value, "need 0 ≤ low < high (low 0 is a low-pass)")
            value = [lo, hi]
        elif self.kind == "codes":
            letters = list(value) if isinstance(value, (str, list, tuple)) else None
            if not letters or not all(isinstance(c, str) and len(c) == 1 and c.isalnum()
                                      for c in letters):
                _fail(name, value, "expected SEED orientation codes, e.g. 'Z' or 'ZNE'")
            value = "".join(letters).upper()
        if self.maximum is not None and value > self.maximum:
            _fail(name, value, f"must be at most {self.maximum:g}")
        return value

    def parse(self, text: str):
        """The value of an upload form field (text) before :meth:`check`; a band is ``LO,HI``
        (``[LO, HI]`` and spaces are accepted too)."""
        text = text.strip()
        try:
            if self.kind in ("positive", "share"):
                return float(text)
            if self.kind == "integer":
                return int(text)
            if self.kind == "band":
                return [float(v) for v in re.split(r"[\s,;]+", text.strip("[]() ").strip()) if v]
        except ValueError:
            _fail(self.name, text, "expected a number" if self.kind != "band" else
                  "expected two numbers LO,HI in Hz")
        return text


_OPTIONS = (
    CorpusOption("windowing", "choice", "how windows are cut: STA/LTA bursts, whole traces "
                 "(event files) or sliding windows", default_words="bursts",
                 choices_from="WINDOWINGS"),
    CorpusOption("window_s", "positive", "window length, s", maximum=60.0,
                 default_words="from the burst durations the trigger finds"),
    CorpusOption("max_windows", "integer", "cap on windows; a seeded subsample is kept",
                 reader_default=True, minimum=1, maximum=1_000_000),
    CorpusOption("seed", "integer", "seed of the window subsample, the held-out split and the "
                 "search", reader_default=True, minimum=0, maximum=2**32 - 1),
    CorpusOption("sampling_rate_hz", "positive", "common sampling rate, Hz; other rates are "
                 "resampled", default_words="the most common native rate",
                 flag="--sampling-rate"),
    CorpusOption("components", "codes", "SEED orientation codes to keep, e.g. Z or ZNE",
                 default_words="all"),
    CorpusOption("bandpass_hz", "band", "zero-phase band-pass [low, high], Hz (low 0: "
                 "low-pass)", default_words="none", flag="--bandpass"),
    CorpusOption("csv_sampling_rate_hz", "positive", "declared sampling rate of files that "
                 "carry none (CSV, .npy, .npz), Hz", default_words="none",
                 flag="--csv-sampling-rate"),
    CorpusOption("sta_s", "positive", "STA length, s",
                 default_words="a few dominant periods of the data"),
    CorpusOption("lta_s", "positive", "LTA length, s", default_words="a multiple of the STA"),
    CorpusOption("trigger_on", "positive", "STA/LTA threshold that starts a trigger",
                 reader_default=True),
    CorpusOption("trigger_off", "positive", "STA/LTA threshold that ends a trigger, at most "
                 "trigger_on", reader_default=True),
    CorpusOption("pre_trigger", "share", "share of a burst window before its trigger, in [0, 1)",
                 reader_default=True),
    CorpusOption("trigger", "choice", "STA/LTA kind", reader_default=True,
                 choices_from="TRIGGERS"),
    CorpusOption("hop_s", "positive", "hop of sliding windows, s", default_words="half a window"),
)
# name -> definition, in the order of read_corpus's keywords
CORPUS_OPTIONS: dict[str, CorpusOption] = {o.name: o for o in _OPTIONS}

CORPUS_KEYS = tuple(CORPUS_OPTIONS)
MAX_HELD_OUT = 0.9
SPACINGS = ("log", "linear")


@dataclass(frozen=True)
class JobSettings:
    """The settings of one filterbank search (docs/design.md §7), each default written here once
    and every value checked once, in :meth:`__post_init__` (so a settings object is valid
    however it was made); a bad one raises ``ValueError`` naming the setting, the value and the
    cause (``setting 'channels' = 1: must be at least 2``).

    Build it with :meth:`from_mapping` from the JSON settings of ``POST /v1/jobs`` or the CLI
    flags (``service.commands.options.settings_from_args``). ``corpus`` holds the corpus options
    given (:data:`CORPUS_OPTIONS`; ``seed`` among them when it was given, since the seed also
    draws the reader's subsample): the keywords for ``read_corpus``, the rest left to the
    reader's own defaults (or an upload's recorded options). ``band_hz`` None is
    [fs/100, 0.45 fs] once the corpus is known (:meth:`resolve`), above DC drift and below the
    anti-alias roll-off.
    """

    channels: int = 96
    band_hz: tuple[float, float] | None = None
    spacing: str = "log"
    criterion: dict = field(default_factory=lambda: dict(CRITERION_DEFAULTS))
    cell_area: tuple[float, float] = (0.25, 4.0)
    chirp: bool = True
    refine: bool = True
    evaluations: int = 24         # stage-1 family evaluations; meets the time targets in bench/
    time_limit_s: float | None = None   # no time limit
    bootstrap: int = 8
    seed: int = 0
    jobs: int = 1                 # candidate filterbanks scored at once; -1: every core
    subset: int = 64              # windows scoring the stage-1 family search
    max_negative_share: float = 0.01  # positivity ceiling: share of the image's absolute mass
    held_out: float = 0.25        # share of windows kept out of the fit and used to judge it
    compare_to: str | None = None  # the user's own spectrogram, scored in the scorecard
    guard: bool = True            # fall back to the best spectrogram when the result detects or
                                  # picks worse on the fit windows (search.fit.judge.pipeline_guard)
    corpus: dict = field(default_factory=dict)

    def __post_init__(self):
        def put(name, value):
            object.__setattr__(self, name, value)

        put("channels", _int("channels", self.channels, minimum=2))
        if self.band_hz is not None:
            lo, hi = _pair("band_hz", self.band_hz)
            if lo <= 0:
                _fail("band_hz", self.band_hz, "the low edge must be above 0 Hz")
            if hi <= lo:
                _fail("band_hz", self.band_hz, "the high edge must be above the low edge")
            put("band_hz", (lo, hi))
        if self.spacing not in SPACINGS:
            _fail("spacing", self.spacing, f"choose one of {', '.join(SPACINGS)}")
        put("criterion", normalize_criterion(self.criterion))
        lo, hi = _pair("cell_area", self.cell_area)
        if lo <= 0:
            _fail("cell_area", self.cell_area, "the minimum must be positive")
        if lo > hi:
            _fail("cell_area", self.cell_area, f"the minimum {lo:g} is greater than the maximum {hi:g}")
        put("cell_area", (lo, hi))
        for name in ("chirp", "guard", "refine"):
            _bool(name, getattr(self, name))
        put("evaluations", _int("evaluations", self.evaluations, minimum=1))
        if self.time_limit_s is not None:
            put("time_limit_s", _real("time_limit_s", self.time_limit_s, positive=True))
        put("bootstrap", _int("bootstrap", self.bootstrap, minimum=0))
        if self.bootstrap == 1:
            _fail("bootstrap", 1, "use 0 (no intervals) or at least 2 resamples")
        if not isinstance(self.corpus, Mapping):
            _fail("corpus", self.corpus, "must be a mapping of corpus options")
        put("corpus", check_corpus_options(dict(self.corpus)))
        put("seed", CORPUS_OPTIONS["seed"].check(self.seed))
        put("jobs", _int("jobs", self.jobs, minimum=1, allow=(-1,)))
        put("subset", _int("subset", self.subset, minimum=1))
        put("max_negative_share", _real("max_negative_share", self.max_negative_share,
                                        nonnegative=True))
        if self.max_negative_share > 1:
            _fail("max_negative_share", self.max_negative_share,
                  "is a share of the image's absolute mass, at most 1")
        if self.compare_to is not None:
            if not isinstance(self.compare_to, str):
                _fail("compare_to", self.compare_to, "must be a window such as 'hann:256:128'")
            # imported here: search.compare loads numpy, which a corpus-free check need not pay
            from burstlens.search.compare import parse_compare_to

            put("compare_to", parse_compare_to(self.compare_to).text)
        put("held_out", _real("held_out", self.held_out, nonnegative=True))
        if self.held_out > MAX_HELD_OUT:
            _fail("held_out", self.held_out, f"at most {MAX_HELD_OUT:g} of the windows can be held "
                                             f"out (0 judges on the fitted windows)")

    @classmethod
    def from_mapping(cls, settings: Mapping) -> JobSettings:
        """The settings of a JSON object (keys of :data:`SETTINGS_DEFAULTS`; None means the
        default, as a form or a JSON body may send nulls). ``ValueError`` naming every unknown
        key, or the first bad value."""
        if not isinstance(settings, Mapping):
            raise ValueError(f"settings must be an object, got {type(settings).__name__}")
        unknown = sorted(set(settings) - set(SETTINGS_DEFAULTS))
        if unknown:
            raise ValueError(f"unknown setting(s): {', '.join(map(repr, unknown))}; "
                             f"known settings: {', '.join(SETTINGS_DEFAULTS)}")
        given = {k: v for k, v in settings.items() if v is not None}
        return cls(**{k: given[k] for k in SEARCH_KEYS if k in given},
                   corpus={k: given[k] for k in CORPUS_KEYS if k in given})

    def as_dict(self) -> dict:
        """Every setting by name, in the order of :data:`SETTINGS_DEFAULTS`, as JSON values
        (pairs as lists; a corpus option not given is None)."""
        out = {}
        for name in SEARCH_KEYS:
            value = getattr(self, name)
            out[name] = list(value) if isinstance(value, tuple) else \
                dict(value) if isinstance(value, dict) else value
        out.update({k: self.corpus.get(k) for k in CORPUS_KEYS if k != "seed"})
        return out

    def search_options(self) -> dict:
        """The keywords of ``FilterbankSearch`` (the search settings, JSON values)."""
        values = self.as_dict()
        return {k: values[k] for k in SEARCH_KEYS}

    def read_options(self) -> dict:
        """The keywords of ``read_corpus``: only the corpus options given, so the reader's own
        choices (and a corpus upload's recorded options) stay in force for the rest."""
        return dict(self.corpus)

    def replace(self, **changes) -> JobSettings:
        """A copy with ``changes`` (checked again)."""
        return replace(self, **changes)

    def resolve(self, sampling_rate_hz: float, window_samples: int) -> dict:
        """Fill the data-dependent defaults and check the settings against the corpus.

        Parameters: ``sampling_rate_hz`` fs of the corpus, ``window_samples`` N of its windows.
        Returns the settings the run uses (:meth:`as_dict`, every default written out) plus
        the derived bounds: ``time_spread_bounds_s`` [4/fs, window/6], ``chirp_bound_hz_per_s``
        (band width / window duration, 0 with chirp off) and ``nyquist_hz``. ``ValueError``
        for a band above the Nyquist frequency, windows too short for the search, or a
        ``compare_to`` window longer than the windows.
        """
        checked = self.as_dict()
        fs = float(sampling_rate_hz)
        nyquist = fs / 2.0
        window_s = window_samples / fs
        if checked["band_hz"] is None:
            checked["band_hz"] = [fs / 100.0, 0.45 * fs]
            checked["band_hz_default"] = "[fs/100, 0.45 fs]"
        lo, hi = checked["band_hz"]
        if hi > nyquist:
            _fail("band_hz", checked["band_hz"],
                  f"the high edge {hi:g} Hz is above the Nyquist frequency {nyquist:g} Hz "
                  f"of the corpus (sampling rate {fs:g} Hz)")
        t_lo, t_hi = 4.0 / fs, window_s / 6.0
        if t_hi <= t_lo:
            raise ValueError(f"window length {window_samples} samples is too short for the search: "
                             f"the time-spread range [4/fs, window/6] = [{t_lo:g}, {t_hi:g}] s is "
                             f"empty (need at least 25 samples)")
        if checked["compare_to"] is not None:
            from burstlens.search.compare import parse_compare_to  # numpy: see __post_init__

            parse_compare_to(checked["compare_to"]).check(window_samples, fs)
        checked["window_s"] = window_s
        checked["time_spread_bounds_s"] = [t_lo, t_hi]
        checked["chirp_bound_hz_per_s"] = (hi - lo) / window_s if checked["chirp"] else 0.0
        checked["nyquist_hz"] = nyquist
        checked["sampling_rate_hz"] = fs
        checked["window_samples"] = int(window_samples)
        return checked


def _fail(name: str, value, cause: str):
    raise ValueError(f"setting {name!r} = {value!r}: {cause}")


def _int(name, value, minimum=None, allow=()):
    if (isinstance(value, bool) or not isinstance(value, numbers.Integral)) and not (
            isinstance(value, float) and value.is_integer()):
        _fail(name, value, "must be an integer")
    value = int(value)
    if value in allow:
        return value
    if minimum is not None and value < minimum:
        _fail(name, value, f"must be at least {minimum}")
    return value


def _real(name, value, positive=False, nonnegative=False):
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        _fail(name, value, "must be a number")
    value = float(value)
    if not math.isfinite(value):
        _fail(name, value, "must be finite")
    if positive and value <= 0:
        _fail(name, value, "must be positive")
    if nonnegative and value < 0:
        _fail(name, value, "must not be negative")
    return value


def _bool(name, value):
    if not isinstance(value, bool):
        _fail(name, value, "must be true or false")
    return value


def _pair(name, value):
    if isinstance(value, (str, bytes)) or not hasattr(value, "__len__") or len(value) != 2:
        _fail(name, value, "must be a pair [low, high]")
    return [_real(name, v) for v in value]


def normalize_criterion(value) -> dict:
    """Criterion setting (a name or a dict) -> full dict with every field filled.

    Fields: ``name`` (renyi | concentration | sparsity | detection: the weakest burst an energy
    detector on the image finds, search.fit.detect), ``alpha`` (Rényi order, > 0; 1 is the
    Shannon limit), ``p`` (Stanković's exponent, > 1), ``measure`` (gini | hoyer, for sparsity),
    ``negative_mass_penalty`` (λ ≥ 0), ``reduce`` (mean | median | trimmed: the corpus reducer)
    and ``excess`` (true: score each burst's excess over the site's steady level, the default;
    false: score whole windows).
    """
    if isinstance(value, str):
        value = {"name": value}
    if not isinstance(value, dict):
        _fail("criterion", value, "must be a criterion name or an object with a 'name'")
    unknown = sorted(set(value) - set(CRITERION_DEFAULTS))
    if unknown:
        _fail("criterion", value, f"unknown field(s) {', '.join(map(repr, unknown))}; "
                                  f"known: {', '.join(CRITERION_DEFAULTS)}")
    out = dict(CRITERION_DEFAULTS)
    out.update(value)
    if out["name"] not in CRITERIA:
        _fail("criterion.name", out["name"], f"unknown criterion; choose one of {', '.join(CRITERIA)}")
    out["alpha"] = _real("criterion.alpha", out["alpha"], positive=True)   # 1 is the Shannon limit
    out["p"] = _real("criterion.p", out["p"])
    if out["p"] <= 1:
        _fail("criterion.p", out["p"], "Stanković's exponent must be above 1")
    if out["measure"] not in SPARSITY_MEASURES:
        _fail("criterion.measure", out["measure"], f"choose one of {', '.join(SPARSITY_MEASURES)}")
    out["negative_mass_penalty"] = _real("criterion.negative_mass_penalty",
                                         out["negative_mass_penalty"], nonnegative=True)
    if out["reduce"] not in REDUCERS:
        _fail("criterion.reduce", out["reduce"], f"choose one of {', '.join(REDUCERS)}")
    out["excess"] = _bool("criterion.excess", out["excess"])
    return out


def check_corpus_options(options: dict) -> dict:
    """Check corpus options (any subset of :data:`CORPUS_OPTIONS`; None means unset); return the
    set ones checked. The pairs are checked together, the unset one at the reader's default:
    ``trigger_off`` ≤ ``trigger_on``, ``sta_s`` < ``lta_s``."""
    unknown = sorted(set(options) - set(CORPUS_OPTIONS))
    if unknown:
        raise ValueError(f"unknown corpus option(s): {', '.join(map(repr, unknown))}; "
                         f"known: {', '.join(CORPUS_OPTIONS)}")
    out = {k: CORPUS_OPTIONS[k].check(v) for k, v in options.items() if v is not None}
    if "trigger_on" in out or "trigger_off" in out:
        on = out.get("trigger_on", CORPUS_OPTIONS["trigger_on"].default)
        off = out.get("trigger_off", CORPUS_OPTIONS["trigger_off"].default)
        if off > on:
            _fail("trigger_off", off, f"must not exceed trigger_on {on:g}")
    if "sta_s" in out and "lta_s" in out and out["sta_s"] >= out["lta_s"]:
        _fail("sta_s", out["sta_s"], f"must be shorter than lta_s {out['lta_s']:g}")
    return out


def split_settings(settings: Mapping) -> tuple[dict, dict]:
    """Job settings (a JSON object) -> ``(read_options, search_options)`` of
    :meth:`JobSettings.from_mapping`: the keywords of ``read_corpus`` (the corpus options given)
    and of ``FilterbankSearch``. ``ValueError`` naming an unknown key or a bad value."""
    checked = JobSettings.from_mapping(settings)
    return checked.read_options(), checked.search_options()


# The search settings (the fields of JobSettings but its corpus options), in record order
SEARCH_KEYS = tuple(f.name for f in fields(JobSettings) if f.name != "corpus")
# Job-setting name -> default: the search settings, then the corpus options (None: the
# reader's choice, recorded in Corpus.defaults); None means "chosen from the data".
SETTINGS_DEFAULTS: dict = JobSettings().as_dict()
