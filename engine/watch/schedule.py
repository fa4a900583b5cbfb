"""The schedule: which inbox names are due to be looked at, and when.

Names come from the scans (at start and every ``watch.rescan_seconds``) and
from the observer's hints; a name looked at too early is put back with the time
to look again. Each name is due at most once; an earlier time wins.
"""
from __future__ import annotations

import heapq
import math
import os
import queue
import time
from typing import Callable

from lenslane.lab.arrival import is_order_name

#: Hints from the observer: seen (maybe still being written), renamed in, closed after writing; a wake-up.
SEEN, MOVED, CLOSED, WAKE = 0, 1, 2, -1


class Schedule:
    """Due times by name (monotonic), with the hints that came for each; fed by scans and by a hint queue."""

    def __init__(self) -> None:
        self.hints: queue.SimpleQueue = queue.SimpleQueue()  # (hint, name), put by the observer's threads
        self.due: dict[str, float] = {}
        self.heap: list[tuple[float, str]] = []
        self.flags: dict[str, int] = {}

    def wake(self) -> None:
        """Make a waiting :meth:`wait` return (safe from a signal handler)."""
        self.hints.put((WAKE, ""))

    def at(self, name: str, when: float) -> None:
        """Look at ``name`` at ``when``, or earlier if it is already due earlier."""
        current = self.due.get(name)
        if current is not None and current <= when:
            return
        self.due[name] = when
        heapq.heappush(self.heap, (when, name))

    def pop_due(self, now: float) -> tuple[str, int] | None:
        """The next name due by ``now`` with the hints it got, or ``None``."""
        while self.heap and self.heap[0][0] <= now:
            when, name = heapq.heappop(self.heap)
            if self.due.get(name) == when:
                del self.due[name]
                return name, self.flags.pop(name, 0)
        return None

    def next_due(self) -> float:
        while self.heap and self.due.get(self.heap[0][1]) != self.heap[0][0]:
            heapq.heappop(self.heap)  # superseded by an earlier time
        return self.heap[0][0] if self.heap else math.inf

    def take_hints(self, now: float) -> None:
        while True:
            try:
                hint, name = self.hints.get_nowait()
            except queue.Empty:
                return
            self._note(hint, name, now)

    def wait(self, seconds: float) -> None:
        """Wait up to ``seconds`` for a hint (noting it), at most an hour."""
        try:
            hint, name = self.hints.get(timeout=min(max(seconds, 0.0), 3600.0))
        except queue.Empty:
            return
        self._note(hint, name, time.monotonic())

    def sleep(self, seconds: float, stopping: Callable[[], bool]) -> bool:
        """Wait ``seconds``, still noting hints; True when ``stopping()`` became true meanwhile."""
        deadline = time.monotonic() + seconds
        while not stopping():
            left = deadline - time.monotonic()
            if left <= 0:
                return False
            self.wait(left)
        return True

    def idle(self, now: float) -> bool:
        """Nothing else is due now (hints taken first)."""
        self.take_hints(now)
        return self.next_due() > now

    def _note(self, hint: int, name: str, now: float) -> None:
        if hint == WAKE:
            return
        if hint:
            self.flags[name] = self.flags.get(name, 0) | hint
        self.at(name, now)


def scan(inbox: str) -> list[str] | None:
    """The order names in the inbox, sorted; ``None`` when the inbox is missing."""
    try:
        with os.scandir(inbox) as entries:
            return sorted(entry.name for entry in entries if is_order_name(entry.name))
    except FileNotFoundError:
        return None
