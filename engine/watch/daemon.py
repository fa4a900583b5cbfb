"""``lenslane watch LAB``: the drop folder, running unattended.

The main thread does all the work, one order at a time, in a loop: it scans
the inbox at start and every ``watch.rescan_seconds``, takes hints from the
file-system observer, and asks the :class:`~lenslane.lab.folder.Lab` to look at each
entry that is due. The observer (watchdog: inotify on Linux, or polling) runs in
its own threads and only puts names into a queue — events are hints, the scans
are the truth, so a missed event or an overflowed kernel queue costs a few
seconds, never an order. A dead observer is rebuilt; when it cannot be, the
daemon exits non-zero for the service manager to restart it.

Signals: SIGTERM and SIGINT let the current order finish and stop the loop (exit
0). If a stage is still running a few seconds later it is interrupted and the
order stays claimed in ``work/``, to be redone at the next start. SIGALRM is the
per-order time limit (hence the main thread).

``lenslane watch LAB --once`` runs the same loop without an observer: it
finishes what ``work/`` holds, takes every complete order in the inbox, prints a
one-line summary and exits.
"""
from __future__ import annotations

import errno
import heapq
import importlib
import json
import math
import os
import queue
import signal
import sys
import time
from collections import Counter
from typing import Any, Callable

from lenslane import __version__
from lenslane.lab.files import LabLocked, filesystem_type, is_network_file_system, lock_lab, printable
from lenslane.lab.folder import (
    Interrupted, Lab, OrderTimeLimit, OutputBlocked, Processed, StageWontStop, Wait, is_order_name,
)
from lenslane.decide.desk import Desk
from lenslane.watch.log import configure_logging

EXIT_OK = 0
EXIT_OBSERVER_FAILED = 1
EXIT_LAB_LOCKED = 3

#: After SIGTERM/SIGINT, how long a running stage may still take before it is interrupted (s).
SHUTDOWN_GRACE_SECONDS = 3.0
#: After the time limit, how long a stage that caught the time-limit exception may go on (s).
ESCALATE_SECONDS = 1.0
#: How often the observer's threads are checked (s).
SUPERVISE_SECONDS = 1.0
#: Failed rebuilds of the observer in a row before the daemon gives up (exit 1).
OBSERVER_REBUILDS = 5
#: How often the polling observer looks at the inbox (s); the rescans come on top.
POLL_SECONDS = 1.0
#: First wait before retrying a write that failed (s); it doubles up to watch.retry_max_seconds.
FIRST_RETRY_SECONDS = 0.5
#: Group commit: at most this many orders share one folder fsync and one audit fsync. Only orders
#: already due are batched, so a lone order is committed at once and latency does not grow.
BATCH_MAX = 64
#: errno values meaning "inotify limit reached": fall back to polling under observer = "auto".
INOTIFY_LIMIT_ERRORS = frozenset({errno.ENOSPC, errno.EMFILE, errno.ENFILE, errno.ENOMEM})

_SEEN, _MOVED, _CLOSED, _WAKE = 0, 1, 2, -1
_STOPPED = object()


# --------------------------------------------------------------------------
# The per-order time limit
# --------------------------------------------------------------------------


