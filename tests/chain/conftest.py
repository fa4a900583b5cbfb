"""Fixtures that install plugin distributions (see :mod:`plugin_dists`)."""
from __future__ import annotations

import itertools
import os
from pathlib import Path

import pytest
from plugin_dists import write_distribution, write_example_distribution

from lenslane.chain.host import PLUGINS_VARIABLE

_unique = itertools.count(1)


@pytest.fixture
def install_plugin(tmp_path, monkeypatch):
    """Install a one-module plugin distribution into this process; returns its module name.

    ``install_plugin(entry_name, source, project=..., version=...)``. Each call
    gets a new module name, so a module cached by an earlier test is never reused.
    """
    site = tmp_path / "site"
    site.mkdir()
    monkeypatch.syspath_prepend(str(site))

    def install(entry_name: str, source: str, project: str | None = None, version: str = "0.1.0") -> str:
        module = f"lenslane_test_plugin_{next(_unique)}_{os.getpid()}"
        (site / f"{module}.py").write_text(source, encoding="utf-8")
        write_distribution(site, project or f"lenslane-test-{entry_name.replace('_', '-')}", version,
                           {entry_name: module})
        # Installed plugins load only by name in the engine's tests (see tests/conftest.py): this one is asked for,
        # by its name and module, so a plugin of the same name installed in the environment is not loaded with it.
        wanted = [n for n in os.environ.get(PLUGINS_VARIABLE, "").split(",") if n]
        monkeypatch.setenv(PLUGINS_VARIABLE, ",".join([*wanted, f"{entry_name}={module}"]))
        return module

    return install


@pytest.fixture
def example_site(tmp_path) -> Path:
    """A folder that, with the example's ``src``, makes the example plugin installed for a child process."""
    site = tmp_path / "example-site"
    site.mkdir()
    write_example_distribution(site)
    return site
