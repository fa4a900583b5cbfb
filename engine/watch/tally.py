"""What the loop tells: its lines at start, one log line per order made final, ``--once``'s summary."""
from __future__ import annotations

import json
import os
import time
from collections import Counter
from typing import Any

from lenslane import __version__
from lenslane.lab.folder import Lab
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

    def starting(self, lab: Lab, mode: str) -> None:
        """The lines at start: the lab, the mode, the version, the pid, the settings; the chain."""
        self.log.info("starting", lab=str(lab.root), mode=mode, version=__version__, pid=os.getpid(),
                      watch=lab.config.watch.model_dump())
        self.log.info("chain", stages=[link.stage.name for link in lab.host.chain], disabled=lab.host.disabled,
                      config_sha256=lab.host.config_sha256)

    def print_summary(self, left: int, stop_signal: str | None, stage_seconds: dict[str, float] | None) -> None:
        """``--once``'s standard output: with ``stage_seconds`` (``--stats``) a JSON line first, then the summary."""
        if stage_seconds is not None:
            print(json.dumps({"orders": self.total, "stage_seconds": stage_seconds}))
        print(self.summary(left, stop_signal), flush=True)

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
