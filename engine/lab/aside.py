"""Entries set aside: what could not be claimed, read or moved after a bounded number of tries.

Such an entry is left where it is (``inbox/`` or ``work/``), reported once,
and not tried again while it stays as it is: an inbox entry whose inode, size,
times or permissions change (a person fixed it) is looked at afresh; one in
``work/`` is tried again at the next start.
"""
from __future__ import annotations

import os
import time
from dataclasses import asdict, dataclass

from lenslane.lab.errors import OutputBlocked
from lenslane.lab.files import printable


@dataclass(frozen=True)
class SetAside:
    """One entry not taken, and why."""

    folder: str  # "inbox" or "work"
    file: str  # its name there (printable)
    step: str  # claim | read | archive
    reason: str
    tries: int
    since: float  # wall clock
    signature: tuple[int, int, int, int]  # inode, size, mtime, ctime (ns) when it was set aside

    def as_dict(self) -> dict[str, object]:
        data = asdict(self)
        del data["signature"]
        return data


def signature(info: os.stat_result) -> tuple[int, int, int, int]:
    return info.st_ino, info.st_size, info.st_mtime_ns, info.st_ctime_ns


class Aside:
    """The entries set aside, by folder and name."""

    def __init__(self) -> None:
        self.entries: dict[tuple[str, str], SetAside] = {}

    def add(self, folder: str, name: str, step: str, reason: str, tries: int, info: os.stat_result | None) -> SetAside:
        entry = SetAside(folder, name, step, reason, tries, time.time(), signature(info) if info else (0, 0, 0, 0))
        self.entries[(folder, name)] = entry
        return entry

    def add_blocked(self, blocked: OutputBlocked, tries: int, work: str) -> SetAside:
        """Set aside the entry ``blocked`` is about: in ``work/`` when it was claimed, else in the inbox."""
        error = blocked.error
        reason = f"{getattr(error, 'strerror', None) or error}: {blocked.path}"
        if blocked.work_name is not None:
            folder, name, path = "work", blocked.work_name, os.path.join(work, blocked.work_name)
        else:
            folder, name, path = "inbox", os.path.basename(os.fspath(blocked.path)), os.fspath(blocked.path)
        try:
            info = os.lstat(path)
        except OSError:
            info = None
        return self.add(folder, printable(name), blocked.step, reason, tries, info)

    def holds(self, name: str, info: os.stat_result) -> bool:
        """Whether ``inbox/<name>`` is set aside and unchanged since (a changed one is forgotten)."""
        entry = self.entries.get(("inbox", name))
        if entry is None:
            return False
        if entry.signature == signature(info):
            return True
        del self.entries[("inbox", name)]
        return False

    def forget_missing(self, present: set[str]) -> bool:
        """Forget inbox entries no longer there; True when something was forgotten."""
        gone = [key for key in self.entries if key[0] == "inbox" and key[1] not in present]
        for key in gone:
            del self.entries[key]
        return bool(gone)

    def listed(self) -> list[dict[str, object]]:
        return [entry.as_dict() for entry in sorted(self.entries.values(), key=lambda e: (e.folder, e.file))]
