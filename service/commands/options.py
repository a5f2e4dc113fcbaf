"""The arguments shared by ``inspect``, ``tune`` and ``submit`` (docs/design.md §9), declared once, and
the service settings that ``serve``, ``worker`` and ``tokens`` share (:func:`service_settings_from`).

Each command adds the groups it takes (:func:`add_paths`, :func:`add_corpus_options`,
:func:`add_job_settings`) and turns the parsed flags into settings here: :func:`settings_from_args`
gives the checked ``search.settings.JobSettings`` (corpus options included), as the API and
Python callers build them; :func:`settings_json_from_args` the JSON settings of ``POST /v1/jobs``
(the flags given); :func:`corpus_options_from_args` the checked ``read_corpus`` options alone.
The corpus flags come from the one definition of the corpus options,
``search.settings.CORPUS_OPTIONS`` (name, kind, default, help, check); the job settings flags
are :data:`JOB_FLAGS`, with their choices and defaults read from ``search.settings`` and
``search.criteria_options``.
"""
from __future__ import annotations

import argparse
from collections.abc import Sequence
from dataclasses import dataclass, field

from burstlens.search.criteria_options import CRITERIA, CRITERION_DEFAULTS
from burstlens.search.settings import (CORPUS_OPTIONS, MAX_HELD_OUT, SETTINGS_DEFAULTS, SPACINGS,
                                       JobSettings, check_corpus_options)


class _NotGiven:
    """Default of a corpus flag: marks it as not given, and prints as the reader's default in
    --help (``%(default)s``). Resolved only then, because the reader's constants live in
    ``search.corpus``, whose import (scipy.signal, over a second) every command would pay."""

    def __init__(self, option):
        self.option = option

    def __str__(self) -> str:
        return self.option.default_text()


class _Choices(Sequence):
    """An option's allowed values, looked up when argparse first checks or shows them (same
    reason as :class:`_NotGiven`)."""

    def __init__(self, option):
        self.option = option

    def __getitem__(self, index):
        return self.option.choices[index]

    def __len__(self) -> int:
        return len(self.option.choices)


_KIND_ARGS = {"positive": {"type": float}, "share": {"type": float}, "integer": {"type": int},
              "codes": {"metavar": "CODES"},
              "band": {"type": float, "nargs": 2, "metavar": ("LO", "HI")}}


def add_paths(parser: argparse.ArgumentParser) -> None:
    """The waveform files or folders to read (one or more)."""
    parser.add_argument("paths", nargs="+", metavar="PATH", help="waveform files or folders")


def add_corpus_options(parser: argparse.ArgumentParser) -> None:
    """Every ``read_corpus`` option as a flag (``--sta-s``, ``--bandpass LO HI``, ...)."""
    g = parser.add_argument_group("corpus options (unset: the reader's default or a value "
                                  "chosen from the data, recorded in the result)")
    for option in CORPUS_OPTIONS.values():
        add_corpus_option(g, option.name)


def add_corpus_option(parser, name: str) -> None:
    """One ``read_corpus`` option as a flag, with its help, default and choices, for a command
    that takes only some of them (``transform --max-windows``); read it back with
    :func:`corpus_options_from_args`."""
    option = CORPUS_OPTIONS[name]
    kwargs = dict(_KIND_ARGS.get(option.kind, {}))
    default = "default %(default)s"
    if option.name.endswith(("_hz", "_s")) and option.kind == "positive":
        kwargs["metavar"] = option.name.rsplit("_", 1)[1].upper()
    if option.kind == "choice":
        # add_argument checks its metavar by formatting it, which would look the choices up
        # while building; the placeholder is dropped after, so --help lists {a,b,...}
        kwargs.update(choices=_Choices(option), metavar=option.name.upper())
        default = "one of %(choices)s; default %(default)s"
    action = parser.add_argument(option.cli_flag, dest=option.name, default=_NotGiven(option),
                                 help=f"{option.help} ({default})", **kwargs)
    if option.kind == "choice":
        action.metavar = None