class StageClock:
    """Bounds one run of the chain with ``SIGALRM``; use as ``with clock():``.

    When the limit passes, :class:`~lenslane.lab.folder.OrderTimeLimit` is raised in the
    running stage, so the pipeline fails the order with that stage's name. A
    stage that catches it and goes on gets :class:`~lenslane.lab.folder.StageWontStop`,
    which ``except Exception`` does not catch. After :meth:`shutdown`, a stage
    still running when the grace time is over gets
    :class:`~lenslane.lab.folder.Interrupted`.
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


# --------------------------------------------------------------------------
# The observer: hints only
# --------------------------------------------------------------------------


def _observer_classes():
    from watchdog.events import DirCreatedEvent, DirMovedEvent, FileClosedEvent, FileCreatedEvent, FileMovedEvent

    return [FileCreatedEvent, FileMovedEvent, FileClosedEvent, DirCreatedEvent, DirMovedEvent]


class InboxEvents:
    """Turns watchdog events into ``(kind, name)`` hints on the daemon's queue (runs in the observer's thread)."""

    def __init__(self, inbox: str, hints: queue.SimpleQueue):
        self.inbox = inbox
        self.hints = hints

    def dispatch(self, event: Any) -> None:
        kind = event.event_type
        if kind == "moved":
            path, hint = event.dest_path, _MOVED  # renamed into the inbox: complete
        elif kind == "closed":
            path, hint = event.src_path, _CLOSED  # closed after writing
        elif kind == "created":
            path, hint = event.src_path, _SEEN  # maybe still being written
        else:
            return
        if not path:
            return  # a rename out of the inbox (our own claims)
        folder, name = os.path.split(os.fsdecode(path))
        if folder == self.inbox and is_order_name(name):
            self.hints.put((hint, name))


def _prompt_move_events() -> bool:
    """Make watchdog report renames without its pairing delay.

    watchdog holds an unpaired rename-out event up to 0.5 s, to pair it with a
    rename-in, and every later event waits behind it. Each claim is a rename out
    of the inbox, so under load every hint would come late. The daemon needs no
    pairing — a file renamed in is known by its rename-in alone, which the full
    events mode reports as a move — so the hold is set to zero.
    """
    for module_name, class_name in (("watchdog.observers.inotify_move_event_grouper", "InotifyMoveEventGrouper"),
                                    ("watchdog.observers.inotify_buffer", "InotifyBuffer")):
        try:
            holder = getattr(importlib.import_module(module_name), class_name)
        except (ImportError, AttributeError, OSError):
            continue
        if isinstance(getattr(holder, "delay", None), (int, float)):
            holder.delay = 0.0
            return True
    return False


def _native_observer():
    try:
        from watchdog.observers.inotify import InotifyObserver
    except Exception:  # not Linux: the platform's own observer
        from watchdog.observers import Observer

        return Observer()
    return InotifyObserver(generate_full_events=True)


def _polling_observer():
    from watchdog.observers.polling import PollingObserver

    return PollingObserver(timeout=POLL_SECONDS)


def _scheduled(observer: Any, inbox: str, handler: InboxEvents) -> Any:
    try:
        observer.schedule(handler, inbox, recursive=False, event_filter=_observer_classes())
        observer.start()
    except BaseException:
        try:
            observer.stop()
        except Exception:
            pass
        raise
    return observer


def start_observer(setting: str, inbox: str, handler: InboxEvents,
                   native: Callable[[], Any] = _native_observer) -> tuple[Any, str, str]:
    """Start the observer the config asks for; returns ``(observer, kind, why)``.

    ``auto`` uses inotify, except on a network or shared file system (where it
    does not see changes made elsewhere) or when the inotify limits are reached:
    then it polls. ``native`` refuses to fall back.

    Raises
    ------
    OSError
        The observer could not be started (the inbox is gone, or inotify fails
        under ``native``).
    """
    fs_type = filesystem_type(inbox)
    if setting == "polling":
        return _scheduled(_polling_observer(), inbox, handler), "polling", 'watch.observer is "polling"'
    if setting == "auto" and is_network_file_system(fs_type):
        return (_scheduled(_polling_observer(), inbox, handler), "polling",
                f"the inbox is on {fs_type}, a network or shared file system, where inotify misses other machines' changes")
    try:
        observer = _scheduled(native(), inbox, handler)
    except OSError as exc:
        if setting == "native" or exc.errno not in INOTIFY_LIMIT_ERRORS:
            raise
        return (_scheduled(_polling_observer(), inbox, handler), "polling",
                f"inotify is unavailable ({exc.strerror or exc}): the inotify watch or instance limit is reached "
                "(raise fs.inotify.max_user_watches / max_user_instances to get it back)")
    return observer, "inotify", f"watch.observer is {setting!r}; the inbox is on {fs_type or 'an unknown file system'}"


# --------------------------------------------------------------------------
# The loop
# --------------------------------------------------------------------------


#: A `lenslane decide` applying a decision while no engine runs holds the lab's lock for a moment
#: (well under a second): an engine starting meanwhile waits this long for it before giving up (s).
LOCK_WAIT_SECONDS = 3.0


def _lock_waiting(root: Any) -> int:
    deadline = time.monotonic() + LOCK_WAIT_SECONDS
    while True:
        try:
            return lock_lab(root)
        except LabLocked:
            if time.monotonic() >= deadline:
                raise
            time.sleep(0.05)


class Daemon:
    """One lab's loop; :meth:`run` returns the process exit code."""

    def __init__(self, lab: Lab, once: bool = False, stats: bool = False):
        self.lab = lab
        self.once = once
        self.stats = stats
        watch = lab.config.watch
        self.observer_setting = watch.observer
        self.rescan_seconds = watch.rescan_seconds
        self.retry_max_seconds = watch.retry_max_seconds
        self.clock = StageClock(watch.order_time_limit_seconds)
        self.hints: queue.SimpleQueue = queue.SimpleQueue()
        self.due: dict[str, float] = {}  # name → when to look (monotonic)
        self.heap: list[tuple[float, str]] = []
        self.flags: dict[str, int] = {}
        self.put_off: dict[str, float] = {}  # --once: when a still-changing file was first put off
        self.counts: Counter[str] = Counter()
        self.review = 0
        self.left: set[str] = set()
        self.stopping = False
        self.stop_signal: str | None = None
        self.observer: Any = None
        self.observer_kind: str | None = None
        self.rebuild_failures = 0
        self.inbox_missing = False
        self.next_scan = 0.0
        self.next_supervise = 0.0
        self.log: Any = None
        self.started: dict[int, float] = {}  # processed, not yet committed: when its handling started
        self.desk: Desk | None = None

    # -- start and stop ----------------------------------------------------------

    def run(self) -> int:
        # Bound once: a logger proxy would bind itself again on every line.
        self.log = configure_logging(sys.stderr if self.once else sys.stdout).bind()
        try:
            lock = _lock_waiting(self.lab.root)
        except LabLocked as exc:
            self.log.error("lab locked", lab=str(self.lab.root), lock=str(exc.path), holder_pid=exc.holder,
                           message="another lenslane watch is working on this lab; refusing to start")
            return EXIT_LAB_LOCKED
        previous = {number: signal.signal(number, self._on_stop) for number in (signal.SIGTERM, signal.SIGINT)}
        previous[signal.SIGALRM] = signal.signal(signal.SIGALRM, self.clock.on_alarm)
        # People's decisions (SIGUSR1 from lenslane decide) and config reloads (SIGHUP): lenslane.decide.desk.
        self.desk = Desk(self.lab, self.log, self._use_config)
        previous[signal.SIGUSR1] = signal.signal(signal.SIGUSR1, lambda *_: self._wake(self.desk.wake))
        if not self.once:
            previous[signal.SIGHUP] = signal.signal(signal.SIGHUP, lambda *_: self._wake(self.desk.ask_reload))
        self.lab.time_limit = self.clock
        try:
            return self._run_locked()
        finally:
            self._stop_observer()
            signal.setitimer(signal.ITIMER_REAL, 0)
            for number, handler in previous.items():
                signal.signal(number, handler)
            os.close(lock)  # the kernel would release it anyway

    def _run_locked(self) -> int:
        lab = self.lab
        watch = lab.config.watch
        self.log.info("starting", lab=str(lab.root), mode="once" if self.once else "watch", version=__version__,
                      pid=os.getpid(), watch=watch.model_dump())
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
            try:
                self._start_observer()
            except OSError as exc:
                self.log.error("observer failed", error=str(exc), setting=self.observer_setting,
                               message="cannot watch the inbox; exiting for the service manager to retry")
                return EXIT_OBSERVER_FAILED
            self.next_supervise = time.monotonic() + SUPERVISE_SECONDS
        self._scan(time.monotonic())
        code = self._loop()
        return self._finish() if code == EXIT_OK else code

    def _finish(self) -> int:
        self._commit()  # what is processed is whole: make it final (a stop makes this one attempt only)
        if self.stopping:
            self.log.info("stopping", signal=self.stop_signal, done=sum(self.counts.values()))
        if self.once:
            if self.stats:
                print(json.dumps({"orders": sum(self.counts.values()), "stage_seconds": self.lab.stage_seconds}))
            print(self._summary(), flush=True)
        return EXIT_OK

    def _summary(self) -> str:
        c = self.counts
        total = sum(c.values())
        text = (f"{total} orders: {c['published']} published ({self.review} held for review), "
                f"{c['rejected']} rejected, {c['held']} held as duplicates, "
                f"{c['skipped']} already published (archived)")
        if self.left:
            text += f"; {len(self.left)} left in the inbox (still being written)"
        if self.stopping:
            text += f"; stopped by {self.stop_signal}"
        return text

    def _on_stop(self, signum: int, frame: Any) -> None:
        self.stopping = True
        self.stop_signal = signal.Signals(signum).name
        self.clock.shutdown(SHUTDOWN_GRACE_SECONDS)
        self.hints.put((_WAKE, ""))  # SimpleQueue.put may be called from a signal handler

    def _wake(self, ask: Callable[[], None]) -> None:
        ask()
        self.hints.put((_WAKE, ""))  # SimpleQueue.put may be called from a signal handler

    def _use_config(self, config: Any) -> None:
        """A reloaded configuration (lenslane.decide.desk): the loop's own settings."""
        watch = config.watch
        self.rescan_seconds = watch.rescan_seconds
        self.retry_max_seconds = watch.retry_max_seconds
        self.clock.limit_seconds = watch.order_time_limit_seconds
        if watch.observer != self.observer_setting:
            self.observer_setting = watch.observer
            if self.observer is not None:
                self._stop_observer()  # rebuilt with the new setting by the next supervision

    def _loop(self) -> int:
        while not self.stopping:
            now = time.monotonic()
            self._take_hints(now)
            if self.desk.due(now):  # between batches: decisions and config reloads (lenslane.decide.desk)
                if self._commit() is _STOPPED:
                    break
                self.desk.run(now)
            if not self.once:
                if now >= self.next_scan:
                    self._scan(now)
                if now >= self.next_supervise:
                    code = self._supervise(now)
                    if code is not None:
                        return code
            name = self._pop_due(now)
            if name is not None:
                if self._look_at(name) is _STOPPED:
                    break
                if self.lab.batched >= BATCH_MAX:
                    if self._commit() is _STOPPED:
                        break
                elif self._idle() and self._commit() is _STOPPED:
                    break
                continue
            upcoming = self._next_due()
            if self.once:
                if upcoming == math.inf:
                    break
                self._wait(upcoming - now)
            else:
                self._wait(min(self.next_scan, self.next_supervise, upcoming, self.desk.next_due()) - now)
        return EXIT_OK

    def _look_at(self, name: str) -> Any:
        flags = self.flags.pop(name, 0)
        result = self._handle(name, lambda: self.lab.consider(name, moved=bool(flags & _MOVED),
                                                              closed=bool(flags & _CLOSED)))
        if isinstance(result, Wait):
            if self.once:
                first = self.put_off.setdefault(name, time.monotonic())
                if result.reason == "incomplete" or time.monotonic() - first > self.lab.young_seconds:
                    self.left.add(name)
                    return result
            delay = min(max(0.0, result.until - time.time()), max(self.rescan_seconds, self.lab.young_seconds))
            self._schedule(name, time.monotonic() + delay)
        return result

    # -- one order, with retries --------------------------------------------------

    def _handle(self, name: str, attempt: Callable[[], Any]) -> Any:
        """Run one look at an entry; retry a blocked write with backoff until it succeeds or a stop is asked."""
        started = time.perf_counter()
        delay = FIRST_RETRY_SECONDS
        while True:
            try:
                result = attempt()
                break
            except OutputBlocked as exc:
                error = exc.error
                self.log.error("output blocked", step=exc.step, path=str(exc.path), file=printable(name),
                               error=getattr(error, "strerror", None) or str(error),
                               errno=errno.errorcode.get(getattr(error, "errno", None) or 0),
                               retry_in_s=delay,
                               message=f"cannot {'read' if exc.step == 'read' else 'write'}; the order is kept "
                                       "(in work/ or the inbox) and retried")
                if self._sleep(delay):
                    return _STOPPED
                delay = min(delay * 2, self.retry_max_seconds)
                if exc.claimed:
                    attempt = lambda: self.lab.process_claimed(name, redo=True)  # noqa: E731
            except Interrupted:
                self.log.warning("interrupted", file=printable(name),
                                 message="a stage was still running at shutdown; the order stays in work/ and is "
                                         "redone at the next start")
                return _STOPPED
        if isinstance(result, Processed):
            if self.lab.uncommitted and self.lab.is_pending(result):
                self.started[id(result)] = started  # logged once commit() has made it final
            else:
                self._log_order(result, started)
        return result

    def _commit(self) -> Any:
        """Group commit of the orders processed so far; retry with backoff while output is blocked."""
        delay = FIRST_RETRY_SECONDS
        while self.lab.uncommitted:
            try:
                done = self.lab.commit()
            except OutputBlocked as exc:
                error = exc.error
                self.log.error("output blocked", step=exc.step, path=str(exc.path),
                               error=getattr(error, "strerror", None) or str(error),
                               errno=errno.errorcode.get(getattr(error, "errno", None) or 0), retry_in_s=delay,
                               message="cannot record or archive finished orders; they are kept in work/ and retried")
                if self._sleep(delay):
                    return _STOPPED
                delay = min(delay * 2, self.retry_max_seconds)
                continue
            now = time.perf_counter()
            for processed in done:
                self._log_order(processed, self.started.pop(id(processed), now))
        return None

    def _idle(self) -> bool:
        """Nothing else is due now: commit at once, so a lone order is never kept waiting."""
        now = time.monotonic()
        self._take_hints(now)
        return self._next_due() > now

    def _log_order(self, done: Processed, started: float) -> None:
        fields: dict[str, Any] = {"file": done.name, "order_id": done.order_id, "outcome": done.outcome,
                                  "ms": round((time.perf_counter() - started) * 1000, 1)}
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

    # -- what is due -------------------------------------------------------------

    def _scan(self, now: float) -> None:
        self.next_scan = now + self.rescan_seconds
        try:
            with os.scandir(self.lab.inbox) as entries:
                names = sorted(entry.name for entry in entries if is_order_name(entry.name))
        except FileNotFoundError:
            if not self.inbox_missing:
                self.log.error("inbox missing", path=str(self.lab.inbox))
            self.inbox_missing = True
            return
        self.inbox_missing = False
        for name in names:
            if name not in self.left:
                self._schedule(name, now)
        self.lab.forget_missing(set(names))

    def _schedule(self, name: str, at: float) -> None:
        current = self.due.get(name)
        if current is not None and current <= at:
            return
        self.due[name] = at
        heapq.heappush(self.heap, (at, name))

    def _pop_due(self, now: float) -> str | None:
        while self.heap and self.heap[0][0] <= now:
            at, name = heapq.heappop(self.heap)
            if self.due.get(name) == at:
                del self.due[name]
                return name
        return None

    def _next_due(self) -> float:
        while self.heap and self.due.get(self.heap[0][1]) != self.heap[0][0]:
            heapq.heappop(self.heap)  # superseded by an earlier time
        return self.heap[0][0] if self.heap else math.inf

    def _note(self, hint: int, name: str, now: float) -> None:
        if hint == _WAKE:
            return
        if hint:
            self.flags[name] = self.flags.get(name, 0) | hint
        self._schedule(name, now)

    def _take_hints(self, now: float) -> None:
        while True:
            try:
                hint, name = self.hints.get_nowait()
            except queue.Empty:
                return
            self._note(hint, name, now)

    def _wait(self, seconds: float) -> None:
        try:
            hint, name = self.hints.get(timeout=min(max(seconds, 0.0), 3600.0))
        except queue.Empty:
            return
        self._note(hint, name, time.monotonic())

    def _sleep(self, seconds: float) -> bool:
        """Wait, still noting hints; True when a stop was asked."""
        deadline = time.monotonic() + seconds
        while not self.stopping:
            left = deadline - time.monotonic()
            if left <= 0:
                return False
            self._wait(left)
        return True

    # -- the observer ------------------------------------------------------------

    def _start_observer(self) -> None:
        if self.observer_setting != "polling" and not _prompt_move_events():
            self.log.warning("observer events may lag",
                             message="this watchdog version holds rename events up to 0.5 s; orders are still all "
                                     "taken, some later")
        handler = InboxEvents(os.fspath(self.lab.inbox), self.hints)
        self.observer, self.observer_kind, why = start_observer(self.observer_setting, os.fspath(self.lab.inbox),
                                                                handler)
        self.log.info("observer", kind=self.observer_kind, why=why, inbox=str(self.lab.inbox),
                      rescan_seconds=self.rescan_seconds)

    def _observer_alive(self) -> bool:
        observer = self.observer
        return (observer is not None and observer.is_alive()
                and all(emitter.is_alive() for emitter in list(observer.emitters)))

    def _supervise(self, now: float) -> int | None:
        self.next_supervise = now + SUPERVISE_SECONDS
        if self._observer_alive():
            return None
        if self.observer is not None:
            self.log.error("observer stopped", kind=self.observer_kind,
                           message="rebuilding it; the rescans keep finding files meanwhile")
            self._stop_observer()
        try:
            self._start_observer()
        except OSError as exc:
            self.rebuild_failures += 1
            if self.rebuild_failures >= OBSERVER_REBUILDS:
                self.log.error("observer cannot be rebuilt", attempts=self.rebuild_failures, error=str(exc),
                               message="exiting for the service manager to restart the engine")
                return EXIT_OBSERVER_FAILED
            wait = FIRST_RETRY_SECONDS * 2 ** (self.rebuild_failures - 1)
            self.log.warning("observer rebuild failed", attempt=self.rebuild_failures, error=str(exc),
                             retry_in_s=wait)
            self.next_supervise = now + wait
            return None
        self.log.info("observer rebuilt", kind=self.observer_kind)
        self.rebuild_failures = 0
        self.next_scan = now  # events may have been missed while it was down
        return None

    def _stop_observer(self) -> None:
        observer, self.observer = self.observer, None
        if observer is None:
            return
        try:
            observer.stop()
            observer.join(timeout=2.0)
        except Exception:  # a broken observer must not keep the daemon from stopping
            pass


def run_daemon(lab: Lab) -> int:
    """``lenslane watch LAB``: run until SIGTERM/SIGINT; returns the exit code."""
    return Daemon(lab).run()


def run_once(lab: Lab, stats: bool = False) -> int:
    """``lenslane watch LAB --once``: take every complete order now in the inbox, print a summary, exit.

    With ``stats``, a JSON line with the time spent in each stage comes before the summary.
    """
    return Daemon(lab, once=True, stats=stats).run()
