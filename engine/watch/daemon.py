"""``lenslane watch LAB``: the drop folder, running unattended.

The main thread does all the work, one order at a time, in a loop: it scans
the inbox at start and every ``watch.rescan_seconds``, takes hints from the
file-system observer (:mod:`~lenslane.watch.observer`), and asks the
:class:`~lenslane.lab.folder.Lab` to look at each entry that is due
(:mod:`~lenslane.watch.schedule`). Orders already due are committed together
(up to :data:`BATCH_MAX`); a lone order is committed at once.

Signals: SIGTERM and SIGINT let the current order finish and stop the loop (exit
0). If a stage is still running a few seconds later it is interrupted and the
order stays claimed in ``work/``, to be redone at the next start. SIGALRM is the
per-order time limit (:mod:`~lenslane.watch.clock`, hence the main thread).
The audit log's checkpoint line goes to the engine's log at start, every
``audit.checkpoint_minutes`` and at stop (:mod:`~lenslane.watch.checkpoints`).

``lenslane watch LAB --once`` runs the same loop without an observer: it
finishes what ``work/`` holds, takes every complete order in the inbox, prints a
one-line summary and exits.
"""
from __future__ import annotations

import math
import os
import signal
import sys
import time
from pathlib import Path
from typing import Any, Callable

from lenslane.audit.log import AuditError
from lenslane.chain.host import Host
from lenslane.decide.desk import Desk
from lenslane.lab.errors import Interrupted, OutputBlocked
from lenslane.lab.files import printable
from lenslane.lab.folder import Lab, Processed, Wait
from lenslane.watch.checkpoints import Checkpoints
from lenslane.watch.clock import StageClock, signals_handled
from lenslane.watch.log import configure_logging
from lenslane.watch.observer import Supervisor
from lenslane.watch.health import STOPPED, Health
from lenslane.watch.schedule import CLOSED, MOVED, Schedule, scan
from lenslane.watch.tally import Tally

EXIT_OK = 0
EXIT_OBSERVER_FAILED = 1
#: The lab cannot be made ready at start (its lock file, its audit log or work/ cannot be written): said, exit 1.
EXIT_CANNOT_START = 1
EXIT_LAB_LOCKED = 3

#: After SIGTERM/SIGINT, how long a running stage may still take before it is interrupted (s).
SHUTDOWN_GRACE_SECONDS = 3.0
#: Group commit: at most this many orders share one folder fsync and one audit fsync. Only orders
#: already due are batched, so a lone order is committed at once and latency does not grow.
BATCH_MAX = 64

