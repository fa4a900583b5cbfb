"""Every Examples section in the optics library and the stages runs and gives what it shows."""
from __future__ import annotations

import doctest
import importlib
import pkgutil

import pytest

import lenslane.plugins
import lenslane.plugins.optics

MODULES = sorted(
    [f"lenslane.plugins.optics.{m.name}" for m in pkgutil.iter_modules(lenslane.plugins.optics.__path__)]
    + [f"lenslane.plugins.{m.name}" for m in pkgutil.iter_modules(lenslane.plugins.__path__) if not m.ispkg]
    + ["lenslane.contract.precision", "lenslane.chain.stage"]
)


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples(name):
    module = importlib.import_module(name)
    failures, _ = doctest.testmod(module, optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE)
    assert failures == 0


def test_the_optics_library_has_examples():
    finder = doctest.DocTestFinder()
    examples = sum(len(t.examples) for name in MODULES if name.startswith("lenslane.plugins.optics.")
                   for t in finder.find(importlib.import_module(name)))
    assert examples > 40
