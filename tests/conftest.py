"""Shared fixtures: a minimal valid order of the invented practice, and a host on the default config."""
from __future__ import annotations

import copy
import json
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parent.parent
SAMPLES = REPO / "inbox_samples"

# An invented practice and wearer code; no real person or business.
BASE_ORDER = {
    "format": "lens-order/1",
    "order_id": "TST-0001",
    "account": "test-practice",
    "rx": {"right": {"sphere": -1.00, "cylinder": -0.50, "axis": 90},
           "left": {"sphere": -1.25}},
    "lens": {"design": "single_vision", "material": "resin-1.50"},
    "frame": {"box_width_mm": 52.0, "box_height_mm": 38.0, "bridge_mm": 18.0},
    "fit": {"right": {"pd_mm": 32.0}, "left": {"pd_mm": 32.0}},
}


@pytest.fixture
def order_dict():
    """A fresh, valid, mild single-vision order (a deep copy each time)."""
    return copy.deepcopy(BASE_ORDER)


@pytest.fixture(scope="session")
def default_host():
    from engine.config import LabConfig
    from engine.host import start_host

    return start_host(LabConfig())


def run_order(host, data):
    """Validate ``data`` and run it through the host's chain; returns the result dict."""
    from engine.intake import read_order
    from engine.pipeline import Pipeline

    order, parsed = read_order(json.dumps(data).encode(), host.settings.materials)
    return Pipeline(host).run(order, parsed).result