class Daemon:
    """One lab's loop; :meth:`run` returns the process exit code."""

    def __init__(self, lab: Lab, clock: StageClock, once: bool = False, stats: bool = False):
        self.lab = lab
        self.clock = clock
        self.once = once
        self.stats = stats
        watch = lab.config.watch
        self.rescan_seconds = watch.rescan_seconds
        self.young_seconds = watch.young_seconds
        self.schedule = Schedule()
        self.put_off: dict[str, float] = {}  # --once: when a still-changing file was first put off
        self.left: set[str] = set()
        self.stopping = False
        self.stop_signal: str | None = None
        self.supervisor: Supervisor | None = None
        self.inbox_missing = False
        self.next_scan = 0.0
        # Bound once: a logger proxy would bind itself again on every line.
        self.log = configure_logging(sys.stderr if once else sys.stdout).bind()
        self.tally = Tally(self.log)
        self.health = Health(lab, self.log, "once" if once else "watch")
        # People's decisions (SIGUSR1 from lenslane decide) and config reloads (SIGHUP): lenslane.decide.desk.
        self.desk = Desk(lab, self.log, self._use_config)
        self.checkpoints = Checkpoints(lab, self.log)  # the audit log's checkpoint line, now and then

    # -- start and stop ----------------------------------------------------------

    def run(self) -> int:
        # The handlers come first: a lenslane decide may send its wake-up as soon as the lock file names this engine.
        handlers = {signal.SIGTERM: self._on_stop, signal.SIGINT: self._on_stop, signal.SIGALRM: self.clock.on_alarm,
                    signal.SIGUSR1: lambda *_: self._wake(self.desk.wake)}
        if not self.once:
            handlers[signal.SIGHUP] = lambda *_: self._wake(self.desk.ask_reload)
        with signals_handled(handlers):
            try:
                lock = self.health.lock()
            except OSError as exc:
                return self._cannot_start("lock file", exc)
            if lock is None:
                return EXIT_LAB_LOCKED
            try:
                return self._run_locked()
            finally:
                if self.supervisor is not None:
                    self.supervisor.stop()
                os.close(lock)  # the kernel would release it anyway

    def _cannot_start(self, what: str, exc: BaseException) -> int:
        self.log.error("cannot start", lab=str(self.lab.root), error=str(exc),
                       message=f"the lab's {what} cannot be written (a full disk, or a folder this user may not "
                               "write); nothing was taken from the inbox")
        return EXIT_CANNOT_START

    def _run_locked(self) -> int:
        lab = self.lab
        self.tally.starting(lab, "once" if self.once else "watch")
        try:
            claimed = lab.recover()
        except (OSError, AuditError) as exc:
            return self._cannot_start("audit log or work/", exc)
        self.checkpoints.start()
        if claimed:
            self.log.info("recovering", claimed=len(claimed),
                          note="orders claimed but not finished when the last run ended are finished first")
        for name in claimed:
            if self.stopping or self._handle(name, lambda n=name: lab.process_claimed(n, redo=True)) is STOPPED:
                return self._finish()
            if lab.batched >= BATCH_MAX and self._commit() is STOPPED:
                return self._finish()
        if self._commit() is STOPPED:
            return self._finish()
        if not self.once:
            self.supervisor = Supervisor(lab.config.watch.observer, os.fspath(lab.inbox), self.schedule.hints,
                                         self.log, self.rescan_seconds)
            try:
                self.supervisor.start(time.monotonic())
            except OSError as exc:
                self.log.error("observer failed", error=str(exc), setting=self.supervisor.setting,
                               message="cannot watch the inbox; exiting for the service manager to retry")
                return EXIT_OBSERVER_FAILED
        self._scan(time.monotonic())
        code = self._loop()
        return self._finish() if code == EXIT_OK else code

    def _finish(self) -> int:
        self._commit()  # what is processed is whole: make it final (a stop makes this one attempt only)
        self.checkpoints.log_one()
        if self.stopping:
            self.log.info("stopping", signal=self.stop_signal, done=self.tally.total)
        if self.once:
            self.tally.print_summary(len(self.left), self.stop_signal if self.stopping else None,
                                     self.lab.stage_seconds if self.stats else None)
        return EXIT_OK

    def _on_stop(self, signum: int, frame: Any) -> None:
        self.stopping = True
        self.stop_signal = signal.Signals(signum).name
        self.clock.shutdown(SHUTDOWN_GRACE_SECONDS)
        self.schedule.wake()  # SimpleQueue.put may be called from a signal handler

    def _wake(self, ask: Callable[[], None]) -> None:
        ask()
        self.schedule.wake()  # SimpleQueue.put may be called from a signal handler

    def _use_config(self, config: Any) -> None:
        """A reloaded configuration (lenslane.decide.desk): the loop's own settings."""
        watch = config.watch
        self.rescan_seconds, self.young_seconds = watch.rescan_seconds, watch.young_seconds
        self.health.retry_max_seconds = watch.retry_max_seconds
        self.clock.limit_seconds = watch.order_time_limit_seconds
        if self.supervisor is not None:
            self.supervisor.rescan_seconds = watch.rescan_seconds  # told in its log line when it is rebuilt
            self.supervisor.use_setting(watch.observer)
        self.checkpoints.use(config)

    # -- the loop ------------------------------------------------------------------

    def _loop(self) -> int:
        schedule = self.schedule
        while not self.stopping:
            now = time.monotonic()
            schedule.take_hints(now)
            if now >= self.checkpoints.next_due:
                self.checkpoints.log_one()
            if self.desk.due(now):  # between batches: decisions and config reloads (lenslane.decide.desk)
                if self._commit() is STOPPED:
                    break
                self.desk.run(now)
            if self.supervisor is not None:
                if now >= self.next_scan:
                    self._scan(now)
                if now >= self.supervisor.next_check:
                    verdict = self.supervisor.check(now)
                    if verdict == "gave up":
                        return EXIT_OBSERVER_FAILED
                    if verdict == "rebuilt":
                        self.next_scan = now  # events may have been missed while it was down
            due = schedule.pop_due(now)
            if due is not None:
                if self._look_at(*due) is STOPPED:
                    break
                # Commit when the batch is full or nothing else is due now, so a lone order never waits.
                if (self.lab.batched >= BATCH_MAX or schedule.idle(time.monotonic())) and self._commit() is STOPPED:
                    break
                continue
            upcoming = schedule.next_due()
            if self.supervisor is None:
                if upcoming == math.inf:
                    break
                schedule.wait(upcoming - now)
            else:
                schedule.wait(min(self.next_scan, self.supervisor.next_check, upcoming, self.desk.next_due(),
                                  self.checkpoints.next_due) - now)
        return EXIT_OK

    def _look_at(self, name: str, flags: int) -> Any:
        result = self._handle(name, lambda: self.lab.consider(name, moved=bool(flags & MOVED),
                                                              closed=bool(flags & CLOSED)))
        if isinstance(result, OutputBlocked):  # this entry could not be claimed or read: the others go on
            delay = self.health.entry_failed(name, result)
            if delay is not None:
                self.schedule.at(name, time.monotonic() + delay)
            return result
        self.health.entry_done(name)
        if isinstance(result, Wait):
            if self.once:
                first = self.put_off.setdefault(name, time.monotonic())
                if result.reason == "incomplete" or time.monotonic() - first > self.young_seconds:
                    self.left.add(name)
                    return result
            delay = min(max(0.0, result.until - time.time()), max(self.rescan_seconds, self.young_seconds))
            self.schedule.at(name, time.monotonic() + delay)
        return result

    def _scan(self, now: float) -> None:
        self.next_scan = now + self.rescan_seconds
        names = scan(os.fspath(self.lab.inbox))
        if names is None:
            if not self.inbox_missing:
                self.log.error("inbox missing", path=str(self.lab.inbox))
            self.inbox_missing = True
            return
        self.inbox_missing = False
        for name in names:
            if name not in self.left:
                self.schedule.at(name, now)
        if self.lab.forget_missing(set(names)):
            self.health.write_state()

    def _sleep(self, seconds: float) -> bool:
        return self.schedule.sleep(seconds, lambda: self.stopping)

    # -- one order, and the commit, with retries -----------------------------------------

    def _handle(self, name: str, attempt: Callable[[], Any]) -> Any:
        """Run one look at an entry; retry a blocked write with backoff until it succeeds or a stop is asked."""
        started = time.perf_counter()
        try:
            result = self.health.retrying(self._sleep, attempt, lambda exc, delay: self.health.blocked(
                exc, delay, file=printable(name),
                message=f"cannot {'read' if exc.step == 'read' else 'write'}; the order is kept "
                        "(in work/ or the inbox) and retried"), self._resume_claimed)
        except Interrupted:
            self.log.warning("interrupted", file=printable(name),
                             message="a stage was still running at shutdown; the order stays in work/ and is "
                                     "redone at the next start")
            return STOPPED
        if isinstance(result, Processed):
            if self.lab.uncommitted and self.lab.is_pending(result):
                self.tally.waiting(result, started)  # logged once commit() has made it final
            else:
                self.tally.final(result, started)
        return result

    def _resume_claimed(self, exc: OutputBlocked) -> Callable[[], Any] | None:
        if not exc.claimed:
            return None
        return lambda: self.lab.process_claimed(exc.work_name, redo=True)

    def _commit(self) -> Any:
        """Group commit of the orders processed so far; retry with backoff while output is blocked."""
        while self.lab.uncommitted:
            done = self.health.retrying(self._sleep, self.lab.commit, lambda exc, delay: self.health.blocked(
                exc, delay, message="cannot record or archive finished orders; they are kept in work/ and retried"),
                goes_on=True)
            if done is STOPPED:
                return STOPPED
            for processed in done:
                self.tally.final(processed)
        return None


def run(root: Path, host: Host, once: bool = False, stats: bool = False,
        on_step: Callable[[str], None] | None = None) -> int:
    """``lenslane watch LAB`` (until SIGTERM/SIGINT) or, with ``once``, ``--once``; returns the exit code.

    With ``stats``, a JSON line with the time spent in each stage comes before
    the summary. ``on_step`` is the lab's step callback (see :class:`Lab`).
    """
    clock = StageClock(host.config.watch.order_time_limit_seconds)
    lab = Lab(root, host, time_limit=clock, on_step=on_step)
    return Daemon(lab, clock, once=once, stats=stats).run()
