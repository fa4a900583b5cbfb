"""Arrival: when an inbox entry is complete enough to claim.

An entry is taken only when it is complete — moved in by a rename, closed
after writing, or unchanged for ``watch.quiet_seconds``; a young file that does
not parse yet is looked at again, not rejected. Entries that are not plain
files, and files over ``watch.max_order_bytes``, are claimed without being
opened here: ``work/`` says what they are.
"""
from __future__ import annotations

import os
import stat
import time
from dataclasses import dataclass
from typing import Callable

from lenslane.config import WatchSettings
from lenslane.lab.errors import OutputBlocked
from lenslane.lab.examine import UNREADABLE, Examined
from lenslane.lab.files import NotRegular, open_regular, read_exactly

#: How often a young file that does not parse yet is looked at again (s), at the least.
INCOMPLETE_RECHECK_SECONDS = 0.25


def is_order_name(name: str) -> bool:
    """Only ``*.json`` files are orders; hidden, ``.tmp`` and ``.part`` names wait until renamed."""
    return name.endswith(".json") and not name.startswith(".") and not name.endswith((".tmp", ".part"))


def order_names(inbox: str) -> list[str]:
    """Order names in the inbox, oldest name first."""
    try:
        names = os.listdir(inbox)
    except FileNotFoundError:
        return []
    return sorted(n for n in names if is_order_name(n))


@dataclass(frozen=True)
class Wait:
    """Not yet: look at the entry again at ``until`` (wall-clock seconds)."""

    until: float
    reason: str  # "settling" (still changing) | "incomplete" (young and does not parse yet)


@dataclass(frozen=True)
class Complete:
    """An entry to claim, with what was read of it (``None``: it is judged once claimed)."""

    opened: os.stat_result | None = None
    examined: Examined | None = None


@dataclass
class _Seen:
    signature: tuple[int, int, int]  # size, mtime (ns), inode
    since: float  # when this signature was first seen (wall clock)
    failed: bool = False  # read with this signature and found incomplete


class Arrivals:
    """Looks at inbox entries and remembers, per name, since when it has looked the same."""

    def __init__(self, inbox: str, watch: WatchSettings, examine: Callable[[bytes], Examined]):
        self.inbox = inbox
        self.examine = examine
        self._watching: dict[str, _Seen] = {}
        self.use(watch)

    def use(self, watch: WatchSettings) -> None:
        """Take the ``[watch]`` settings (at start, and on a reload)."""
        self.quiet_seconds = watch.quiet_seconds
        self.young_seconds = watch.young_seconds
        self.max_order_bytes = watch.max_order_bytes

    def forget(self, name: str) -> None:
        self._watching.pop(name, None)

    def forget_missing(self, present: set[str]) -> None:
        """Drop what was remembered about entries no longer in the inbox."""
        for name in [n for n in self._watching if n not in present]:
            del self._watching[name]

    def look(self, name: str, moved: bool = False, closed: bool = False) -> Complete | Wait | None:
        """Whether ``inbox/<name>`` is complete; ``None`` when it is gone.

        Raises
        ------
        OutputBlocked
            The machine would not let it be read (not the file's own permissions).
        """
        path = f"{self.inbox}/{name}"
        try:
            info = os.lstat(path)
        except FileNotFoundError:
            self.forget(name)
            return None
        if not stat.S_ISREG(info.st_mode) or info.st_size > self.max_order_bytes:
            return Complete()  # judged in work/, never opened here
        now = time.time()
        seen = self._seen(name, info, now)
        age = now - info.st_mtime if info.st_mtime <= now else now - seen.since  # a future mtime: a skewed clock
        quiet = age >= self.quiet_seconds or now - seen.since >= self.quiet_seconds
        if not (moved or quiet or (closed and info.st_size > 0)):
            return Wait(now + self.quiet_seconds - max(age, now - seen.since), "settling")
        young = not moved and age < self.young_seconds
        if seen.failed and young:
            return self._wait_incomplete(now, age)
        try:
            fd, opened = open_regular(path)
        except FileNotFoundError:
            self.forget(name)
            return None
        except NotRegular:
            return Complete()  # swapped meanwhile: work/ says what it is
        except OSError as exc:
            if exc.errno not in UNREADABLE:
                raise OutputBlocked("read", path, exc) from exc
            return Complete()  # the sender's permissions: work/ says why
        try:
            if opened.st_size > self.max_order_bytes:
                return Complete()
            examined = self.examine(read_exactly(fd, opened.st_size))
        finally:
            os.close(fd)
        if examined.maybe_incomplete and young and opened.st_size > 0:
            seen.failed = True
            return self._wait_incomplete(now, age)
        return Complete(opened, examined)

    def _seen(self, name: str, info: os.stat_result, now: float) -> _Seen:
        signature = (info.st_size, info.st_mtime_ns, info.st_ino)
        seen = self._watching.get(name)
        if seen is None or seen.signature != signature:
            seen = self._watching[name] = _Seen(signature, now)
        return seen

    def _wait_incomplete(self, now: float, age: float) -> Wait:
        recheck = max(self.quiet_seconds, INCOMPLETE_RECHECK_SECONDS)
        return Wait(now + min(recheck, self.young_seconds - age), "incomplete")
