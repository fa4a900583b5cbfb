"""Every Examples section in the optics library and the stages runs and gives what it shows."""
from __future__ import annotations

import doctest
import importlib
import pkgutil

import pytest

import plugins
import plugins.optics

MODULES = sorted(
    [f"plugins.optics.{m.name}" for m in pkgutil.iter_modules(plugins.optics.__path__)]
    + [f"plugins.{m.name}" for m in pkgutil.iter_modules(plugins.__path__) if not m.ispkg]
    + ["engine.precision", "engine.stage"]
)


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples(name):
    module = importlib.import_module(name)
    failures, _ = doctest.testmod(module, optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE)
    assert failures == 0


def test_the_optics_library_has_examples():
    finder = doctest.DocTestFinder()
    examples = sum(len(t.examples) for name in MODULES if name.startswith("plugins.optics.")
                   for t in finder.find(importlib.import_module(name)))
    assert examples > 40