def _share(high: float):
    """argparse type: a float in [0, high], so a bad share fails before any upload or fit."""
    def parse(text: str) -> float:
        try:
            value = float(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None
        if not 0.0 <= value <= high:
            raise argparse.ArgumentTypeError(f"expected a share from 0 to {high:g}, got {text}")
        return value
    return parse


@dataclass(frozen=True)
class JobFlag:
    """One job-settings flag: ``flag`` sets the job setting ``setting`` (``criterion.alpha``: a
    field of the criterion) to its value; an ``off`` flag (``--no-chirp``) takes no value and
    sets the setting to False. ``argparse``: the keywords of ``add_argument`` (type, nargs,
    metavar, choices, help)."""

    flag: str
    setting: str
    argparse: dict = field(default_factory=dict)
    off: bool = False

    @property
    def dest(self) -> str:
        """The attribute of the parsed arguments (argparse's own name for the flag)."""
        return self.flag.lstrip("-").replace("-", "_")


# The search settings as flags, in --help order; unset flags leave the engine's defaults, which
# each help states (read from search.settings, so help and engine cannot disagree).
_LOW, _HIGH = SETTINGS_DEFAULTS["cell_area"]
JOB_FLAGS = (
    JobFlag("--channels", "channels", {
        "type": int, "metavar": "N",
        "help": f"number of channels (default {SETTINGS_DEFAULTS['channels']})"}),
    JobFlag("--band", "band_hz", {
        "nargs": 2, "type": float, "metavar": ("LO", "HI"),
        "help": "band the channel centres span, Hz (default from the sampling rate fs: fs/100 to "
                "0.45 fs, above drift and below the anti-alias roll-off)"}),
    JobFlag("--spacing", "spacing", {
        "choices": SPACINGS,
        "help": f"channel centre spacing (one of %(choices)s; default {SETTINGS_DEFAULTS['spacing']})"}),
    JobFlag("--criterion", "criterion.name", {
        "choices": CRITERIA,
        "help": "what the search minimises: the Rényi entropy of the bursts on the plane, their "
                "concentration or sparsity, or the detection threshold of an energy detector in "
                "the site's noise (needs noise windows) (one of %(choices)s; default "
                f"{CRITERION_DEFAULTS['name']})"}),
    JobFlag("--alpha", "criterion.alpha",
            {"type": float, "help": f"Rényi order (default {CRITERION_DEFAULTS['alpha']:g})"}),
    JobFlag("--cell-area", "cell_area", {
        "nargs": 2, "type": float, "metavar": ("MIN", "MAX"),
        "help": f"bounds of the kernels' cell area (1 = Heisenberg minimum; default {_LOW:g} {_HIGH:g})"}),
    JobFlag("--no-chirp", "chirp", {"help": "chirp rate fixed at 0 (default: searched)"}, off=True),
    JobFlag("--no-refine", "refine", {"help": "skip the per-channel refinement (default: refine)"},
            off=True),
    JobFlag("--no-guard", "guard", {"help": "keep the sharpest filterbank even where it finds "
                                            "bursts or onsets worse than the best plain "
                                            "spectrogram on the fit windows (default: fall back "
                                            "to that spectrogram)"}, off=True),
    JobFlag("--evaluations", "evaluations", {
        "type": int, "metavar": "N",
        "help": "evaluation budget: whole filterbanks scored by the first search stage, before "
                f"the per-channel refinement (default {SETTINGS_DEFAULTS['evaluations']})"}),
    JobFlag("--time-limit", "time_limit_s", {
        "type": float, "metavar": "S",
        "help": "time budget of the search, s: at the limit the best filterbank so far is judged "
                "and returned (the baselines and the judgement always run; default none)"}),
    JobFlag("--bootstrap", "bootstrap", {
        "type": int, "metavar": "N",
        "help": "refits on resamples of the fit windows for each channel's stability interval "
                f"(0: none, else at least 2; default {SETTINGS_DEFAULTS['bootstrap']})"}),
    JobFlag("--held-out", "held_out", {
        "type": _share(MAX_HELD_OUT), "metavar": "SHARE",
        "help": f"share of windows kept out of the fit to judge it (0 to {MAX_HELD_OUT:g}, "
                f"default {SETTINGS_DEFAULTS['held_out']:g}; 0 judges in-sample)"}),
    JobFlag("--max-negative-share", "max_negative_share", {
        "type": _share(1.0), "metavar": "SHARE",
        "help": "largest share of the image's absolute mass that may be negative (0 to 1, "
                f"default {SETTINGS_DEFAULTS['max_negative_share']:g})"}),
    JobFlag("--compare-to", "compare_to", {
        "metavar": "KIND:LENGTH[:OVERLAP]",
        "help": "your own spectrogram, scored beside the result: window hann or gaussian, "
                "length and overlap in samples (overlap unset: half the length), e.g. "
                "hann:256:192 (default none)"}),
    JobFlag("--jobs", "jobs", {
        "type": int, "metavar": "N",
        "help": "candidate filterbanks scored at once, one process each (default "
                f"{SETTINGS_DEFAULTS['jobs']}; -1 with tune: every core); a server runs at most as "
                "many as it has cores; tune also reads the files with this many"}),
)


def add_job_settings(parser: argparse.ArgumentParser) -> None:
    """The search settings flags (docs/design.md §9, :data:`JOB_FLAGS`)."""
    g = parser.add_argument_group("job settings (unset: the engine's default, recorded in the result)")
    for flag in JOB_FLAGS:
        action = {"action": "store_true"} if flag.off else {}
        g.add_argument(flag.flag, **action, **flag.argparse)


def _corpus_flags_given(args: argparse.Namespace) -> dict:
    """The corpus flags given, by option name, as parsed (not yet checked)."""
    given = {}
    for name in CORPUS_OPTIONS:
        value = getattr(args, name, None)
        if value is not None and not isinstance(value, _NotGiven):
            given[name] = value
    return given


def corpus_options_from_args(args: argparse.Namespace) -> dict:
    """Flags → the checked ``read_corpus`` options (only those given); ``ValueError`` naming a
    bad one (``search.settings.check_corpus_options``)."""
    return check_corpus_options(_corpus_flags_given(args))


def settings_json_from_args(args: argparse.Namespace) -> dict:
    """Flags → the JSON settings of POST /v1/jobs: only the flags given (the corpus options,
    then the job settings; a command without the job settings flags gives only corpus options),
    unchecked, so a job records what its client set."""
    settings = _corpus_flags_given(args)
    for flag in JOB_FLAGS:
        value = getattr(args, flag.dest, None)
        if value is None or value is False:  # not given (an off flag's default is False)
            continue
        value = False if flag.off else list(value) if isinstance(value, list) else value
        group, _, name = flag.setting.rpartition(".")
        (settings.setdefault(group, {}) if group else settings)[name] = value
    return settings


def settings_from_args(args: argparse.Namespace) -> JobSettings:
    """Flags → the checked job settings (``JobSettings.from_mapping`` of
    :func:`settings_json_from_args`); ``ValueError`` naming a bad one."""
    return JobSettings.from_mapping(settings_json_from_args(args))


def service_settings_from(args: argparse.Namespace, *names: str):
    """``ServiceSettings`` (BURSTLENS_* environment) with the flags ``names`` that were given
    laid over it; shared by ``serve``, ``worker`` and ``tokens``."""
    from burstlens.service.config import ServiceSettings

    overrides = {n: getattr(args, n) for n in names if getattr(args, n, None) is not None}
    return ServiceSettings(**overrides)
