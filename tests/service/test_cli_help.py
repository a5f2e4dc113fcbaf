"""`burstlens ... --help`: every option of every sub-command states its default and its choices.

The conventions checked are argparse's own (Python documentation, "argparse — Parser for
command-line options": ``%(default)s`` and ``%(choices)s`` in help strings, and the ``{a,b}``
metavar argparse draws for an option with ``choices=`` and no metavar). ``build_parser()``
builds every command's parser, so the walk below sees them all; ``burstlens --help`` itself
imports none of the command modules, which the tests at the end check in a fresh interpreter.
"""
import argparse
import json
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


def _run_cli(argv) -> dict:
    """``main(argv)`` in a fresh interpreter: its exit status, stdout, stderr, the command modules
    (under ``service.commands``) it imported, and whether numpy or scipy got imported."""
    code = ("import contextlib, io, json, sys\n"
            "from burstlens.service.cli import main\n"
            "out, err = io.StringIO(), io.StringIO()\n"
            "with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):\n"
            "    try:\n"
            f"        status = main({list(argv)!r})\n"
            "    except SystemExit as exc:\n"
            "        status = exc.code\n"
            "prefix = 'burstlens.service.commands.'\n"
            "print(json.dumps({'status': status, 'stdout': out.getvalue(), 'stderr': err.getvalue(),\n"
            "    'modules': sorted(m[len(prefix):] for m in sys.modules if m.startswith(prefix)),\n"
            "    'numpy': 'numpy' in sys.modules, 'scipy': 'scipy' in sys.modules}))\n")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    return json.loads(done.stdout)


@pytest.mark.parametrize("argv, status", [(["--help"], 0), ([], 2)], ids=["--help", "no command"])
def test_listing_the_commands_imports_no_command_module(argv, status):
    """Property: ``burstlens --help`` (exit 0) and ``burstlens`` alone (help, exit 2) list every
    command with its one-line help while importing none of the command modules, nor numpy or
    scipy (the modules import those at their top; a listing must not pay for them)."""
    from burstlens.service.cli import COMMANDS as REGISTERED

    ran = _run_cli(argv)
    assert ran["status"] == status
    assert ran["modules"] == [], ran["modules"]
    assert not ran["numpy"] and not ran["scipy"]
    words = " ".join(ran["stdout"].split())  # --help wraps long lines
    for name, command in REGISTERED.items():
        assert f"{name} {command.help}" in words, name


def test_a_command_imports_its_module_alone():
    """Property: ``burstlens backup --help`` builds backup's parser by importing backup's module
    and none of the other commands' modules, and prints backup's own help (its DEST argument)."""
    ran = _run_cli(["backup", "--help"])
    assert ran["status"] == 0
    assert ran["modules"] == ["backup"], ran["modules"]
    assert "usage: burstlens backup" in ran["stdout"] and "DEST" in ran["stdout"]


def test_the_listing_does_not_depend_on_the_modules_loaded():
    """Property: ``burstlens --help`` built without any command module is, character for
    character, the page built with all of them, in the order of :data:`COMMANDS`; and every
    module's ``register`` gives its command a description of its own (the page of
    ``burstlens COMMAND --help``). Common practice for a lazily loaded command line."""
    from burstlens.service.cli import COMMANDS as REGISTERED

    def listed(parser):
        (action,) = (a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
        return [(a.dest, a.help) for a in action._choices_actions], action.choices

    full = build_parser()
    rows, parsers = listed(full)
    assert rows == [(name, c.help) for name, c in REGISTERED.items()]
    assert build_parser([]).format_help() == full.format_help()
    for name, parser in parsers.items():
        assert parser.description and len(parser.description) > 20, name
        assert not listed(build_parser([]))[1][name].description, name  # only listed, not built


def test_an_unknown_command_is_refused_by_name():
    """An unknown command word exits 2 naming it (argparse's "invalid choice"), without
    importing any command module; ``build_parser`` refuses one with a ValueError naming it."""
    ran = _run_cli(["tunne", "x.wav"])
    assert ran["status"] == 2 and ran["modules"] == []
    assert "invalid choice: 'tunne'" in ran["stderr"]
    with pytest.raises(ValueError, match="tunne"):
        build_parser(["tunne"])


def test_a_reader_that_leaves_early_gets_no_traceback():
    """`burstlens … | head -1`: when the reader of stdout closes the
    pipe, the command stops with status 1 and no traceback (Python docs, "Note on SIGPIPE")."""
    import subprocess
    import sys

    code = ("import sys\n"
            "from burstlens.service.cli import main\n"
            "from burstlens.service.commands import tokens\n"
            "def chatty(args):\n"
            "    for i in range(100000):\n"
            "        print('line', i)\n"
            "    return 0\n"
            "tokens.run = chatty\n"
            "sys.exit(main(['tokens', 'list']))\n")
    proc = subprocess.Popen([sys.executable, "-c", code], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE)
    assert proc.stdout.readline() == b"line 0\n"
    proc.stdout.close()
    stderr = proc.stderr.read().decode()
    assert proc.wait(timeout=60) == 1 and "Traceback" not in stderr, stderr
