"""Job settings: names, defaults, validation, and the split into corpus and search options.

A job's settings (DESIGN §7, the CLI flags of §9 in snake_case) mix options for reading the
corpus (``window_s``, ``windowing``, ``max_windows``) with options for the search. The service and
the CLI hand the whole dict to :func:`split_settings`, pass the first half to ``read_corpus`` and
the second to ``FilterbankSearch``. Every check here raises ``ValueError`` naming the setting, the
value and the cause, so an HTTP 422 or a CLI exit 2 can show the message as it is.

Checks that need the corpus (the band against the Nyquist frequency, time spreads against the
window length) live in :func:`resolve_search_options`, which ``FilterbankSearch.fit`` calls; it
also fills the data-dependent defaults and returns every value the run will use, for the record.
"""
from __future__ import annotations

import math
import numbers

# Job-setting name -> default. None means "chosen from the data when the corpus is known".
SETTINGS_DEFAULTS: dict = {
    "channels": 96,
    "band_hz": None,          # default [fs/100, 0.45*fs]: above DC drift, below the anti-alias roll-off
    "spacing": "log",
    "window_s": None,         # corpus option: the reader derives it from the trigger durations
    "criterion": {"name": "renyi", "alpha": 3.0},
    "cell_area": [0.25, 4.0],
    "chirp": True,
    "refine": True,
    "evaluations": 24,        # stage-1 family evaluations; meets the time targets in bench/
    "time_limit_s": None,     # no time limit
    "bootstrap": 8,
    "seed": 0,
    "windowing": None,        # corpus option: reader default
    "max_windows": None,      # corpus option: reader default
    "jobs": 1,
    "subset": 64,             # windows scoring the stage-1 family search
    "max_negative_share": 0.01,  # positivity ceiling: share of the image's absolute mass
    "held_out": 0.25,         # share of windows kept out of the fit and used to judge it
}

CORPUS_KEYS = ("window_s", "windowing", "max_windows", "seed")
SEARCH_KEYS = ("channels", "band_hz", "spacing", "criterion", "cell_area", "chirp", "refine",
               "evaluations", "time_limit_s", "bootstrap", "seed", "jobs", "subset",
               "max_negative_share", "held_out")
MAX_HELD_OUT = 0.9

CRITERIA = ("renyi", "concentration", "sparsity")
CRITERION_DEFAULTS = {"name": "renyi", "alpha": 3.0, "p": 2.0, "measure": "gini",
                      "negative_mass_penalty": 0.0, "reduce": "mean"}
SPARSITY_MEASURES = ("gini", "hoyer")
REDUCERS = ("mean", "median", "trimmed")
SPACINGS = ("log", "linear")
WINDOWINGS = ("bursts", "whole", "sliding")


def _fail(name: str, value, cause: str):
    raise ValueError(f"setting {name!r} = {value!r}: {cause}")


def _int(name, value, minimum=None, allow=()):
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        if not (isinstance(value, float) and value.is_integer()):
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

    Fields: ``name`` (renyi | concentration | sparsity), ``alpha`` (Rényi order, > 0; 1 is the
    Shannon limit), ``p`` (Stanković's exponent, > 1), ``measure`` (gini | hoyer, for sparsity),
    ``negative_mass_penalty`` (λ ≥ 0) and ``reduce`` (mean | median | trimmed: the corpus reducer).
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
    if out["window_s"] is not None:
        out["window_s"] = _real("window_s", out["window_s"], positive=True)
    out["criterion"] = normalize_criterion(out["criterion"])
    lo, hi = _pair("cell_area", out["cell_area"])
    if lo <= 0:
        _fail("cell_area", out["cell_area"], "the minimum must be positive")
    if lo > hi:
        _fail("cell_area", out["cell_area"], f"the minimum {lo:g} is greater than the maximum {hi:g}")
    out["cell_area"] = [lo, hi]
    out["chirp"] = _bool("chirp", out["chirp"])
    out["refine"] = _bool("refine", out["refine"])
    out["evaluations"] = _int("evaluations", out["evaluations"], minimum=1)
    if out["time_limit_s"] is not None:
        out["time_limit_s"] = _real("time_limit_s", out["time_limit_s"], positive=True)
    out["bootstrap"] = _int("bootstrap", out["bootstrap"], minimum=0)
    if out["bootstrap"] == 1:
        _fail("bootstrap", 1, "use 0 (no intervals) or at least 2 resamples")
    out["seed"] = _int("seed", out["seed"], minimum=0)
    if out["windowing"] is not None and out["windowing"] not in WINDOWINGS:
        _fail("windowing", out["windowing"], f"choose one of {', '.join(WINDOWINGS)}")
    if out["max_windows"] is not None:
        out["max_windows"] = _int("max_windows", out["max_windows"], minimum=1)
    out["jobs"] = _int("jobs", out["jobs"], minimum=1, allow=(-1,))
    out["subset"] = _int("subset", out["subset"], minimum=1)
    out["max_negative_share"] = _real("max_negative_share", out["max_negative_share"],
                                      nonnegative=True)
    if out["max_negative_share"] > 1:
        _fail("max_negative_share", out["max_negative_share"],
              "is a share of the image's absolute mass, at most 1")
    out["held_out"] = _real("held_out", out["held_out"], nonnegative=True)
    if out["held_out"] > MAX_HELD_OUT:
        _fail("held_out", out["held_out"], f"at most {MAX_HELD_OUT:g} of the windows can be held out "
                                           f"(0 judges on the fitted windows)")
    return out


def split_settings(settings: dict) -> tuple[dict, dict]:
    """Job settings -> ``(corpus_options, search_options)``.

    ``corpus_options`` are keywords for ``read_corpus`` (only those set: ``window_s``,
    ``windowing``, ``max_windows``, plus ``seed`` for its seeded subsample); ``search_options``
    are keywords for ``FilterbankSearch`` (``jobs`` becomes ``n_jobs``). Unknown keys and bad
    values raise ``ValueError`` naming them.
    """
    checked = validate_settings(settings)
    corpus = {k: checked[k] for k in CORPUS_KEYS if checked[k] is not None}
    search = {("n_jobs" if k == "jobs" else k): checked[k] for k in SEARCH_KEYS}
    return corpus, search


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
    checked["window_s"] = window_s
    checked["time_spread_bounds_s"] = [t_lo, t_hi]
    checked["chirp_bound_hz_per_s"] = (hi - lo) / window_s if checked["chirp"] else 0.0
    checked["nyquist_hz"] = nyquist
    checked["sampling_rate_hz"] = fs
    checked["window_samples"] = int(window_samples)
    return checked
