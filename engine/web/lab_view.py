"""What the web page reads of a lab besides one order's story: today's counts and the search.

Both are answered by the lab's audit index (:class:`lenslane.audit.index.Index`),
derived from the audit log — the lab's one source of truth — and first brought
level with it, so neither reads the log from its start, however long it is.
They read records in either of the log's formats (one record per pass, or the
first one's record per event).
"""
from __future__ import annotations

from collections import Counter
from datetime import date, datetime, time, timedelta, timezone
from pathlib import Path
from typing import NamedTuple

from lenslane.audit.index import level_index

#: At most this many search hits are listed.
SEARCH_LIMIT = 100


def _utc_start(day: date) -> str:
    """The lab's local midnight starting ``day``, as a record's UTC time is written."""
    return datetime.combine(day, time.min).astimezone().astimezone(timezone.utc).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def counts_today(lab_root: Path, today: date | None = None) -> dict[str, int]:
    """What became of orders today (the lab's local day), from the audit index.

    ``published``: results made without a person plus results a person
    approved; ``review``: results that went to review; ``rejected``: orders
    refused by the engine plus results a person refused; ``held``: versions of
    published orders held for a person.
    """
    today = today or date.today()
    with level_index(lab_root) as index:
        tally = index.outcomes_between(_utc_start(today), _utc_start(today + timedelta(days=1)))
    counted: Counter[str] = Counter()
    for event, status, n in tally:
        if event == "published":
            counted["review" if status == "review" else "published"] += n
        elif event == "decided":
            counted[{"approve": "published", "refuse": "rejected"}.get(status or "", "")] += n
        else:
            counted[event] += n
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
    """Inputs whose order id or input file name contains ``text`` (in any case; a text of one or two characters
    must be a whole id or name), newest first, from the audit index."""
    wanted = text.strip()
    if not wanted:
        return []
    with level_index(lab_root) as index:
        found = index.search(wanted, SEARCH_LIMIT)
    return [Hit(order_id, name or "", "unfinished" if event == "received" else status or event, ts or "")
            for order_id, name, event, status, ts in found]
