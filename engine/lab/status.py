"""``lenslane status LAB``: the lab at a glance, read from the folders, the lock and the audit log.

Whether an engine runs (the live holder of ``LAB/.lock``, its pid and since
when), how many entries each folder holds, how long the oldest waiting order
has waited, the entries the engine could not take and why (as the running
engine, or the last one, wrote them into its lock file), and the audit log's
last record and size. Reads only; safe beside a running engine.
"""
from __future__ import annotations

import os
import time
from pathlib import Path
from typing import Any

from lenslane.lab.arrival import is_order_name
from lenslane.lab.files import lock_holder, read_lock
from lenslane.lab.history import History
from lenslane.lab.outcomes import ERRORS_SUFFIX, HELD_SUFFIX

#: The folders counted, in the order shown; a folder a lab does not have is left out.
SHOWN = ("inbox", "work", "outbox", "review", "held", "rejected", "archive", "decisions")
_REPORTS = (ERRORS_SUFFIX, HELD_SUFFIX)


def _counted(folder: str, name: str) -> bool:
    if folder == "inbox":
        return is_order_name(name)
    if name.startswith("."):
        return False  # temp files
    return not name.endswith(_REPORTS)  # an input and its report count once


def lab_status(root: Path, now: float | None = None) -> dict[str, Any]:
    """The status of the lab at ``root`` as plain data (what ``--json`` prints)."""
    root = Path(root)
    now = time.time() if now is None else now
    pid, state, lock = read_lock(root)
    holder = lock_holder(lock, pid) if lock is not None else None
    state = state or {}
    engine = {"running": holder is not None, "pid": holder, "since": state.get("since") if holder else None,
              "mode": state.get("mode") if holder else None}
    folders, oldest = {}, None
    for folder in SHOWN:
        try:
            entries = [e for e in os.scandir(root / folder) if _counted(folder, e.name)]
        except FileNotFoundError:
            continue
        folders[folder] = len(entries)
        if folder in ("inbox", "work"):
            for entry in entries:
                try:
                    mtime = entry.stat(follow_symlinks=False).st_mtime
                except FileNotFoundError:
                    continue
                if oldest is None or mtime < oldest[0]:
                    oldest = (mtime, folder, entry.name)
    history = History(root)
    last = history.last_record()
    return {
        "lab": str(root),
        "engine": engine,
        "folders": folders,
        "oldest_waiting": None if oldest is None else {
            "folder": oldest[1], "file": os.fsencode(oldest[2]).decode("utf-8", "backslashreplace"),
            "age_seconds": round(max(0.0, now - oldest[0]), 1)},
        "not_taken": state.get("not_taken", []),
        "output_blocked": state.get("output_blocked") if holder else None,
        "not_taken_as_of": "the running engine" if holder else ("the last engine's run" if state else None),
        "audit": {"bytes": history.size(), "last_record": None if last is None else {
            **{key: last.get(key) for key in ("seq", "ts", "event", "order_id")},
            "file": (last.get("received") or {}).get("file")}},  # the input's name, as it arrived
    }


def _age(seconds: float) -> str:
    for unit, size in (("d", 86400), ("h", 3600), ("min", 60)):
        if seconds >= size:
            return f"{seconds / size:.1f} {unit}"
    return f"{seconds:.0f} s"


def render(status: dict[str, Any]) -> str:
    """The status as a few lines for a person."""
    engine = status["engine"]
    lines = [f"lab {status['lab']}"]
    lines.append(f"engine: running, pid {engine['pid']}, since {engine['since'] or 'unknown'}"
                 + (f" ({engine['mode']})" if engine.get("mode") else "") if engine["running"] else "engine: not running")
    lines.append("folders: " + ", ".join(f"{name} {count}" for name, count in status["folders"].items()))
    oldest = status["oldest_waiting"]
    lines.append("oldest waiting: " + ("none" if oldest is None else
                                       f"{oldest['folder']}/{oldest['file']}, {_age(oldest['age_seconds'])}"))
    if status["not_taken"]:
        lines.append(f"not taken ({len(status['not_taken'])}, as of {status['not_taken_as_of']}):")
        for entry in status["not_taken"]:
            lines.append(f"  {entry['folder']}/{entry['file']}: {entry['step']} failed {entry['tries']} times: "
                         f"{entry['reason']}")
    else:
        lines.append("not taken: none")
    blocked = status["output_blocked"]
    if blocked:
        lines.append(f"output blocked since {blocked['since']}: {blocked['step']} {blocked['path']}: {blocked['error']} "
                     "(retried until it works; nothing is lost)")
    audit = status["audit"]
    last = audit["last_record"]
    lines.append(f"audit log: {audit['bytes']} bytes; last record "
                 + ("none" if last is None else f"seq {last['seq']} at {last['ts']}: {last['event']}"
                    + (f" {last['order_id']}" if last.get("order_id") else "")))
    return "\n".join(lines)
