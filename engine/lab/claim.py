"""Claim: an inbox entry is taken by one atomic rename into ``work/``, under a name of its own.

The name in ``work/`` is ``<claim number>.<name>``: the number counts the
claims, so two arrivals under the same name never meet in ``work/`` (a copy
sent again while the first still waits for its group commit is kept beside
it), and the order in which the engine took them is written by the rename
that takes them — a redo after a crash finishes them in that order, so it
reaches the outcomes the first run reached. The rename never replaces a file.
The claim key (inode and the change time the rename gave it) names the claim
in the audit log.
"""
from __future__ import annotations

import os
import re

from lenslane.lab.errors import OutputBlocked
from lenslane.lab.files import rename_noreplace, shortened

_CLAIMED_RE = re.compile(r"^(\d{12})\.(.+)$", re.DOTALL)


def claimed_name(number: int, name: str) -> str:
    return f"{number:012d}.{shortened(name)}"


def _number(work_name: str) -> int:
    match = _CLAIMED_RE.match(work_name)
    return int(match.group(1)) if match else 0  # a name from elsewhere: before every numbered claim


class Claims:
    """Renames inbox entries into ``work/`` and lists what ``work/`` holds, in the order it was claimed."""

    def __init__(self, inbox: str, work: str):
        self.inbox = inbox
        self.work = work
        self._next: int | None = None  # the next claim number; from what work/ holds, when first needed

    def claim(self, name: str) -> tuple[str, os.stat_result] | None:
        """Take ``inbox/<name>``; returns its name in ``work/`` and its ``lstat``, or ``None`` when it is gone.

        Raises
        ------
        OutputBlocked
            The rename failed; the entry is still in the inbox.
        """
        if self._next is None:
            self.in_order()
        while True:
            work_name = claimed_name(self._next, name)
            self._next += 1
            try:
                rename_noreplace(f"{self.inbox}/{name}", f"{self.work}/{work_name}")
                break
            except FileExistsError:
                continue  # a number put there by hand, or by an older engine: the next one
            except FileNotFoundError:
                return None
            except OSError as exc:
                raise OutputBlocked("claim", f"{self.inbox}/{name}", exc) from exc
        try:
            return work_name, os.lstat(f"{self.work}/{work_name}")
        except FileNotFoundError:
            return None

    def in_order(self) -> list[str]:
        """The names in ``work/``, in the order they were claimed (names not numbered by a claim first)."""
        names = sorted(os.listdir(self.work), key=lambda n: (_number(n), n))
        self._next = max((_number(n) for n in names), default=0) + 1
        return names

    @staticmethod
    def original_name(work_name: str) -> str:
        """The name the entry had in the inbox (cut short if it was very long)."""
        match = _CLAIMED_RE.match(work_name)
        return match.group(2) if match else work_name
