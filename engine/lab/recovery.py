"""Recovery: getting a lab ready to work after whatever ended the last run.

A file still in ``work/`` at start was claimed but not finished. Its claim key
(inode and the change time the claim gave it) says whether its final audit
record was already written: if so only its move out of ``work/`` is left; if
not, it is redone from its input, and because processing is deterministic the
redo publishes the same bytes over the same name — never a second copy, never
a second record. Temp files a crash left were never published and are removed.
"""
from __future__ import annotations

import os

from lenslane.lab.claim import Claims
from lenslane.lab.files import remove_temp_leftovers
from lenslane.lab.history import History

#: The folders where output files are written under temp names.
OUTPUT_FOLDERS = ("outbox", "review", "rejected", "held", "archive")


def recover(root: str, claims: Claims, history: History) -> list[str]:
    """Remove temp leftovers, ready the history for what ``work/`` holds; returns its names, in claim order.

    Call it holding the lab's lock, before anything else.
    """
    for folder in OUTPUT_FOLDERS:
        remove_temp_leftovers(os.path.join(root, folder))
    history.load()  # each claim's final record, when written, is found in the audit index
    return claims.in_order()
