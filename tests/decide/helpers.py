"""Orders and labs for the decision tests: a lab that has a result in review/ and a held version."""
from __future__ import annotations

import copy
import json
from pathlib import Path
from typing import Any

from lenslane.audit.log import DEFINE_EVENT, iter_records, unpack
from lenslane.audit.records import ref_of
from tests.conftest import BASE_ORDER
from tests.system.driver import FAST_WATCH


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
    """The log's records of an event, each with its story and run filled in (the run's fields also on top).

    Read from the log alone: a running engine writes its index just after the log, so a record read here
    may not be in the index yet.
    """
    log = list(iter_records(lab))
    # A define is referred to by its seq (and, in the second format, by the first digits of its sha256).
    bodies = {ref: r["body"] for r in log if r.get("event") == DEFINE_EVENT for ref in (r["seq"], ref_of(r["sha256"]))}
    found = [r for r in log if r.get("event") == event and (order_id is None or r.get("order_id") == order_id)]
    whole = [unpack(r, bodies.__getitem__) for r in found]
    return [{**r["run"], **r} if isinstance(r.get("run"), dict) else r for r in whole]


def load(path: Path) -> Any:
    return json.loads(path.read_bytes())


def config_text(extra: str = "", **watch: Any) -> str:
    """A lab config: the test labs' watch settings (with ``watch`` changed), then ``extra``."""
    lines = ["[watch]"] + [f"{key} = {json.dumps(value)}" for key, value in {**FAST_WATCH, **watch}.items()]
    return "\n".join(lines) + "\n" + extra
