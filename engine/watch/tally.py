"""What the loop tells: one log line per order made final, and the counts behind ``--once``'s summary."""
from __future__ import annotations

import time
from collections import Counter
from typing import Any

from lenslane.lab.outcomes import Processed


class Tally:
    """Counts outcomes and writes the ``order`` line of each, with the milliseconds its handling took."""

    def __init__(self, log: Any):
        self.log = log
        self.counts: Counter[str] = Counter()
        self.review = 0
        self.started: dict[int, float] = {}  # processed, not yet committed: when its handling started

    @property
    def total(self) -> int:
        return sum(self.counts.values())

    def waiting(self, processed: Processed, started: float) -> None:
        """``processed`` waits for the group commit; its line is written once the commit made it final."""
        self.started[id(processed)] = started

    def final(self, done: Processed, started: float | None = None) -> None:
        """Log the ``order`` line of ``done`` and count it."""
        now = time.perf_counter()
        started = self.started.pop(id(done), now) if started is None else started
        fields: dict[str, Any] = {"file": done.name, "order_id": done.order_id, "outcome": done.outcome,
                                  "ms": round((now - started) * 1000, 1)}
        if done.status:
            fields["status"] = done.status
        if done.reasons:
            first = done.reasons[0]
            fields["reason"] = f"{first['field']}: {first['message']}"[:300]
        if done.redo:
            fields["redo"] = True
        (self.log.warning if done.outcome in ("rejected", "held") else self.log.info)("order", **fields)
        self.counts[done.outcome] += 1
        if done.status == "review":
            self.review += 1

    def summary(self, left: int, stop_signal: str | None) -> str:
        """``--once``'s one line: the counts, what was left in the inbox, what stopped it."""
        c = self.counts
        text = (f"{self.total} orders: {c['published']} published ({self.review} held for review), "
                f"{c['rejected']} rejected, {c['held']} held as duplicates, "
                f"{c['skipped']} already published (archived)")
        if left:
            text += f"; {left} left in the inbox (still being written)"
        if stop_signal:
            text += f"; stopped by {stop_signal}"
        return text
