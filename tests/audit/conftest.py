"""A real lab folder with orders processed by the engine, for verify and explain."""
from __future__ import annotations

import copy
import json

import pytest

from engine.config import LabConfig
from engine.host import start_host
from engine.inbox import Lab, init_lab


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
