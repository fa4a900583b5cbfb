"""A lab with the sample orders processed by the engine, for the web page's tests."""
from __future__ import annotations

import json
import shutil

import pytest

from tests.conftest import SAMPLES

#: The samples the web tests use: a compensated progressive with prism, one that is held for review, a rejected one.
WEB_SAMPLES = ("progressive-minus-tilt-vertex-prism.json", "sv-sport-wrap.json", "sv-minus-mild.json",
               "rejected-unknown-material.json")


@pytest.fixture
def sample_lab(make_lab):
    """A lab that has processed :data:`WEB_SAMPLES` (file names kept), and the results it published by order id."""
    lab = make_lab()
    for name in WEB_SAMPLES:
        shutil.copy(SAMPLES / name, lab.inbox / name)
    lab.drain()
    results = {}
    for folder in ("outbox", "review"):
        for path in sorted((lab.root / folder).glob("*.json")) if (lab.root / folder).is_dir() else ():
            results[path.stem] = json.loads(path.read_text())
    assert "DP-1000" in results
    return lab, results
