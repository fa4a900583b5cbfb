"""What the audit log says about one order, for deciding on it.

Only the order's own records are read, found through the audit index
(:class:`lenslane.audit.index.Index`).
"""
from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from lenslane.audit.index import Index, level_index
from lenslane.audit.results import Placed, ResultFiles


@dataclass
class OrderLog:
    order_id: str
    known: bool = False
    results: ResultFiles = field(default_factory=ResultFiles)  # this order's result files only
    revision: int = 1  # of the latest version published
    decisions: list[dict[str, Any]] = field(default_factory=list)  # ``decided`` records, oldest first
    held: dict[str, str] = field(default_factory=dict)  # held/<name> → sha256 of the bytes received
    last_outcome: dict[str, Any] | None = None

    def current(self) -> tuple[str, Placed] | None:
        """The order's latest result still in outbox/ or review/ as far as the log knows."""
        live = [(path, placed) for path, placed in self.results.files.items()
                if path in (f"outbox/{self.order_id}.json", f"review/{self.order_id}.json")]
        return max(live, key=lambda item: item[1].seq) if live else None

    def decided_by_request(self, request: str) -> dict[str, Any] | None:
        return next((d for d in self.decisions if d.get("request") == request), None)


def order_log(lab_root: Path, order_id: str, index: Index | None = None) -> OrderLog:
    """What the log says about ``order_id``; ``index``: the lab's audit index, when the caller has it open."""
    with level_index(lab_root, index) as index:
        return _order_log(index, order_id)


def _order_log(index: Index, order_id: str) -> OrderLog:
    state = OrderLog(order_id)
    received: dict[Any, str] = {}  # claim (or file) → sha256 of the bytes received
    for record in filter(None, map(index.read, index.places_of_order(order_id))):
        if record.get("order_id") != order_id:
            continue
        state.known = True
        event = record.get("event")
        state.results.add(record, f"seq {record['seq']}")
        arrived = record.get("received") if isinstance(record.get("received"), dict) else record  # one record per pass
        if event == "received" or arrived is not record:
            received[arrived.get("claim") or arrived.get("file")] = str(arrived.get("sha256"))
        if event == "held" and isinstance(record.get("input"), str):
            state.held[record["input"]] = received.get(arrived.get("claim") or arrived.get("file"), "")
            state.last_outcome = record
        elif event == "decided":
            state.decisions.append(record)
            for move in record.get("moves") or ():
                state.held.pop(str(move.get("from")), None)
        elif event in ("published", "rejected", "skipped"):
            state.last_outcome = record
            if event == "published":
                state.revision = int(record.get("revision") or 1)
    return state
