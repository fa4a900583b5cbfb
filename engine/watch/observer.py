"""The observer: file-system events as hints, supervised.

The observer (watchdog: inotify on Linux, or polling) runs in its own threads
and only puts names into the daemon's queue — events are hints, the scans are
the truth, so a missed event or an overflowed kernel queue costs a few seconds,
never an order. :class:`Supervisor` checks it every second and rebuilds a dead
one; when it cannot, the daemon exits non-zero for the service manager to
restart it.
"""
from __future__ import annotations

import errno
import importlib
import math
import os
import queue
from typing import Any, Callable

from lenslane.lab.arrival import is_order_name
from lenslane.lab.files import filesystem_type, is_network_file_system
from lenslane.watch.retry import Backoff
from lenslane.watch.schedule import CLOSED, MOVED, SEEN

#: How often the observer's threads are checked (s).
SUPERVISE_SECONDS = 1.0
#: Failed rebuilds of the observer in a row before the daemon gives up (exit 1).
OBSERVER_REBUILDS = 5
#: How often the polling observer looks at the inbox (s); the rescans come on top.
POLL_SECONDS = 1.0
#: errno values meaning "inotify limit reached": fall back to polling under observer = "auto".
INOTIFY_LIMIT_ERRORS = frozenset({errno.ENOSPC, errno.EMFILE, errno.ENFILE, errno.ENOMEM})


def _event_classes():
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
            path, hint = event.dest_path, MOVED  # renamed into the inbox: complete
        elif kind == "closed":
            path, hint = event.src_path, CLOSED  # closed after writing
        elif kind == "created":
            path, hint = event.src_path, SEEN  # maybe still being written
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
        observer.schedule(handler, inbox, recursive=False, event_filter=_event_classes())
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


class Supervisor:
    """Starts the observer, checks it is alive, rebuilds it when it is not; gives up after a few failures."""

    def __init__(self, setting: str, inbox: str, hints: queue.SimpleQueue, log: Any, rescan_seconds: float):
        self.setting = setting
        self.rescan_seconds = rescan_seconds
        self.inbox = inbox
        self.hints = hints
        self.log = log
        self.observer: Any = None
        self.kind: str | None = None
        self.rebuilds = Backoff(math.inf, tries=OBSERVER_REBUILDS)
        self.next_check = 0.0
        self.watched: tuple[int, int] | None = None  # the inbox folder the observer watches (device, inode)
        self.why: str | None = None  # why the observer is being rebuilt

    def start(self, now: float) -> None:
        """Start the observer; raises OSError when it cannot be."""
        if self.setting != "polling" and not _prompt_move_events():
            self.log.warning("observer events may lag",
                             message="this watchdog version holds rename events up to 0.5 s; orders are still all "
                                     "taken, some later")
        watched = _identity(self.inbox)
        self.observer, self.kind, why = start_observer(self.setting, self.inbox, InboxEvents(self.inbox, self.hints))
        self.watched = watched
        self.log.info("observer", kind=self.kind, why=why, inbox=self.inbox, rescan_seconds=self.rescan_seconds)
        self.next_check = now + SUPERVISE_SECONDS

    def alive(self) -> bool:
        observer = self.observer
        return (observer is not None and observer.is_alive()
                and all(emitter.is_alive() for emitter in list(observer.emitters)))

    def trouble(self) -> str | None:
        """What is wrong with the observer, or ``None``: its threads stopped, or the inbox folder is another one."""
        if not self.alive():
            return "its threads stopped"
        identity = _identity(self.inbox)
        if identity is None:
            return "the inbox folder is gone"
        if identity != self.watched:
            return "the inbox folder was replaced (the observer watched the old one)"
        return None

    def check(self, now: float) -> str | None:
        """Rebuild a dead observer; returns ``"rebuilt"`` (rescan now), ``"gave up"`` (exit 1) or ``None``."""
        self.next_check = now + SUPERVISE_SECONDS
        if self.observer is not None:
            why = self.trouble()
            if why is None:
                return None
            self.why = why
            self.log.error("observer stopped", kind=self.kind, why=why,
                           message="rebuilding it; the rescans keep finding files meanwhile")
            self.stop()
        try:
            self.start(now)
        except OSError as exc:
            wait = self.rebuilds.failed()
            if wait is None:
                self.log.error("observer cannot be rebuilt", attempts=self.rebuilds.failures, error=str(exc),
                               message="exiting for the service manager to restart the engine")
                return "gave up"
            self.log.warning("observer rebuild failed", attempt=self.rebuilds.failures, error=str(exc),
                             retry_in_s=wait)
            self.next_check = now + wait
            return None
        self.log.info("observer rebuilt", kind=self.kind, why=self.why)
        self.rebuilds.reset()
        return "rebuilt"

    def use_setting(self, setting: str) -> None:
        """A reloaded ``watch.observer``: a changed one is rebuilt by the next check."""
        if setting != self.setting:
            self.setting, self.why = setting, f"watch.observer is now {setting!r}"
            self.stop()

    def stop(self) -> None:
        observer, self.observer = self.observer, None
        if observer is None:
            return
        try:
            observer.stop()
            observer.join(timeout=2.0)
        except Exception:  # a broken observer must not keep the daemon from stopping
            pass


def _identity(folder: str) -> tuple[int, int] | None:
    try:
        info = os.stat(folder)
    except OSError:
        return None
    return info.st_dev, info.st_ino
