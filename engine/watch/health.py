"""The engine's health: blocked steps, entries set aside, and the state ``lenslane status`` reads.

A write that fails for the whole lab (disk full, no permission) is logged as
``output blocked`` at every retry. A step that fails for one entry (claim,
read, move) is retried a few times while the other orders go on; then the
entry is set aside: left where it is, logged once (``not taken``), listed by a
``health`` line, and written with the engine's pid and start into the lab's
lock file, where ``lenslane status`` finds it.
"""
from __future__ import annotations

import errno
import time
from datetime import datetime, timezone
from typing import Any, Callable

from lenslane.lab.errors import OutputBlocked
from lenslane.lab.files import LabLocked, lock_lab, printable, write_lock_state
from lenslane.lab.folder import Lab
from lenslane.watch.retry import Backoff

#: Steps that fail for one entry (not for the whole lab): tried this many times, then the entry is set aside.
ENTRY_STEPS = frozenset({"claim", "read", "archive"})
ENTRY_TRIES = 5
#: A `lenslane decide` applying a decision while no engine runs holds the lab's lock for a moment (an approve
#: well under a second; a replace runs the chain, bounded by the order time limit): an engine starting
#: meanwhile waits this long for it before giving up (s).
LOCK_WAIT_SECONDS = 3.0
#: What :meth:`Health.retrying` returns when a stop was asked while it waited.
STOPPED = object()


def _lock_waiting(root: Any) -> int:
    deadline = time.monotonic() + LOCK_WAIT_SECONDS
    while True:
        try:
            return lock_lab(root)
        except LabLocked:
            if time.monotonic() >= deadline:
                raise
            time.sleep(0.05)


class Health:
    """What the loop reports about itself, in its log and in the lab's lock file."""

    def __init__(self, lab: Lab, log: Any, mode: str):
        self.lab = lab
        self.log = log
        self.mode = mode
        self.retry_max_seconds = lab.config.watch.retry_max_seconds
        self.lock_fd: int | None = None
        self.since = ""
        self.entry_tries: dict[str, Backoff] = {}  # inbox names whose claim or read failed, with their waits
        self.output_blocked: dict[str, Any] | None = None  # the lab's output blocked now: what, since when

    def lock(self) -> int | None:
        """Take the lab's lock (waiting a moment for a ``lenslane decide``) and write the state; ``None``: held."""
        try:
            self.lock_fd = _lock_waiting(self.lab.root)
        except LabLocked as exc:
            self.log.error("lab locked", lab=str(self.lab.root), lock=str(exc.path), holder_pid=exc.holder,
                           message="another lenslane process (a watch, or a decision being applied) holds this "
                                   "lab; refusing to start")
            return None
        self.since = _now()
        self.write_state()
        return self.lock_fd

    def blocked(self, exc: OutputBlocked, delay: float, **fields: Any) -> None:
        error = exc.error
        text = getattr(error, "strerror", None) or str(error)
        self.log.error("output blocked", step=exc.step, path=str(exc.path), **fields, error=text,
                       errno=errno.errorcode.get(getattr(error, "errno", None) or 0), retry_in_s=delay)
        if exc.step not in ENTRY_STEPS:  # the lab's output, not one entry's: `lenslane status` shows it until it clears
            since = self.output_blocked["since"] if self.output_blocked else _now()
            self.output_blocked = {"step": exc.step, "path": str(exc.path), "error": text, "since": since}
            self.write_state()

    def entry_failed(self, name: str, exc: OutputBlocked) -> float | None:
        """An inbox entry could not be claimed or read: the wait before its next try, or ``None`` (set aside)."""
        backoff = self.entry_tries.setdefault(name, Backoff(self.retry_max_seconds, ENTRY_TRIES))
        delay = backoff.failed()
        if delay is None:
            del self.entry_tries[name]
            self.set_aside(exc, backoff.failures)
            return None
        self.blocked(exc, delay, file=printable(name),
                     message="cannot take this entry; it stays in the inbox and is tried again, the other orders "
                             "meanwhile")
        return delay

    def entry_done(self, name: str) -> None:
        self.entry_tries.pop(name, None)

    def retrying(self, sleep: Callable[[float], bool], attempt: Callable[[], Any],
                 blocked: Callable[[OutputBlocked, float], None],
                 resume: Callable[[OutputBlocked], Callable[[], Any] | None] = lambda exc: None,
                 goes_on: bool = False) -> Any:
        """Run ``attempt``; while its output is blocked, wait (0.5 s, 1 s, 2 s … up to the setting) and retry.

        A failed write of the lab's (disk full, no permission) is retried for as
        long as it takes. A step that failed for one entry only is retried
        :data:`ENTRY_TRIES` times and the entry is set aside: one still in the
        inbox at once (returned, for the caller to put off), one in ``work/``
        after its tries (then ``None`` is returned, or with ``goes_on`` the
        attempt goes on without it). ``resume`` may give what to retry instead
        (the claimed input, once an entry is claimed). :data:`STOPPED` when a
        stop was asked while waiting.
        """
        waits: dict[Any, Backoff] = {}
        while True:
            try:
                done = attempt()
            except OutputBlocked as exc:
                entry = exc.step in ENTRY_STEPS
                if entry and not exc.claimed:
                    return exc
                key = (exc.step, exc.work_name) if entry else None
                backoff = waits.setdefault(key, Backoff(self.retry_max_seconds, ENTRY_TRIES if entry else None))
                delay = backoff.failed()
                if delay is None:
                    self.set_aside(exc, backoff.failures)
                    if goes_on:
                        continue
                    return None
                blocked(exc, delay)
                if sleep(delay):  # True: a stop was asked meanwhile
                    return STOPPED
                attempt = resume(exc) or attempt
            else:
                if None in waits and self.output_blocked is not None:  # the lab's output works again
                    self.output_blocked = None
                    self.write_state()
                return done

    def set_aside(self, blocked: OutputBlocked, tries: int) -> None:
        entry = self.lab.set_aside(blocked, tries)
        self.log.error("not taken", file=entry.file, folder=entry.folder, step=entry.step, reason=entry.reason,
                       tries=tries, message=f"left in {entry.folder}/ and not tried again "
                       + ("until it changes" if entry.folder == "inbox" else "until the next start")
                       + "; the other orders go on")
        self.write_state()

    def write_state(self) -> None:
        """The health line (when something is set aside), and the state in the lock file."""
        not_taken = self.lab.aside.listed()
        if not_taken:
            self.log.warning("health", not_taken=len(not_taken), entries=not_taken)
        if self.lock_fd is not None:
            try:
                write_lock_state(self.lock_fd, {"since": self.since, "mode": self.mode, "not_taken": not_taken,
                                                "output_blocked": self.output_blocked})
            except OSError as exc:
                self.log.warning("state not written", error=str(exc))


def _now() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="seconds").replace("+00:00", "Z")
