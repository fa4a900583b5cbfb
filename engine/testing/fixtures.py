"""pytest fixtures for plugin authors, registered through the ``pytest11`` entry point ``lenslane``.

- ``lenslane_order``: a fresh valid order dict (:func:`lenslane.testing.sample_order`);
- ``lenslane_lab``: ``lenslane_lab(config=None)`` makes a :class:`lenslane.testing.TemporaryLab`
  in the test's temporary folder (``config``: the text of its ``lenslane.toml``).
"""
from __future__ import annotations

from pathlib import Path
from typing import Any, Callable

import pytest

from lenslane.testing import TemporaryLab, sample_order


@pytest.fixture
def lenslane_order() -> dict[str, Any]:
    """A valid, mild single-vision order of an invented practice; change it freely."""
    return sample_order()


@pytest.fixture
def lenslane_lab(tmp_path: Path) -> Callable[..., TemporaryLab]:
    """``lenslane_lab(config=None)``: a new lab folder, set up by ``lenslane init``, in ``tmp_path``."""
    made = iter(range(1, 1000))

    def make(config: str | None = None) -> TemporaryLab:
        return TemporaryLab(tmp_path / f"lab-{next(made)}", config)

    return make
