"""`burstlens ... --help`: every option of every sub-command states its default and its choices.

The conventions checked are argparse's own (Python documentation, "argparse — Parser for
command-line options": ``%(default)s`` and ``%(choices)s`` in help strings, and the ``{a,b}``
metavar argparse draws for an option with ``choices=`` and no metavar).
"""
import argparse
import subprocess
import sys

import pytest

from burstlens.service.cli import build_parser


def _commands(parser, prefix=()):
    """(command words, parser) of every sub-command, nested ones (``tokens add``) included."""
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            for name, sub in action.choices.items():
                yield (*prefix, name), sub
                yield from _commands(sub, (*prefix, name))


COMMANDS = dict(_commands(build_parser()))


def _shown(parser, action) -> str:
    """The help text of ``action`` as --help prints it, placeholders filled."""
    return parser._get_formatter()._expand_help(action)


def _arguments(parser):
    return [a for a in parser._actions
            if not isinstance(a, (argparse._HelpAction, argparse._SubParsersAction))
            and a.help is not argparse.SUPPRESS]


def test_every_command_is_walked():
    """The walk reaches every command the CLI registers, and the nested tokens actions."""
    from burstlens.service.cli import COMMANDS as REGISTERED

    assert {words[0] for words in COMMANDS} == set(REGISTERED)
    assert {("tokens", "add"), ("tokens", "revoke"), ("tokens", "list")} <= set(COMMANDS)


@pytest.mark.parametrize("words", sorted(COMMANDS), ids=" ".join)
def test_every_option_states_its_default_and_choices(words):
    """Property: every argument has help text; an option whose default is set (not None, not
    False) shows that default in its help; an option that takes a value and may be left out
    says what its default is; an option with choices lists every choice in its help and as ``{a,b,...}`` in --help."""
    parser = COMMANDS[words]
    page = parser.format_help()
    for action in _arguments(parser):
        name = "/".join(action.option_strings) or action.dest
        assert action.help, f"{' '.join(words)} {name}: no help text"
        text = _shown(parser, action)
        if not action.option_strings:
            continue
        if action.default not in (None, False, argparse.SUPPRESS):
            assert str(action.default) in text, f"{' '.join(words)} {name}: default not shown"
        if action.nargs != 0 and not action.required:  # an optional value, not a switch
            assert "default" in text, f"{' '.join(words)} {name}: no default stated"
        if action.choices is not None:
            choices = [str(c) for c in action.choices]
            for choice in choices:
                assert choice in text, f"{' '.join(words)} {name}: choice {choice} not listed"
            assert "{" + ",".join(choices) + "}" in page, f"{' '.join(words)} {name}: metavar"


def _engine_default_words(value) -> str:
    if isinstance(value, (list, tuple)):
        return " ".join(f"{v:g}" for v in value)
    return f"{value:g}" if isinstance(value, float) else str(value)


def test_job_settings_help_states_the_engines_defaults():
    """Each job-settings flag (unset: the engine decides) states the engine's own default from
    ``search.settings`` (``--channels`` 96, ``--evaluations`` 24, ``--bootstrap`` 8, ...), and
    one that has none says what stands in for it (``--band``: from the sampling rate;
    ``--time-limit``: none)."""
    from burstlens.search.settings import CRITERION_DEFAULTS, SETTINGS_DEFAULTS
    from burstlens.service.commands.options import JOB_FLAGS

    parser = COMMANDS[("tune",)]
    by_dest = {a.dest: a for a in parser._actions}
    for flag in JOB_FLAGS:
        if flag.off:
            continue
        group, _, key = flag.setting.rpartition(".")
        value = (CRITERION_DEFAULTS if group == "criterion" else SETTINGS_DEFAULTS)[key]
        text = _shown(parser, by_dest[flag.dest])
        if value is None:
            assert "default none" in text or "default from" in text, flag.flag
        else:
            assert f"default {_engine_default_words(value)}" in text, (flag.flag, text)


def test_help_speaks_of_what_the_user_controls():
    """No help text speaks of the service's internals (the old ``--jobs`` help spoke of "the
    worker (capped there)")."""
    for words, parser in COMMANDS.items():
        for action in _arguments(parser):
            assert "capped there" not in _shown(parser, action), words


def test_building_the_parser_reads_no_corpus_module():
    """Listing choices in --help must not make every command import the corpus reader (scipy,
    seconds on a loaded machine): building the parser leaves ``burstlens.search.corpus``
    unimported; formatting tune's help then lists its windowing choices."""
    code = ("import sys; from burstlens.service.cli import build_parser; p = build_parser(); "
            "print('burstlens.search.corpus' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"
    assert "--windowing {bursts,whole,sliding}" in COMMANDS[("tune",)].format_help()
