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

``lenslane watch LAB --once`` runs the same loop without an observer: it
finishes what ``work/`` holds, takes every complete order in the inbox, prints a
one-line summary and exits.
"""
from __future__ import annotations

import errno
import json
import math
import os
import signal
import sys
import time
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Callable

from lenslane import __version__
from lenslane.chain.host import Host
from lenslane.lab.errors import Interrupted, OutputBlocked
from lenslane.lab.files import LabLocked, lock_lab, printable, write_lock_state
from lenslane.lab.folder import Lab, Processed, Wait
from lenslane.watch.clock import StageClock
from lenslane.watch.log import configure_logging
from lenslane.watch.observer import Supervisor
from lenslane.watch.retry import Backoff
from lenslane.watch.schedule import CLOSED, MOVED, Schedule, scan
from lenslane.watch.tally import Tally

EXIT_OK = 0
EXIT_OBSERVER_FAILED = 1
EXIT_LAB_LOCKED = 3

#: After SIGTERM/SIGINT, how long a running stage may still take before it is interrupted (s).
SHUTDOWN_GRACE_SECONDS = 3.0
#: Steps that fail for one entry (not for the whole lab): tried this many times, then the entry is set aside.
ENTRY_STEPS = frozenset({"claim", "read", "archive"})
ENTRY_TRIES = 5
#: Group commit: at most this many orders share one folder fsync and one audit fsync. Only orders
#: already due are batched, so a lone order is committed at once and latency does not grow.
BATCH_MAX = 64

_STOPPED = object()


class Daemon:
    """One lab's loop; :meth:`run` returns the process exit code."""

    def __init__(self, lab: Lab, clock: StageClock, once: bool = False, stats: bool = False):
        self.lab = lab
        self.clock = clock
        self.once = once
        self.stats = stats
        watch = lab.config.watch
        self.rescan_seconds = watch.rescan_seconds
        self.retry_max_seconds = watch.retry_max_seconds
        self.young_seconds = watch.young_seconds
        self.schedule = Schedule()
        self.put_off: dict[str, float] = {}  # --once: when a still-changing file was first put off
        self.tally: Any = None
        self.left: set[str] = set()
        self.stopping = False
        self.stop_signal: str | None = None
        self.supervisor: Supervisor | None = None
        self.inbox_missing = False
        self.next_scan = 0.0
        self.log: Any = None
        self.lock: int | None = None
        self.since = ""
        self.entry_tries: dict[str, Backoff] = {}  # inbox names whose claim or read failed, with their waits

    # -- start and stop ----------------------------------------------------------

    def run(self) -> int:
        # Bound once: a logger proxy would bind itself again on every line.
        self.log = configure_logging(sys.stderr if self.once else sys.stdout).bind()
        self.tally = Tally(self.log)
        try:
            lock = self.lock = lock_lab(self.lab.root)
        except LabLocked as exc:
            self.log.error("lab locked", lab=str(self.lab.root), lock=str(exc.path), holder_pid=exc.holder,
                           message="another lenslane watch is working on this lab; refusing to start")
            return EXIT_LAB_LOCKED
        previous = {number: signal.signal(number, self._on_stop) for number in (signal.SIGTERM, signal.SIGINT)}
        previous[signal.SIGALRM] = signal.signal(signal.SIGALRM, self.clock.on_alarm)
        try:
            return self._run_locked()
        finally:
            if self.supervisor is not None:
                self.supervisor.stop()
            signal.setitimer(signal.ITIMER_REAL, 0)
            for number, handler in previous.items():
                signal.signal(number, handler)
            os.close(lock)  # the kernel would release it anyway

    def _run_locked(self) -> int:
        lab = self.lab
        self.since = datetime.now(timezone.utc).isoformat(timespec="seconds").replace("+00:00", "Z")
        self._write_state()
        self.log.info("starting", lab=str(lab.root), mode="once" if self.once else "watch", version=__version__,
                      pid=os.getpid(), watch=lab.config.watch.model_dump())
        self.log.info("chain", stages=[link.stage.name for link in lab.host.chain], disabled=lab.host.disabled,
                      config_sha256=lab.host.config_sha256)
        claimed = lab.recover()
        if claimed:
            self.log.info("recovering", claimed=len(claimed),
                          note="orders claimed but not finished when the last run ended are finished first")
        for name in claimed:
            if self.stopping or self._handle(name, lambda n=name: lab.process_claimed(n, redo=True)) is _STOPPED:
                return self._finish()
            if lab.batched >= BATCH_MAX and self._commit() is _STOPPED:
                return self._finish()
        if self._commit() is _STOPPED:
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
        if self.stopping:
            self.log.info("stopping", signal=self.stop_signal, done=self.tally.total)
        if self.once:
            if self.stats:
                print(json.dumps({"orders": self.tally.total, "stage_seconds": self.lab.stage_seconds}))
            print(self.tally.summary(len(self.left), self.stop_signal if self.stopping else None), flush=True)
        return EXIT_OK

    def _on_stop(self, signum: int, frame: Any) -> None:
        self.stopping = True
        self.stop_signal = signal.Signals(signum).name
        self.clock.shutdown(SHUTDOWN_GRACE_SECONDS)
        self.schedule.wake()  # SimpleQueue.put may be called from a signal handler

    # -- the loop ------------------------------------------------------------------

    def _loop(self) -> int:
        schedule = self.schedule
        while not self.stopping:
            now = time.monotonic()
            schedule.take_hints(now)
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
                if self._look_at(*due) is _STOPPED:
                    break
                if (self.lab.batched >= BATCH_MAX or self._idle()) and self._commit() is _STOPPED:
                    break
                continue
            upcoming = schedule.next_due()
            if self.supervisor is None:
                if upcoming == math.inf:
                    break
                schedule.wait(upcoming - now)
            else:
                schedule.wait(min(self.next_scan, self.supervisor.next_check, upcoming) - now)
        return EXIT_OK

    def _look_at(self, name: str, flags: int) -> Any:
        result = self._handle(name, lambda: self.lab.consider(name, moved=bool(flags & MOVED),
                                                              closed=bool(flags & CLOSED)))
        if isinstance(result, OutputBlocked):  # this entry could not be claimed or read: the others go on
            backoff = self.entry_tries.setdefault(name, Backoff(self.retry_max_seconds, ENTRY_TRIES))
            delay = backoff.failed()
            if delay is None:
                del self.entry_tries[name]
                self._set_aside(result, backoff.failures)
            else:
                self._blocked(result, delay, file=printable(name), message="cannot take this entry; it stays in "
                              "the inbox and is tried again, the other orders meanwhile")
                self.schedule.at(name, time.monotonic() + delay)
            return result
        self.entry_tries.pop(name, None)
        if isinstance(result, Wait):
            if self.once:
                first = self.put_off.setdefault(name, time.monotonic())
                if result.reason == "incomplete" or time.monotonic() - first > self.young_seconds:
                    self.left.add(name)
                    return result
            delay = min(max(0.0, result.until - time.time()), max(self.rescan_seconds, self.young_seconds))
            self.schedule.at(name, time.monotonic() + delay)
        return result

    def _idle(self) -> bool:
        """Nothing else is due now: commit at once, so a lone order is never kept waiting."""
        now = time.monotonic()
        self.schedule.take_hints(now)
        return self.schedule.next_due() > now

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
            self._write_state()

    def _sleep(self, seconds: float) -> bool:
        """Wait, still noting hints; True when a stop was asked."""
        deadline = time.monotonic() + seconds
        while not self.stopping:
            left = deadline - time.monotonic()
            if left <= 0:
                return False
            self.schedule.wait(left)
        return True

    # -- one order, and the commit, with retries -----------------------------------------

    def _retrying(self, attempt: Callable[[], Any], blocked: Callable[[OutputBlocked, float], None],
                  resume: Callable[[OutputBlocked], Callable[[], Any] | None] = lambda exc: None,
                  goes_on: bool = False) -> Any:
        """Run ``attempt``; while its output is blocked, wait (0.5 s, 1 s, 2 s … up to the setting) and retry.

        A failed write of the lab's (disk full, no permission) is retried for as
        long as it takes. A step that failed for one entry only is retried
        :data:`ENTRY_TRIES` times and the entry is set aside: one still in the
        inbox at once (returned, for the caller to put off), one in ``work/``
        after its tries (then ``None`` is returned, or with ``goes_on`` the
        attempt goes on without it). ``resume`` may give what to retry instead
        (the claimed input, once an entry is claimed).
        """
        waits: dict[Any, Backoff] = {}
        while True:
            try:
                return attempt()
            except OutputBlocked as exc:
                entry = exc.step in ENTRY_STEPS
                if entry and not exc.claimed:
                    return exc
                key = (exc.step, exc.work_name) if entry else None
                backoff = waits.setdefault(key, Backoff(self.retry_max_seconds, ENTRY_TRIES if entry else None))
                delay = backoff.failed()
                if delay is None:
                    self._set_aside(exc, backoff.failures)
                    if goes_on:
                        continue
                    return None
                blocked(exc, delay)
                if self._sleep(delay):
                    return _STOPPED
                attempt = resume(exc) or attempt

    def _blocked(self, exc: OutputBlocked, delay: float, **fields: Any) -> None:
        error = exc.error
        self.log.error("output blocked", step=exc.step, path=str(exc.path), **fields,
                       error=getattr(error, "strerror", None) or str(error),
                       errno=errno.errorcode.get(getattr(error, "errno", None) or 0), retry_in_s=delay)

    def _set_aside(self, blocked: OutputBlocked, tries: int) -> None:
        entry = self.lab.set_aside(blocked, tries)
        self.log.error("not taken", file=entry.file, folder=entry.folder, step=entry.step, reason=entry.reason,
                       tries=tries, message=f"left in {entry.folder}/ and not tried again "
                       + ("until it changes" if entry.folder == "inbox" else "until the next start")
                       + "; the other orders go on")
        self._write_state()

    def _write_state(self) -> None:
        """The health line (when something is set aside), and the state ``lenslane status`` reads."""
        not_taken = self.lab.aside.listed()
        if not_taken:
            self.log.warning("health", not_taken=len(not_taken), entries=not_taken)
        if self.lock is not None:
            try:
                write_lock_state(self.lock, {"since": self.since, "mode": "once" if self.once else "watch",
                                             "not_taken": not_taken})
            except OSError as exc:
                self.log.warning("state not written", error=str(exc))

    def _handle(self, name: str, attempt: Callable[[], Any]) -> Any:
        """Run one look at an entry; retry a blocked write with backoff until it succeeds or a stop is asked."""
        started = time.perf_counter()
        try:
            result = self._retrying(attempt, lambda exc, delay: self._blocked(
                exc, delay, file=printable(name),
                message=f"cannot {'read' if exc.step == 'read' else 'write'}; the order is kept "
                        "(in work/ or the inbox) and retried"), self._resume_claimed)
        except Interrupted:
            self.log.warning("interrupted", file=printable(name),
                             message="a stage was still running at shutdown; the order stays in work/ and is "
                                     "redone at the next start")
            return _STOPPED
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
            done = self._retrying(self.lab.commit, lambda exc, delay: self._blocked(
                exc, delay, message="cannot record or archive finished orders; they are kept in work/ and retried"),
                goes_on=True)
            if done is _STOPPED:
                return _STOPPED
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
