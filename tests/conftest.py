"""Shared fixtures: a minimal valid order of the invented practice, a host on the default config, real lab folders."""
from __future__ import annotations

import copy
import json
import os
from pathlib import Path

import pytest

from lenslane.chain.host import NO_AUTOLOAD_VARIABLE, PLUGINS_VARIABLE, start_host
from lenslane.config import LabConfig
from lenslane.lab.folder import Lab, init_lab

# The engine's own tests run the built-in plugins only, here and in the processes they start, so a plugin
# installed in this environment changes no outcome. A test that wants installed plugins asks for them.
os.environ[NO_AUTOLOAD_VARIABLE] = "1"
os.environ.pop(PLUGINS_VARIABLE, None)

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
    return start_host(LabConfig())


def run_order(host, data):
    """Validate ``data`` and run it through the host's chain; returns the result dict."""
    from lenslane.contract.intake import read_order
    from lenslane.chain.pipeline import Pipeline

    order, parsed = read_order(json.dumps(data).encode(), host.settings.materials)
    return Pipeline(host).run(order, parsed).result


# -- a real lab folder with orders processed by the engine ---------------------------------------


@pytest.fixture
def make_lab(tmp_path):
    """``make_lab(config=None)`` → an initialised :class:`Lab` in ``tmp_path/lab``."""

    def make(config: dict | None = None) -> Lab:
        root = tmp_path / "lab"
        init_lab(root)
        # No quiet time: the tests write each order whole before the lab looks at it.
        settings = {"watch": {"quiet_seconds": 0.0}} | (config or {})
        return Lab(root, start_host(LabConfig.model_validate(settings)))

    return make


@pytest.fixture
def drop():
    """``drop(lab, order, name=None)`` writes an order into the inbox and returns its bytes."""

    def write(lab: Lab, order: dict, name: str | None = None) -> bytes:
        data = json.dumps(order, indent=1).encode()
        (lab.inbox / (name or f"{order['order_id']}.json")).write_bytes(data)
        return data

    return write


@pytest.fixture
def busy_lab(make_lab, drop, order_dict):
    """A lab that has published five orders and rejected one."""
    lab = make_lab()
    for number in range(1, 6):
        order = copy.deepcopy(order_dict)
        order["order_id"] = f"TST-{number:04d}"
        drop(lab, order)
    drop(lab, {"format": "lens-order/1", "order_id": "TST-BAD"}, "TST-BAD.json")
    done = lab.drain()
    assert [p.outcome for p in done].count("published") == 5
    return lab
