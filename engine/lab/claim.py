"""Claim: an inbox entry is taken by one atomic rename into ``work/``.

Whatever is in ``work/`` was claimed and is not finished; the claim key (inode
and the change time the rename gave it) names the claim in the audit log.
"""
from __future__ import annotations

import os

from lenslane.lab.errors import OutputBlocked


class Claims:
    """Renames inbox entries into ``work/`` and lists what ``work/`` holds, in the order it was claimed."""

    def __init__(self, inbox: str, work: str):
        self.inbox = inbox
        self.work = work

    def claim(self, name: str) -> tuple[str, os.stat_result] | None:
        """Take ``inbox/<name>``; returns its name in ``work/`` and its ``lstat``, or ``None`` when it is gone.

        Raises
        ------
        OutputBlocked
            The rename failed; the entry is still in the inbox.
        """
        work_name = name
        claimed = f"{self.work}/{work_name}"
        try:
            os.rename(f"{self.inbox}/{name}", claimed)
        except FileNotFoundError:
            return None
        except OSError as exc:
            raise OutputBlocked("claim", self.work, exc) from exc
        try:
            return work_name, os.lstat(claimed)
        except FileNotFoundError:
            return None

    def in_order(self) -> list[str]:
        """The names in ``work/``, in the order they are to be finished."""
        return sorted(os.listdir(self.work))

    @staticmethod
    def original_name(work_name: str) -> str:
        """The name the entry had in the inbox."""
        return work_name
