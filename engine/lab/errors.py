"""What can stop one order short of its end: a blocked write, a time limit, a stop."""
from __future__ import annotations

from pathlib import Path


class OutputBlocked(Exception):
    """A step failed (disk full, no permission…); nothing was lost.

    ``work_name`` is the input's name in ``work/`` when it is already claimed
    (retry with :meth:`Lab.process_claimed`), ``None`` while it is still in the
    inbox (retry with :meth:`Lab.consider`).
    """

    def __init__(self, step: str, path: str | Path, error: Exception, work_name: str | None = None):
        super().__init__(f"{step}: {path}: {error}")
        self.step = step
        self.path = path
        self.error = error
        self.work_name = work_name

    @property
    def claimed(self) -> bool:
        return self.work_name is not None


class OrderTimeLimit(Exception):
    """The order ran past ``watch.order_time_limit_seconds``.

    Raised inside the running stage, so the pipeline fails the order with that
    stage's name.
    """


class StageWontStop(BaseException):
    """A stage caught the time-limit exception and kept running; raised past ``except Exception``."""


class Interrupted(BaseException):
    """A stop was asked while a stage still ran: the order stays claimed and is redone at the next start."""
