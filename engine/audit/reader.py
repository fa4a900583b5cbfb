"""Reading the audit log: its files in chain order, its lines, its records.

``LAB/audit.jsonl`` is the file being written; rotated files are named
``audit-<first seq>.jsonl`` (zero-padded). A place in the log is ``(first seq
of its file, byte offset)``: it stays true when ``audit.jsonl`` is rotated to
its seq-named file.
"""
from __future__ import annotations

import json
import os
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterator

import orjson

from lenslane.audit.records import AUDIT_NAME

ROTATED_RE = re.compile(r"^audit-(\d{1,20})\.jsonl$")


def rotated_name(first_seq: int) -> str:
    """The name a full ``audit.jsonl`` is renamed to: its first record's seq, zero-padded to sort."""
    return f"audit-{first_seq:012d}.jsonl"


def audit_files(lab_root: Path) -> list[Path]:
    """The lab's audit files in chain order: rotated files by first seq, then ``audit.jsonl``."""
    root = Path(lab_root)
    try:
        names = os.listdir(root)
    except FileNotFoundError:
        return []
    rotated = sorted((int(m.group(1)), name) for name in names if (m := ROTATED_RE.match(name)))
    files = [root / name for _, name in rotated]
    if AUDIT_NAME in names:
        files.append(root / AUDIT_NAME)
    return files


def parse_record(raw: bytes) -> dict[str, Any] | None:
    """The record on one line, or ``None`` when the line is not a whole record."""
    try:
        record = orjson.loads(raw)
    except orjson.JSONDecodeError:
        try:  # what orjson refuses and the standard library reads (an integer past 64 bits, say)
            record = json.loads(raw)
        except ValueError:  # also UnicodeDecodeError
            return None
    if isinstance(record, dict) and isinstance(record.get("seq"), int) and isinstance(record.get("hash"), str):
        return record
    return None


@dataclass(frozen=True)
class Line:
    """One line of an audit file: where it is, its bytes, and its record if it is a whole one."""

    file: str
    number: int  # 1-based
    offset: int
    raw: bytes  # with its newline, if it has one
    record: dict[str, Any] | None

    @property
    def where(self) -> str:
        return f"{self.file} line {self.number}"


def iter_lines(lab_root: Path, start: tuple[Path, int] | None = None) -> Iterator[Line]:
    """Every line of every audit file of the lab, in chain order; from ``(file, offset)`` if given.

    Line numbers are counted from ``start`` (1 is its first line) when it is given.
    """
    files = audit_files(lab_root)
    if start is not None:
        files = [p for p in files if _file_order(p) >= _file_order(start[0])]
    for path in files:
        try:
            handle = open(path, "rb", buffering=1 << 20)
        except FileNotFoundError:
            continue  # rotated meanwhile: the next listing has it
        with handle:
            offset = 0
            if start is not None and path.name == start[0].name:
                offset = start[1]
                handle.seek(offset)
            for number, raw in enumerate(handle, start=1):
                yield Line(path.name, number, offset, raw, parse_record(raw))
                offset += len(raw)


def _file_order(path: Path) -> tuple[int, int]:
    match = ROTATED_RE.match(path.name)
    return (0, int(match.group(1))) if match else (1, 0)


def iter_records(lab_root: Path) -> Iterator[dict[str, Any]]:
    """Every whole record of the lab's audit log, oldest first, across rotated files, as written.

    Lines that are not whole records (a line cut short by a crash) are skipped;
    :func:`lenslane.audit.verify.verify` is the place that judges them.
    """
    for line in iter_lines(lab_root):
        if line.record is not None:
            yield line.record


def file_of(lab_root: Path, first_seq: int) -> Path | None:
    """The file whose first record is ``first_seq``: its rotated name, or ``audit.jsonl`` while it is current."""
    root = Path(lab_root)
    rotated = root / rotated_name(first_seq)
    if rotated.exists():
        return rotated
    current = root / AUDIT_NAME
    first = first_record(current)
    return current if first is not None and first["seq"] == first_seq else None


def read_at(lab_root: Path, first_seq: int, offset: int, length: int) -> dict[str, Any] | None:
    """The record at a place in the log, or ``None`` when it is not there (any more)."""
    path = file_of(lab_root, first_seq)
    if path is None:
        return None
    try:
        with open(path, "rb") as handle:
            handle.seek(offset)
            raw = handle.read(length)
    except FileNotFoundError:
        return None
    return parse_record(raw) if raw.endswith(b"\n") else None


@dataclass(frozen=True)
class Tail:
    record: dict[str, Any] | None  # the last whole record of the file
    end: int  # offset just after it (and its newline, if it has one)
    size: int
    newline_missing: bool  # the last record is whole but its newline never reached the disk


def read_tail(path: Path) -> Tail:
    """Find the last whole record of a file by reading backwards from its end."""
    try:
        size = path.stat().st_size
    except FileNotFoundError:
        return Tail(None, 0, 0, False)
    with open(path, "rb") as handle:
        chunk = 8192
        while True:
            start = max(0, size - chunk)
            handle.seek(start)
            pieces = handle.read(size - start).split(b"\n")
            offsets = [start]
            for piece in pieces[:-1]:
                offsets.append(offsets[-1] + len(piece) + 1)
            first = 0 if start == 0 else 1  # the first piece of a later chunk may be a line's second half
            for index in range(len(pieces) - 1, first - 1, -1):
                record = parse_record(pieces[index]) if pieces[index].strip() else None
                if record is not None:
                    is_last = index == len(pieces) - 1
                    end = offsets[index] + len(pieces[index]) + (0 if is_last else 1)
                    return Tail(record, end, size, is_last)
            if start == 0:
                return Tail(None, 0, size, False)
            chunk *= 4


def first_record(path: Path) -> dict[str, Any] | None:
    try:
        handle = open(path, "rb")
    except FileNotFoundError:
        return None
    with handle:
        for line in handle:
            record = parse_record(line)
            if record is not None:
                return record
    return None
