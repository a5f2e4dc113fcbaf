"""The examples in the public docstrings run and print what they show (doctest)."""
import doctest
import importlib

import pytest

# Modules whose public docstrings carry ``>>>`` examples; each must keep at least one.
MODULES = [
    "burstlens.search.tfd",
    "burstlens.search.corpus.ingest",
    "burstlens.search.filterbank",
    "burstlens.search.optimize",
]
FLAGS = doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples_print_what_they_show(name):
    """The module has at least one docstring example, and every example's output matches the
    output shown beside it (Python standard library ``doctest.testmod``; ``...`` stands for
    any text, runs of whitespace compare equal). A failing example's report is printed."""
    result = doctest.testmod(importlib.import_module(name), optionflags=FLAGS)
    assert result.attempted > 0, f"{name}: no docstring examples"
    assert result.failed == 0, f"{name}: {result.failed} of {result.attempted} examples failed"
