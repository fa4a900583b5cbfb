"""Retry with backoff, written once: the waits between tries of something that failed."""
from __future__ import annotations

#: First wait before a retry (s); it doubles up to the most the caller allows.
FIRST_RETRY_SECONDS = 0.5


class Backoff:
    """Waits of 0.5 s, 1 s, 2 s … up to ``most_seconds``; at most ``tries`` failures when given.

    ``failed()`` counts one failure and returns the wait before the next try,
    or ``None`` once ``tries`` failures are reached (give up).
    """

    def __init__(self, most_seconds: float, tries: int | None = None):
        self.most_seconds = most_seconds
        self.tries = tries
        self.failures = 0

    def failed(self) -> float | None:
        self.failures += 1
        if self.tries is not None and self.failures >= self.tries:
            return None
        return min(FIRST_RETRY_SECONDS * 2 ** (self.failures - 1), self.most_seconds)

    def reset(self) -> None:
        self.failures = 0
