"""The audit log: append-only, hash-chained JSON lines in ``LAB/audit.jsonl``.

Every record carries ``seq`` (1, 2, 3…), ``ts`` (UTC), ``prev`` (the previous
record's hash) and ``hash`` (sha256 of the record's canonical JSON without its
own ``hash``). Editing, removing, reordering or inserting a record breaks the
chain, which ``lenslane audit verify`` detects.
"""
from __future__ import annotations

import hashlib
import json
import os
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Iterable

AUDIT_NAME = "audit.jsonl"
GENESIS = "0" * 64


def canonical(record: dict[str, Any]) -> bytes:
    return json.dumps(record, sort_keys=True, separators=(",", ":"), ensure_ascii=False).encode()


def record_hash(record: dict[str, Any]) -> str:
    body = {k: v for k, v in record.items() if k != "hash"}
    return hashlib.sha256(canonical(body)).hexdigest()


def _utc_now() -> str:
    return datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


class AuditLog:
    """Appends records to the chain; one fsync per batch."""

    def __init__(self, path: Path):
        self.path = Path(path)
        self.seq, self.prev = _tail_state(self.path)

    def append(self, events: Iterable[dict[str, Any]]) -> list[dict[str, Any]]:
        """Chain, write and fsync a batch of events; returns the records as written."""
        records = []
        lines = []
        ts = _utc_now()
        for event in events:
            self.seq += 1
            record = {"seq": self.seq, "ts": ts, "prev": self.prev, **event}
            record["hash"] = record_hash(record)
            self.prev = record["hash"]
            records.append(record)
            lines.append(canonical(record))
        if not lines:
            return records
        fd = os.open(self.path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
        try:
            os.write(fd, b"\n".join(lines) + b"\n")
            os.fsync(fd)
        finally:
            os.close(fd)
        return records


def _tail_state(path: Path) -> tuple[int, str]:
    """The last complete record's seq and hash, read from the end of the file."""
    try:
        size = path.stat().st_size
    except FileNotFoundError:
        return 0, GENESIS
    if size == 0:
        return 0, GENESIS
    with open(path, "rb") as handle:
        chunk = 4096
        while True:
            start = max(0, size - chunk)
            handle.seek(start)
            data = handle.read(size - start)
            lines = data.split(b"\n")
            complete = [line for line in (lines if start == 0 else lines[1:]) if line.strip()]
            for line in reversed(complete):
                try:
                    record = json.loads(line)
                    return int(record["seq"]), str(record["hash"])
                except (ValueError, KeyError, TypeError):
                    continue  # a line cut short by a crash: the chain resumes after the last whole one
            if start == 0:
                return 0, GENESIS
            chunk *= 4


def iter_records(lab_root: Path):
    """Every complete record of the lab's audit log, oldest first (a torn last line is skipped)."""
    path = Path(lab_root) / AUDIT_NAME
    try:
        handle = open(path, "rb")
    except FileNotFoundError:
        return
    with handle:
        for line in handle:
            if not line.endswith(b"\n"):
                break
            try:
                yield json.loads(line)
            except ValueError:
                continue
