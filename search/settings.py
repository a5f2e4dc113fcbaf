"""Job settings: names, defaults, validation, and the split into corpus and search options.

A job's settings (docs/design.md §7, the CLI flags of §9 in snake_case) mix options for reading the
corpus (every ``read_corpus`` keyword, defined once in :data:`CORPUS_OPTIONS`) with options for
the search. The service and the CLI hand the whole dict to :func:`split_settings`, pass the first
half to ``read_corpus`` and the second to ``FilterbankSearch``. Every check here raises
``ValueError`` naming the setting, the value and the cause, so an HTTP 422 or a CLI exit 2 can
show the message as it is.

Checks that need the corpus (the band against the Nyquist frequency, time spreads against the
window length) live in :func:`resolve_search_options`, which ``FilterbankSearch.fit`` calls; it
also fills the data-dependent defaults and returns every value the run will use, for the record.
"""
from __future__ import annotations

import math
import numbers
import re
from dataclasses import dataclass
from importlib import import_module


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
    ``reader_default`` names the reader's constant holding the default; without one the default
    is ``default_words`` (the reader chooses it, usually from the data). ``flag`` is the CLI flag
    when it is not ``--name-with-dashes``.
    """

    name: str
    kind: str
    help: str
    reader_default: str | None = None
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
        return None if self.reader_default is None else _reader(self.reader_default)

    @property
    def choices(self) -> tuple:
        return tuple(_reader(self.choices_from)) if self.kind == "choice" else ()

    def default_text(self) -> str:
        if self.reader_default is None:
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
                 reader_default="DEFAULT_MAX_WINDOWS", minimum=1, maximum=1_000_000),
    CorpusOption("seed", "integer", "seed of the window subsample, the held-out split and the "
                 "search", reader_default="DEFAULT_SEED", minimum=0, maximum=2**32 - 1),
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
                 reader_default="DEFAULT_TRIGGER_ON"),
    CorpusOption("trigger_off", "positive", "STA/LTA threshold that ends a trigger, at most "
                 "trigger_on", reader_default="DEFAULT_TRIGGER_OFF"),
    CorpusOption("pre_trigger", "share", "share of a burst window before its trigger, in [0, 1)",
                 reader_default="DEFAULT_PRE_TRIGGER"),
    CorpusOption("trigger", "choice", "STA/LTA kind", reader_default="DEFAULT_TRIGGER",
                 choices_from="TRIGGERS"),
    CorpusOption("hop_s", "positive", "hop of sliding windows, s", default_words="half a window"),
)
# name -> definition, in the order of read_corpus's keywords
CORPUS_OPTIONS: dict[str, CorpusOption] = {o.name: o for o in _OPTIONS}

# Job-setting name -> default. None means "chosen from the data when the corpus is known".
SETTINGS_DEFAULTS: dict = {
    "channels": 96,
    "band_hz": None,          # default [fs/100, 0.45*fs]: above DC drift, below the anti-alias roll-off
    "spacing": "log",
    "criterion": {"name": "renyi", "alpha": 3.0},
    "cell_area": [0.25, 4.0],
    "chirp": True,
    "refine": True,
    "evaluations": 24,        # stage-1 family evaluations; meets the time targets in bench/
    "time_limit_s": None,     # no time limit
    "bootstrap": 8,
    "seed": 0,                # also a corpus option: the seed of the reader's subsample
    "jobs": 1,
    "subset": 64,             # windows scoring the stage-1 family search
    "max_negative_share": 0.01,  # positivity ceiling: share of the image's absolute mass
    "held_out": 0.25,         # share of windows kept out of the fit and used to judge it
    "compare_to": None,       # the user's own spectrogram, scored in the scorecard (search.compare)
    "guard": True,            # fall back to the best spectrogram when the result detects or picks
                              # worse on the fit windows (search.fit.judge.pipeline_guard)
    # corpus options: None leaves the choice to the reader (recorded in Corpus.defaults)
    **{name: None for name in CORPUS_OPTIONS if name != "seed"},
}

CORPUS_KEYS = tuple(CORPUS_OPTIONS)
SEARCH_KEYS = ("channels", "band_hz", "spacing", "criterion", "cell_area", "chirp", "refine",
               "evaluations", "time_limit_s", "bootstrap", "seed", "jobs", "subset",
               "max_negative_share", "held_out", "compare_to", "guard")
MAX_HELD_OUT = 0.9

# "detection" scores a corpus, not an image: the search's detection threshold (search.fit.detect)
CRITERIA = ("renyi", "concentration", "sparsity", "detection")
# ``excess``: the search scores each burst's excess over its rows' own level (the site's steady
# sound removed, search.criteria.burst_excess); false scores whole windows
CRITERION_DEFAULTS = {"name": "renyi", "alpha": 3.0, "p": 2.0, "measure": "gini",
                      "negative_mass_penalty": 0.0, "reduce": "mean", "excess": True}
SPARSITY_MEASURES = ("gini", "hoyer")
REDUCERS = ("mean", "median", "trimmed")
SPACINGS = ("log", "linear")


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


def validate_settings(settings: dict) -> dict:
    """Check a job-settings dict that needs no corpus; return it with defaults filled.

    Raises ``ValueError`` naming the first bad setting (unknown keys first, all of them named).
    """
    if not isinstance(settings, dict):
        raise ValueError(f"settings must be an object, got {type(settings).__name__}")
    unknown = sorted(set(settings) - set(SETTINGS_DEFAULTS))
    if unknown:
        raise ValueError(f"unknown setting(s): {', '.join(map(repr, unknown))}; "
                         f"known settings: {', '.join(SETTINGS_DEFAULTS)}")
    # None means "the default" for every key (a form or a JSON body may send nulls)
    out = dict(SETTINGS_DEFAULTS)
    out.update({k: v for k, v in settings.items() if v is not None})
    out["channels"] = _int("channels", out["channels"], minimum=2)
    if out["band_hz"] is not None:
        lo, hi = _pair("band_hz", out["band_hz"])
        if lo <= 0:
            _fail("band_hz", out["band_hz"], "the low edge must be above 0 Hz")
        if hi <= lo:
            _fail("band_hz", out["band_hz"], "the high edge must be above the low edge")
        out["band_hz"] = [lo, hi]
    if out["spacing"] not in SPACINGS:
        _fail("spacing", out["spacing"], f"choose one of {', '.join(SPACINGS)}")
    out["criterion"] = normalize_criterion(out["criterion"])
    lo, hi = _pair("cell_area", out["cell_area"])
    if lo <= 0:
        _fail("cell_area", out["cell_area"], "the minimum must be positive")
    if lo > hi:
        _fail("cell_area", out["cell_area"], f"the minimum {lo:g} is greater than the maximum {hi:g}")
    out["cell_area"] = [lo, hi]
    out["chirp"] = _bool("chirp", out["chirp"])
    out["guard"] = _bool("guard", out["guard"])
    out["refine"] = _bool("refine", out["refine"])
    out["evaluations"] = _int("evaluations", out["evaluations"], minimum=1)
    if out["time_limit_s"] is not None:
        out["time_limit_s"] = _real("time_limit_s", out["time_limit_s"], positive=True)
    out["bootstrap"] = _int("bootstrap", out["bootstrap"], minimum=0)
    if out["bootstrap"] == 1:
        _fail("bootstrap", 1, "use 0 (no intervals) or at least 2 resamples")
    out.update(check_corpus_options({k: out[k] for k in CORPUS_KEYS}))
    out["jobs"] = _int("jobs", out["jobs"], minimum=1, allow=(-1,))
    out["subset"] = _int("subset", out["subset"], minimum=1)
    out["max_negative_share"] = _real("max_negative_share", out["max_negative_share"],
                                      nonnegative=True)
    if out["max_negative_share"] > 1:
        _fail("max_negative_share", out["max_negative_share"],
              "is a share of the image's absolute mass, at most 1")
    if out["compare_to"] is not None:
        from burstlens.search.compare import parse_compare_to

        if not isinstance(out["compare_to"], str):
            _fail("compare_to", out["compare_to"], "must be a window such as 'hann:256:128'")
        out["compare_to"] = parse_compare_to(out["compare_to"]).text
    out["held_out"] = _real("held_out", out["held_out"], nonnegative=True)
    if out["held_out"] > MAX_HELD_OUT:
        _fail("held_out", out["held_out"], f"at most {MAX_HELD_OUT:g} of the windows can be held out "
                                           f"(0 judges on the fitted windows)")
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


def split_settings(settings: dict) -> tuple[dict, dict]:
    """Job settings -> ``(corpus_options, search_options)``.

    ``corpus_options`` are keywords for ``read_corpus``: only the corpus options the settings
    set, so the reader's own choices (and a corpus upload's recorded options) stay in force for
    the rest; ``search_options`` are keywords for ``FilterbankSearch`` (``jobs`` becomes
    ``n_jobs``). Unknown keys and bad values raise ``ValueError`` naming them.
    """
    checked = validate_settings(settings)
    corpus = {k: checked[k] for k in CORPUS_KEYS if settings.get(k) is not None}
    search = {("n_jobs" if k == "jobs" else k): checked[k] for k in SEARCH_KEYS}
    return corpus, search


def read_corpus_as_given(paths, options: dict, *, progress=None, mapper=None):
    """``read_corpus(paths, **options, progress=progress, mapper=mapper)``, with ``options``
    (checked corpus options) recorded as ``Corpus.defaults["given"]``: the reader's record holds
    the value of every option, this says which of them a person set rather than the reader chose
    (the result's provenance). ``progress`` is the reader's callback (``search.corpus.ReadProgress``),
    ``mapper`` runs its tasks elsewhere (a Dask cluster); neither changes the result."""
    from burstlens.search.corpus import read_corpus

    corpus = read_corpus(paths, **options, progress=progress, mapper=mapper)
    corpus.defaults["given"] = dict(options)
    return corpus


def resolve_search_options(options: dict, sampling_rate_hz: float, window_samples: int) -> dict:
    """Fill the data-dependent defaults and check the settings against the corpus.

    Parameters: ``options`` search options as given to ``FilterbankSearch`` (``n_jobs`` for jobs),
    ``sampling_rate_hz`` fs of the corpus, ``window_samples`` N of its windows.
    Returns the settings the run uses, every default written out, plus the derived bounds:
    ``time_spread_bounds_s`` [4/fs, window/6], ``chirp_bound_hz_per_s`` (band width / window
    duration, 0 with chirp off) and ``nyquist_hz``.
    """
    opts = dict(options)
    n_jobs = opts.pop("n_jobs", 1)
    opts["jobs"] = n_jobs
    checked = validate_settings({k: v for k, v in opts.items() if k in SETTINGS_DEFAULTS})
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
                         f"the time-spread range [4/fs, window/6] = [{t_lo:g}, {t_hi:g}] s is empty "
                         f"(need at least 25 samples)")
    if checked["compare_to"] is not None:
        from burstlens.search.compare import parse_compare_to

        parse_compare_to(checked["compare_to"]).check(window_samples, fs)
    checked["window_s"] = window_s
    checked["time_spread_bounds_s"] = [t_lo, t_hi]
    checked["chirp_bound_hz_per_s"] = (hi - lo) / window_s if checked["chirp"] else 0.0
    checked["nyquist_hz"] = nyquist
    checked["sampling_rate_hz"] = fs
    checked["window_samples"] = int(window_samples)
    return checked
