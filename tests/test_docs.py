"""The examples in the package's docstrings run and print what they say (doctest).

They are collected from the installed package (not the source tree, which holds no compiled
kernels in CI).
"""

import doctest
import importlib

import pytest

MODULES = ["mcexact.fit", "mcexact.diagnostics", "mcexact.plots"]


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples(name):
    if name == "mcexact.plots":
        pytest.importorskip("matplotlib").use("Agg")
    module = importlib.import_module(name)
    result = doctest.testmod(module, optionflags=doctest.NORMALIZE_WHITESPACE | doctest.ELLIPSIS)
    assert result.attempted > 0, f"{name} has no examples to run"
    assert result.failed == 0, f"{result.failed} of {result.attempted} examples failed in {name}"
