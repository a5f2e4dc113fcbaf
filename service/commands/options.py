"""The flags shared by ``inspect``, ``tune`` and ``submit`` (DESIGN §9), declared once.

The corpus flags come from the one definition of the corpus options,
``search.settings.CORPUS_OPTIONS`` (name, kind, default, help, check); the job settings flags
are the search settings. :func:`settings_from_args` turns the flags given into the JSON settings
of ``POST /v1/jobs``, which ``search.settings`` checks for every entry point alike.
"""
from __future__ import annotations

import argparse
from collections.abc import Sequence

from search.settings import CORPUS_OPTIONS


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


def add_corpus_options(parser: argparse.ArgumentParser) -> None:
    """Every ``read_corpus`` option as a flag (``--sta-s``, ``--bandpass LO HI``, ...)."""
    g = parser.add_argument_group("corpus options (unset: the reader's default or a value "
                                  "chosen from the data, recorded in the result)")
    for option in CORPUS_OPTIONS.values():
        kwargs = dict(_KIND_ARGS.get(option.kind, {}))
        default = "default %(default)s"
        if option.name.endswith(("_hz", "_s")) and option.kind == "positive":
            kwargs["metavar"] = option.name.rsplit("_", 1)[1].upper()
        if option.kind == "choice":
            # an explicit metavar keeps argparse from listing the choices while building
            kwargs.update(choices=_Choices(option), metavar=option.name.upper())
            default = "one of %(choices)s; default %(default)s"
        g.add_argument(option.cli_flag, dest=option.name, default=_NotGiven(option),
                       help=f"{option.help} ({default})", **kwargs)


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


def add_job_settings(parser: argparse.ArgumentParser) -> None:
    """The search settings flags (DESIGN §9); unset flags leave the engine's defaults."""
    g = parser.add_argument_group("job settings (unset: the engine's default, recorded in the result)")
    g.add_argument("--channels", type=int, help="number of channels")
    g.add_argument("--band", nargs=2, type=float, metavar=("LO", "HI"), help="channel band, Hz")
    g.add_argument("--spacing", choices=["log", "linear"], help="channel centre spacing")
    g.add_argument("--criterion", choices=["renyi", "concentration", "sparsity"])
    g.add_argument("--alpha", type=float, help="Rényi order (default 3)")
    g.add_argument("--cell-area", nargs=2, type=float, metavar=("MIN", "MAX"),
                   help="cell area bounds (1 = Heisenberg minimum)")
    g.add_argument("--no-chirp", action="store_true", help="chirp rate fixed at 0")
    g.add_argument("--no-refine", action="store_true", help="skip per-channel refinement")
    g.add_argument("--evaluations", type=int, help="evaluation budget")
    g.add_argument("--time-limit", type=float, metavar="S", help="time budget, s")
    g.add_argument("--bootstrap", type=int, help="bootstrap resamples")
    g.add_argument("--held-out", type=_share(0.9), metavar="SHARE",
                   help="share of windows kept out of the fit to judge it (0 to 0.9, default "
                        "0.25; 0 judges in-sample)")
    g.add_argument("--max-negative-share", type=_share(1.0), metavar="SHARE",
                   help="largest share of the image's absolute mass that may be negative "
                        "(0 to 1, default 0.01)")
    g.add_argument("--jobs", type=int, help="parallel evaluations on the worker (capped there)")


def settings_from_args(args: argparse.Namespace) -> dict:
    """Flags → the JSON settings of POST /v1/jobs (only the flags given; a command without the
    job settings flags gives only corpus options)."""
    settings: dict = {}
    for name in CORPUS_OPTIONS:
        value = getattr(args, name, None)
        if value is not None and not isinstance(value, _NotGiven):
            settings[name] = value
    for flag, key in (("channels", "channels"), ("spacing", "spacing"),
                      ("evaluations", "evaluations"), ("time_limit", "time_limit_s"),
                      ("bootstrap", "bootstrap"), ("jobs", "jobs"), ("held_out", "held_out"),
                      ("max_negative_share", "max_negative_share")):
        if getattr(args, flag, None) is not None:
            settings[key] = getattr(args, flag)
    if getattr(args, "band", None) is not None:
        settings["band_hz"] = list(args.band)
    if getattr(args, "cell_area", None) is not None:
        settings["cell_area"] = list(args.cell_area)
    criterion = {k: v for k, v in (("name", getattr(args, "criterion", None)),
                                   ("alpha", getattr(args, "alpha", None))) if v is not None}
    if criterion:
        settings["criterion"] = criterion
    if getattr(args, "no_chirp", False):
        settings["chirp"] = False
    if getattr(args, "no_refine", False):
        settings["refine"] = False
    return settings
