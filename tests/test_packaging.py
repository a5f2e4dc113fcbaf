"""Packaging: burstlens installs under one namespace, ``burstlens.search`` and
``burstlens.service``, from the folders search/ and service/ (pyproject ``package-dir``), so a
project of its own with a ``search`` or ``service`` package never meets ours (Python Packaging
User Guide, "Packaging namespace packages"; common practice: one distribution, one import
name)."""
from __future__ import annotations

import json
import subprocess
import sys
import tomllib
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def _setuptools_table() -> dict:
    return tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["setuptools"]


def test_every_package_folder_is_installed_under_burstlens():
    """Each folder of search/ and service/ holding an __init__.py is listed as a package, under
    the burstlens namespace, so the wheel carries every module the code imports; the only other
    packages listed are data folders with their files named in package-data."""
    table = _setuptools_table()
    folders = {f"burstlens.{p.parent.relative_to(ROOT).as_posix().replace('/', '.')}"
               for top in ("search", "service") for p in (ROOT / top).rglob("__init__.py")}
    data = set(table["packages"]) - folders
    assert folders <= set(table["packages"])
    assert data <= set(table["package-data"]), data
    for name in data:
        folder = ROOT / name.removeprefix("burstlens.").replace(".", "/")
        assert not (folder / "__init__.py").exists()
        assert any(folder.glob(pattern) for pattern in table["package-data"][name]), name
    assert table["package-dir"] == {"burstlens.search": "search", "burstlens.service": "service"}


def test_an_unrelated_project_does_not_find_our_top_level_names(tmp_path):
    """Run from a folder that is not the repository: ``search`` and ``service`` are not ours to
    import, ``burstlens.search`` and ``burstlens.service`` are, and they are these folders."""
    code = ("import importlib.util as u, json\n"
            "print(json.dumps({n: (s.origin if (s := u.find_spec(n)) else None) for n in "
            "('search', 'service', 'burstlens.search', 'burstlens.service')}))")
    out = subprocess.run([sys.executable, "-c", code], cwd=tmp_path, capture_output=True,
                         text=True, check=True, timeout=60)
    found = json.loads(out.stdout)
    for name in ("search", "service"):
        assert found[name] is None or not found[name].startswith(str(ROOT)), found
    assert found["burstlens.search"] == str(ROOT / "search" / "__init__.py")
    assert found["burstlens.service"] == str(ROOT / "service" / "__init__.py")
