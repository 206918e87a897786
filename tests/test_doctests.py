"""Run every docstring example of the package, so the documentation never rots."""

import doctest
import importlib
import pkgutil

import pytest

import galerkit
import galerkit.bindings

MODULES = sorted(
    {m.name for m in pkgutil.walk_packages(galerkit.__path__, "galerkit.")}
    | {m.name for m in pkgutil.walk_packages(galerkit.bindings.__path__, "galerkit.bindings.")}
)


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples_run(name):
    module = importlib.import_module(name)
    result = doctest.testmod(module, optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE)
    assert result.failed == 0, f"{result.failed} docstring example(s) failed in {name}"
