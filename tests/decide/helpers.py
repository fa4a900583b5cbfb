"""Orders and labs for the decision tests: a lab that has a result in review/ and a held version."""
from __future__ import annotations

import copy
import json
from pathlib import Path
from typing import Any

from lenslane.audit.log import iter_records
from tests.conftest import BASE_ORDER


def review_order(order_id: str) -> dict[str, Any]:
    """A progressive order whose right fitting height leaves too little room for the corridor: flag
    ``fitting-height-low`` at level review holds it for a person."""
    order = copy.deepcopy(BASE_ORDER)
    order["order_id"] = order_id
    order["lens"]["design"] = "progressive"
    order["rx"]["right"]["add"] = order["rx"]["left"]["add"] = 2.0
    order["fit"]["right"]["height_mm"] = 12.0
    return order


def ready_order(order_id: str, sphere: float = -1.00) -> dict[str, Any]:
    order = copy.deepcopy(BASE_ORDER)
    order["order_id"] = order_id
    order["rx"]["right"]["sphere"] = sphere
    return order


def records(lab: Path, event: str, order_id: str | None = None) -> list[dict[str, Any]]:
    return [r for r in iter_records(lab) if r.get("event") == event and (order_id is None or r.get("order_id") == order_id)]


def load(path: Path) -> Any:
    return json.loads(path.read_bytes())
