"""Which result files the audit log accounts for: where each one is and the sha256 it must have.

A ``published`` record places a result (``result`` and ``result_sha256``): in
``outbox/`` when it may be made without a person, in ``review/`` when it waits
for one. A ``decided`` record (``lenslane decide``) may place one too (the
approved result in ``outbox/``) and carries ``moves``: each ``{"from", "to",
"sha256"}`` takes a file from one place to another (``to`` null: removed) —
a reviewed result refused into ``rejected/``, a superseded revision into
``archive/``. Following the records in order gives every result file the lab
should hold; :func:`check` compares that with the folders.
"""
from __future__ import annotations

import hashlib
import json
import os
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterator

#: The folders a result file may be accounted in (a path in a record is never followed elsewhere).
RESULT_PATH_RE = re.compile(r"^(outbox|review|rejected|archive)/[A-Za-z0-9_-][A-Za-z0-9._-]*\.json[A-Za-z0-9._-]*$")
#: The folders every file of which the log must account for.
WATCHED = ("outbox", "review")
#: Where lenslane decide's requests wait for the lab's one writer.
REQUESTS = "decisions"


@dataclass(frozen=True)
class Placed:
    sha256: str
    seq: int
    where: str


@dataclass
class ResultFiles:
    """Follows the records, oldest first; ``files`` maps a lab-relative path to what must be there.

    With ``present`` (the paths now in the result folders, :func:`present_in`), only those are
    followed and the others are counted in ``gone``: a long history then costs no memory for the
    results long taken away downstream.
    """

    files: dict[str, Placed] = field(default_factory=dict)
    present: set[str] | None = None
    gone: int = 0

    def _place(self, path: str, placed: Placed) -> None:
        if self.present is None or path in self.present:
            self.files[path] = placed
        else:
            self.gone += 1

    def add(self, record: dict[str, Any], where: str) -> list[str]:
        """Take one record into account; returns what is wrong with the paths it names."""
        problems = []
        for move in record.get("moves") or ():
            source, target = move.get("from"), move.get("to")
            placed = self.files.pop(str(source), None)
            if (placed is None and self.present is not None and isinstance(move.get("sha256"), str)
                    and RESULT_PATH_RE.match(str(source))):
                placed = Placed(move["sha256"], record["seq"], where)  # its earlier place is gone from disk too
            if target is None or placed is None:
                continue
            if RESULT_PATH_RE.match(str(target)):
                self._place(str(target), Placed(placed.sha256, record["seq"], where))
            else:
                problems.append(f"moves a result to {target!r}, outside the lab's result folders")
        if record.get("event") in ("published", "decided") and record.get("result"):
            path = str(record["result"])
            if RESULT_PATH_RE.match(path):
                self._place(path, Placed(str(record.get("result_sha256")), record["seq"], where))
            else:
                problems.append(f"names a result {path!r} outside outbox/ and review/")
        return problems


@dataclass
class Checked:
    matching: dict[str, int] = field(default_factory=dict)  # folder → results that match the log
    gone: int = 0  # accounted for, no longer there (taken away downstream)
    changed: list[tuple[str, Placed, str]] = field(default_factory=list)  # path, what the log says, its sha now
    unaccounted: list[str] = field(default_factory=list)
    in_flight: list[tuple[str, str]] = field(default_factory=list)  # path, why it is not yet recorded


def file_sha256(path: Path) -> str | None:
    try:
        return hashlib.sha256(path.read_bytes()).hexdigest()
    except (FileNotFoundError, IsADirectoryError, NotADirectoryError):
        return None


def present_in(root: Path) -> set[str]:
    """The lab-relative paths of the files now in the folders a result may be in."""
    found = set()
    for folder in ("outbox", "review", "rejected", "archive"):
        try:
            found.update(f"{folder}/{name}" for name in os.listdir(Path(root) / folder))
        except FileNotFoundError:
            continue
    return found


def check(root: Path, results: ResultFiles) -> Checked:
    """Compare the folders with what the log accounts for."""
    root = Path(root)
    checked = Checked(gone=results.gone)
    for path, placed in sorted(results.files.items()):
        actual = file_sha256(root / path)
        if actual is None:
            checked.gone += 1
        elif actual == placed.sha256:
            folder = path.split("/", 1)[0]
            checked.matching[folder] = checked.matching.get(folder, 0) + 1
        else:
            checked.changed.append((path, placed, actual))
    in_flight: dict[str, str] | None = None
    for path, name in watched_results(root):
        if path in results.files:
            continue
        in_flight = _in_flight(root) if in_flight is None else in_flight
        why = in_flight.get(name.removesuffix(".json"))
        if why:
            checked.in_flight.append((path, why))
        else:
            checked.unaccounted.append(path)
    return checked


def watched_results(root: Path) -> Iterator[tuple[str, str]]:
    """The result files now in the :data:`WATCHED` folders, each as its lab-relative path and its name."""
    for folder in WATCHED:
        try:
            names = sorted(os.listdir(Path(root) / folder))
        except FileNotFoundError:
            continue
        for name in names:
            if name.endswith(".json") and not name.startswith("."):
                yield f"{folder}/{name}", name


def _in_flight(root: Path) -> dict[str, str]:
    """Order ids whose result may be written before its record: claimed orders and waiting decisions."""
    found: dict[str, str] = {}
    for folder, why in ((REQUESTS, "a decision on it waits in decisions/ and is recorded when it is applied"),
                        ("work", "its order is still in work/ (claimed, not finished); the engine redoes it and "
                                 "records it when it next starts")):
        try:
            names = os.listdir(root / folder)
        except FileNotFoundError:
            continue
        for name in names:
            if name.startswith(".") or name.endswith(".answer.json"):
                continue
            try:
                order_id = json.loads((root / folder / name).read_bytes()).get("order_id")
            except (OSError, ValueError, AttributeError):
                continue
            if isinstance(order_id, str):
                found[order_id] = why
    return found
