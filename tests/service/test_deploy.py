"""What can be checked of deploy/ without a container engine or systemd on this machine.

Every command the deploy files run must exist and accept the options written there; every
BURSTLENS_* setting the example environment file names must be one the service reads, and every
one the service reads must be in it.
"""
from __future__ import annotations

import json
import os
import re
import shlex
import subprocess
import sys
from pathlib import Path

import pytest
import yaml

from burstlens.service.config import ServiceSettings

ROOT = Path(__file__).resolve().parents[2]
DEPLOY = ROOT / "deploy"
UNITS = sorted((DEPLOY / "systemd").glob("*.service"))
VENV_BIN = Path(sys.executable).parent
INSTALLED_BIN = "/opt/burstlens/venv/bin/"  # where the guide installs the virtualenv

ENV_NAME = re.compile(r"^#?\s*(BURSTLENS_[A-Z][A-Z0-9_]*)=(.*)$")
ENV_LITERAL = re.compile(r"BURSTLENS_[A-Z][A-Z0-9_]*")


def check_argv(argv: list[str]) -> None:
    """Fail unless ``argv`` is a ``burstlens`` or ``dask`` command line whose sub-command exists
    and whose every option parses (parsed without running anything), and ``… --help`` exits 0."""
    program = Path(argv[0]).name
    assert program in ("burstlens", "dask"), f"unexpected program {argv[0]!r} in {argv}"
    sub, options = argv[1], argv[2:]
    if program == "burstlens":
        from burstlens.service.cli import build_parser

        args = build_parser().parse_args([sub, *options])  # exits 2 on an unknown option
        assert getattr(args, "func", None), f"burstlens {sub}: no command runs for {argv}"
        exe = str(VENV_BIN / "burstlens")
    else:
        from distributed.cli.dask_scheduler import main as dask_scheduler
        from distributed.cli.dask_worker import main as dask_worker

        command = {"scheduler": dask_scheduler, "worker": dask_worker}.get(sub)
        assert command is not None, f"dask {sub}: not a Dask cluster command ({argv})"
        command.make_context(f"dask {sub}", list(options))  # raises on an unknown option
        exe = str(VENV_BIN / "dask")
    done = subprocess.run([exe, sub, *options, "--help"], capture_output=True, text=True,
                          timeout=60)
    assert done.returncode == 0, f"{argv} --help exited {done.returncode}: {done.stderr}"


def compose() -> dict:
    return yaml.safe_load((DEPLOY / "compose.yaml").read_text(encoding="utf-8"))


def test_compose_parses_and_runs_existing_commands():
    """compose.yaml is valid YAML with the API, a Dask scheduler and Dask workers; each service's
    command is a real sub-command with valid options; the API's --dask names the scheduler
    service and port; the data dir is a named volume (Compose file format; common practice)."""
    doc = compose()
    services = doc["services"]
    assert {"api", "dask-scheduler", "dask-worker"} <= set(services)
    for name, service in services.items():
        assert isinstance(service["command"], list), f"{name}: command must be an exec-form list"
        check_argv(service["command"])
    api = services["api"]["command"]
    scheduler = services["dask-scheduler"]["command"]
    port = scheduler[scheduler.index("--port") + 1]
    assert api[:2] == ["burstlens", "serve"]
    assert api[api.index("--dask") + 1] == f"tcp://dask-scheduler:{port}"
    assert services["dask-worker"]["command"][2] == f"tcp://dask-scheduler:{port}"
    assert services["dask-worker"]["deploy"]["replicas"] >= 2
    volume = services["api"]["volumes"][0].split(":")
    assert volume[0] in doc["volumes"]
    assert volume[1] == services["api"]["environment"]["BURSTLENS_DATA_DIR"]


def test_dockerfile_runs_the_service_as_a_user_with_a_health_check():
    """Dockerfile: slim Python base, non-root USER, the data dir as a VOLUME, a HEALTHCHECK on
    /v1/health, a `pip install .` of the project and nothing fetched at run time; its CMD is a
    real `burstlens` command (Dockerfile reference; common practice)."""
    text = (DEPLOY / "Dockerfile").read_text(encoding="utf-8")
    lines = [ln.strip() for ln in text.splitlines() if ln.strip() and not ln.lstrip().startswith("#")]
    assert re.match(r"FROM python:3\.\d+-slim", lines[0])
    users = [ln.split()[1] for ln in lines if ln.startswith("USER ")]
    assert users and users[-1] not in ("root", "0")
    data_dir = re.search(r"BURSTLENS_DATA_DIR=(\S+)", text).group(1)
    volumes = [json.loads(ln[len("VOLUME"):]) for ln in lines if ln.startswith("VOLUME")]
    assert [data_dir] in volumes
    health = " ".join(ln for ln in lines if "/v1/health" in ln)
    assert "HEALTHCHECK" in text and "/v1/health" in health
    installs = re.findall(r"pip install ([^&\n]+)", text)
    assert [i.strip() for i in installs] == ["."], installs
    assert not re.search(r"\b(curl|wget|ADD)\b", "\n".join(lines))
    cmd = json.loads([ln for ln in lines if ln.startswith("CMD [")][-1][4:])  # not HEALTHCHECK's
    check_argv(cmd)


