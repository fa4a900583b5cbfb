"""The per-order time limit: ``SIGALRM`` bounds one run of the chain, and a stop's grace time."""
from __future__ import annotations

import contextlib
import signal
import time
from typing import Any, Callable, Iterator

from lenslane.lab.errors import Interrupted, OrderTimeLimit, StageWontStop

#: After the time limit, how long a stage that caught the time-limit exception may go on (s).
ESCALATE_SECONDS = 1.0


class StageClock:
    """Bounds one run of the chain with ``SIGALRM``; use as ``with clock():``.

    When the limit passes, :class:`~lenslane.lab.errors.OrderTimeLimit` is raised in the
    running stage, so the pipeline fails the order with that stage's name. A
    stage that catches it and goes on gets :class:`~lenslane.lab.errors.StageWontStop`,
    which ``except Exception`` does not catch. After :meth:`shutdown`, a stage
    still running when the grace time is over gets
    :class:`~lenslane.lab.errors.Interrupted`.
    """

    def __init__(self, limit_seconds: float):
        self.limit_seconds = limit_seconds
        self.deadline: float | None = None  # monotonic; None outside a run of the chain
        self.stop_deadline: float | None = None
        self.limit_raised = False

    def __call__(self) -> "StageClock":
        return self

    def __enter__(self) -> "StageClock":
        now = time.monotonic()
        self.deadline = now + self.limit_seconds
        self.limit_raised = False
        self._arm(self._next_alarm() - now)
        return self

    def __exit__(self, *exc_info: Any) -> bool:
        self.deadline = None
        signal.setitimer(signal.ITIMER_REAL, 0)
        return False

    def shutdown(self, grace_seconds: float) -> None:
        """A stop was asked: a running stage gets ``grace_seconds`` more, at most."""
        now = time.monotonic()
        self.stop_deadline = now + grace_seconds
        if self.deadline is not None:
            self._arm(self._next_alarm() - now)

    def on_alarm(self, signum: int, frame: Any) -> None:
        if self.deadline is None:
            return  # the run ended just before the alarm
        now = time.monotonic()
        if self.stop_deadline is not None and now >= self.stop_deadline:
            self.deadline = None
            raise Interrupted("stopping: a stage was still running when the shutdown grace time was over")
        if now < self.deadline:
            self._arm(self._next_alarm() - now)
            return
        self._arm(ESCALATE_SECONDS)  # again, in case the stage swallows this one
        if not self.limit_raised:
            self.limit_raised = True
            raise OrderTimeLimit(f"ran past the order time limit of {self.limit_seconds:g} s "
                                 "(watch.order_time_limit_seconds)")
        where = f"{frame.f_globals.get('__name__', '?')}.{frame.f_code.co_name}" if frame is not None else "?"
        raise StageWontStop(f"still running {ESCALATE_SECONDS:g} s after the order time limit of "
                            f"{self.limit_seconds:g} s, in {where}: the stage caught the time-limit exception")

    def _next_alarm(self) -> float:
        return min(t for t in (self.deadline, self.stop_deadline) if t is not None)

    @staticmethod
    def _arm(seconds: float) -> None:
        signal.setitimer(signal.ITIMER_REAL, max(seconds, 0.001))


@contextlib.contextmanager
def signals_handled(handlers: dict[int, Callable[[int, Any], Any]]) -> Iterator[None]:
    """Install ``handlers`` (signal number → handler) for the block; after it, no alarm is left and each
    signal's previous handler is back."""
    previous = {number: signal.signal(number, handler) for number, handler in handlers.items()}
    try:
        yield
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        for number, handler in previous.items():
            signal.signal(number, handler)
