"""What the web page reads of a lab besides one order's story: today's counts and the search.

Both read the audit log (:func:`lenslane.audit.log.iter_records`), the lab's one
source of truth, and nothing else, walking it from the start (in either of its
formats: one record per pass, or the first one's record per event).
"""
from __future__ import annotations

from collections import Counter
from datetime import date, datetime
from pathlib import Path
from typing import Any, NamedTuple

from lenslane.audit.log import iter_records
from lenslane.vocabulary import OUTCOMES

#: At most this many search hits are listed.
SEARCH_LIMIT = 100


def _local_day(timestamp: str | None) -> date | None:
    try:
        return datetime.fromisoformat(str(timestamp).replace("Z", "+00:00")).astimezone().date()
    except ValueError:
        return None


def counts_today(lab_root: Path, today: date | None = None) -> dict[str, int]:
    """What became of orders today (the lab's local day), from the audit log.

    ``published``: results made without a person plus results a person
    approved; ``review``: results that went to review; ``rejected``: orders
    refused by the engine plus results a person refused; ``held``: versions of
    published orders held for a person.
    """
    today = today or date.today()
    counted: Counter[str] = Counter()
    for record in iter_records(Path(lab_root)):
        event = record.get("event")
        if event not in OUTCOMES and event != "decided" or _local_day(record.get("ts")) != today:
            continue
        if event == "published":
            counted["review" if record.get("status") == "review" else "published"] += 1
        elif event == "decided":
            counted[{"approve": "published", "refuse": "rejected"}.get(record.get("action"), "")] += 1
        else:
            counted[event] += 1
    return {outcome: counted[outcome] for outcome in ("published", "review", "rejected", "held")}


class Hit(NamedTuple):
    """One input the log knows, matching a search: its order id (None when unreadable), file name, last outcome."""

    order_id: str | None
    file: str
    outcome: str
    recorded_at: str

    @property
    def link_id(self) -> str:
        """What the order page is found by: the order id, or for an order refused its file's stem (the id a
        refused order names is only what it said; its file is the pass itself)."""
        return Path(self.file).stem if self.outcome == "rejected" or not self.order_id else self.order_id


def search(lab_root: Path, text: str) -> list[Hit]:
    """Inputs whose order id or input file name contains ``text`` (case-insensitive), newest first."""
    wanted = text.strip().lower()
    if not wanted:
        return []
    found: dict[tuple[str | None, str], dict[str, Any]] = {}
    files: dict[Any, tuple[str | None, str]] = {}
    for record in iter_records(Path(lab_root)):
        event = record.get("event")
        arrived = record.get("received")
        if isinstance(arrived, dict):  # one record per pass: what arrived is in its outcome's record
            key = (record.get("order_id"), str(arrived.get("file") or ""))
            if event in OUTCOMES and (wanted in str(key[0] or "").lower() or wanted in key[1].lower()):
                found[key] = {"outcome": record.get("status") or event, "ts": record.get("ts") or ""}
        elif event == "received":  # the first format: a record per event
            key = (record.get("order_id"), str(record.get("file") or ""))
            files[record.get("claim")] = key
            if wanted in str(key[0] or "").lower() or wanted in key[1].lower():
                found[key] = {"outcome": "unfinished", "ts": record.get("ts") or ""}
        elif event in OUTCOMES:
            key = files.get(record.get("claim"), (record.get("order_id"), str(record.get("file") or "")))
            if key in found:
                found[key] = {"outcome": record.get("status") or event, "ts": record.get("ts") or ""}
    hits = [Hit(order_id, file, seen["outcome"], seen["ts"]) for (order_id, file), seen in found.items()]
    hits.sort(key=lambda hit: hit.recorded_at, reverse=True)
    return hits[:SEARCH_LIMIT]