def read_example() -> dict[str, str]:
    """NAME → value (commented-out entries have value None) of burstlens.env.example."""
    names: dict[str, str | None] = {}
    lines = (DEPLOY / "burstlens.env.example").read_text(encoding="utf-8").splitlines()
    for i, line in enumerate(lines):
        match = ENV_NAME.match(line.strip())
        if match:
            name, value = match.groups()
            assert name not in names, f"{name} is listed twice"
            assert i > 0 and lines[i - 1].startswith("#"), f"{name} has no comment above it"
            names[name] = None if line.startswith("#") else value
    return names


def settings_the_service_reads() -> set[str]:
    """BURSTLENS_* names of ServiceSettings' fields plus every literal BURSTLENS_* name in the
    service's source (e.g. the client token `submit` reads)."""
    prefix = ServiceSettings.model_config["env_prefix"]
    names = {prefix + field.upper() for field in ServiceSettings.model_fields}
    for path in (ROOT / "service").rglob("*.py"):
        names |= set(ENV_LITERAL.findall(path.read_text(encoding="utf-8")))
    return names


def test_env_example_names_exactly_the_settings_the_service_reads(monkeypatch):
    """Every BURSTLENS_* name in deploy/burstlens.env.example is read by the service and every
    one it reads is documented there; its active values load into ServiceSettings
    (pydantic-settings environment parsing)."""
    example = read_example()
    read = settings_the_service_reads()
    assert set(example) - read == set(), "named in the example but not read by the service"
    assert read - set(example) == set(), "read by the service but missing from the example"
    for name in [n for n in os.environ if n.startswith("BURSTLENS_")]:
        monkeypatch.delenv(name)
    for name, value in example.items():
        if value is not None:
            monkeypatch.setenv(name, value)
    settings = ServiceSettings()
    assert str(settings.data_dir) == example["BURSTLENS_DATA_DIR"]
    assert settings.max_body_bytes == int(example["BURSTLENS_MAX_BODY_BYTES"])


def exec_start(unit: Path) -> list[str]:
    """The ExecStart command line of a unit, with the installed venv path mapped to this one."""
    lines = [ln for ln in unit.read_text(encoding="utf-8").splitlines() if ln.startswith("ExecStart=")]
    assert len(lines) == 1, f"{unit.name}: expected one ExecStart line"
    argv = shlex.split(lines[0][len("ExecStart="):])
    assert argv[0].startswith(INSTALLED_BIN), f"{unit.name}: runs {argv[0]}, not the venv"
    return argv


def test_the_four_units_exist():
    """The API, job worker, Dask worker and Dask scheduler each have a unit (common practice)."""
    assert {u.name for u in UNITS} == {"burstlens-serve.service", "burstlens-worker.service",
                                      "burstlens-dask-worker.service",
                                      "burstlens-dask-scheduler.service"}


@pytest.mark.parametrize("unit", UNITS, ids=[u.name for u in UNITS])
def test_systemd_exec_start_runs_with_help(unit):
    """Each unit's ExecStart, run from this virtualenv with --help, exits 0 and its options parse;
    the unit runs as an unprivileged user (systemd.exec(5); common practice)."""
    argv = exec_start(unit)
    check_argv([Path(argv[0]).name, *argv[1:]])
    text = unit.read_text(encoding="utf-8")
    user = re.search(r"^User=(\S+)$", text, re.M)
    assert user and user.group(1) != "root"
    if Path(argv[0]).name == "burstlens":
        assert "EnvironmentFile=/etc/burstlens/burstlens.env" in text


# `burstlens X` where a command starts: a line (maybe after sudo), a `code span`, a path ending in
# bin/, or `docker compose run --rm SERVICE`; not an argument such as `-g burstlens deploy/...`
COMMAND_USE = re.compile(r"(?:^\s*(?:sudo (?:-u \S+ )?)?|`|bin/|--rm \S+ )burstlens ([a-z][a-z-]*)")


def code_of(text: str, markdown: bool) -> list[str]:
    """The code in a text: `spans` anywhere, plus indented or fenced lines (Markdown) or every
    non-comment line (configuration files)."""
    code, fenced = [], False
    for line in text.splitlines():
        if markdown and line.lstrip().startswith("```"):
            fenced = not fenced
            continue
        code += re.findall(r"`([^`]+)`", line)
        if markdown:
            if fenced or line.startswith("    "):
                code.append(line)
        elif not line.lstrip().startswith("#"):
            code.append(line)
    return code


def test_every_burstlens_command_in_the_guide_exists():
    """Every `burstlens X` command written in deploy/README.md and the deploy files is a real
    sub-command: `burstlens X --help` exits 0 (common practice: documentation that runs)."""
    sources = [(DEPLOY / "README.md", True), (DEPLOY / "Dockerfile", False),
               (DEPLOY / "compose.yaml", False), *[(u, False) for u in UNITS]]
    used = set()
    for path, markdown in sources:
        for line in code_of(path.read_text(encoding="utf-8"), markdown):
            used |= set(COMMAND_USE.findall(line))
    assert {"serve", "tokens", "submit"} <= used, used
    for sub in sorted(used):
        done = subprocess.run([str(VENV_BIN / "burstlens"), sub, "--help"], capture_output=True,
                              text=True, timeout=60)
        assert done.returncode == 0, f"`burstlens {sub}` in the deploy docs: {done.stderr}"
