"""Writing the audit log: chain, append, fsync, rotate, close a torn line; and keep the index level.

Rotation keeps the chain: when ``audit.jsonl`` has grown past
``audit.rotate_bytes`` (or the day or month of its first record is over), it is
renamed ``audit-<first seq>.jsonl`` and a fresh ``audit.jsonl`` continues with
the next ``seq`` and the last record's hash as ``prev``.

A crash can cut the last line short. When the log is next opened for writing,
the torn bytes are closed with a newline and a ``torn-line`` record is chained
to the last whole record, holding the seq the torn bytes follow, their size and
sha256. That names them by their place in the chain, not by a file name or an
offset, so it stays true after any rotation or renaming of the files.
"""
from __future__ import annotations

import hashlib
import os
import sqlite3
from pathlib import Path
from typing import Any, Iterable

from lenslane.audit.index import Index
from lenslane.audit.reader import AUDIT_NAME, audit_files, first_record, read_tail, rotated_name
from lenslane.audit.records import CHAIN_FIELDS, GENESIS, TORN_EVENT, Packer, canonical, utc_now
from lenslane.lab.files import fsync_dir, rename_noreplace, write_all

#: How much of the first record's timestamp names the rotation period.
PERIOD_PREFIX = {"day": 10, "month": 7}


class AuditError(Exception):
    """The audit log cannot be written safely (the engine must not archive the input)."""


class AuditLog:
    """Appends records to the chain; one write and one fsync per batch; the index follows each append.

    Parameters
    ----------
    path : Path
        ``LAB/audit.jsonl``; rotated files and the index go beside it.
    rotate_bytes : int
        Rotate before a batch once the file has reached this size; 0 never.
    rotate_period : {"none", "day", "month"}
        Rotate before a batch whose UTC day (month) differs from the file's first record's.
    """

    def __init__(self, path: Path, rotate_bytes: int = 0, rotate_period: str = "none"):
        if rotate_period != "none" and rotate_period not in PERIOD_PREFIX:
            raise ValueError(f"rotate_period must be 'none', 'day' or 'month', not {rotate_period!r}")
        self.path = Path(path)
        self.rotate_bytes = rotate_bytes
        self.rotate_period = rotate_period
        self.index = Index(self.path.parent)
        self.index_state = "level"
        try:
            self._load()
        except BaseException:
            self.index.close()
            raise

    def close(self) -> None:
        """Close the index (the log itself is opened only for each write)."""
        self.index.close()

    # -- state -----------------------------------------------------------------

    def _load(self) -> None:
        """Find where the chain ends; close a line a crash cut short; bring the index level with the log."""
        tail = read_tail(self.path)
        self.size = tail.size
        self._must_reload = False
        if tail.record is not None:
            self.seq, self.prev = int(tail.record["seq"]), str(tail.record["hash"])
            first = first_record(self.path)
            self.first_seq, self.first_ts = int(first["seq"]), str(first.get("ts", ""))
        else:
            self.seq, self.prev = self._end_of_rotated_files()
            self.first_seq, self.first_ts = None, None
        try:
            self.index_state = self.index.catch_up()
        except sqlite3.Error as exc:  # a full disk…: the log is not appended to until its index is level again
            self._must_reload = True
            raise AuditError(f"the audit index {self.index.path} cannot be brought level with the log: {exc}") from exc
        if tail.end < tail.size:
            self._close_torn_tail(tail)
        elif tail.newline_missing:
            self._write(b"\n")

    def _end_of_rotated_files(self) -> tuple[int, str]:
        rotated = [p for p in audit_files(self.path.parent) if p.name != AUDIT_NAME]
        if rotated:
            last = read_tail(rotated[-1]).record
            if last is not None:
                return int(last["seq"]), str(last["hash"])
        return 0, GENESIS

    def _close_torn_tail(self, tail) -> None:
        with open(self.path, "rb") as handle:
            handle.seek(tail.end)
            torn = handle.read(tail.size - tail.end)
        ending = b"" if torn.endswith(b"\n") else b"\n"
        closed = torn + ending
        event = {"event": TORN_EVENT, "after_seq": self.seq, "size": len(closed),
                 "sha256": hashlib.sha256(closed).hexdigest(),
                 "note": "a line cut short by a crash was closed; the chain resumes from the last whole record"}
        self._commit([event], prefix=ending)

    # -- appending ---------------------------------------------------------------

    def append(self, events: Iterable[dict[str, Any]]) -> list[dict[str, Any]]:
        """Chain, write and fsync a batch of events; returns the records as written.

        Each event is packed first (:class:`lenslane.audit.records.Packer`): the
        define records its story needs and the chain does not hold yet are
        written just before it, in the same write.

        Raises
        ------
        AuditError, OSError
            The batch is not on disk; the caller must not archive the input.
        """
        if self._must_reload:  # a failed write may have left a torn line, or whole records not yet indexed
            self._load()
        return self._commit(Packer(self.seq + 1, self.index.defines_of).pack(list(events)))

    def _commit(self, events: list[dict[str, Any]], prefix: bytes = b"") -> list[dict[str, Any]]:
        if not events:
            return []
        ts = utc_now()
        seq, prev = self.seq, self.prev
        records, pieces = [], [prefix]
        for event in events:
            if not CHAIN_FIELDS.isdisjoint(event):
                raise ValueError(f"an audit event may not set {sorted(CHAIN_FIELDS & set(event))}")
            seq += 1
            record = {"seq": seq, "ts": ts, "prev": prev, **event}
            body = canonical(record)  # what record_hash() hashes: the record without its hash
            prev = record["hash"] = hashlib.sha256(body).hexdigest()
            records.append(record)
            # The hash goes last on the line; readers parse the line, so key order there is free.
            pieces.append(body[:-1] + b',"hash":"%s"}\n' % prev.encode())
        if not prefix and self._rotation_due(ts):
            self._rotate()
        start = self.size
        self._write(b"".join(pieces))
        self.seq, self.prev = seq, prev
        if self.first_seq is None:
            self.first_seq, self.first_ts = records[0]["seq"], ts
        offset, placed = start + len(prefix), []
        for record, piece in zip(records, pieces[1:]):
            placed.append((record, self.first_seq, offset, len(piece)))
            offset += len(piece)
        try:
            self.index.add(placed)
        except sqlite3.Error:  # the batch is on disk; the index catches up from the log at the next append
            self._must_reload = True
        return records

    def _rotation_due(self, ts: str) -> bool:
        if self.first_seq is None or self.size == 0:
            return False
        if self.rotate_bytes and self.size >= self.rotate_bytes:
            return True
        width = PERIOD_PREFIX.get(self.rotate_period)
        return bool(width and self.first_ts and self.first_ts[:width] != ts[:width])

    def _rotate(self) -> None:
        target = self.path.with_name(rotated_name(self.first_seq))
        try:
            rename_noreplace(self.path, target)
        except FileExistsError:
            raise AuditError(f"cannot rotate {self.path.name}: {target.name} already exists") from None
        fsync_dir(self.path.parent)
        self.size, self.first_seq, self.first_ts = 0, None, None

    def _write(self, data: bytes) -> None:
        created = not self.path.exists()
        try:
            fd = os.open(self.path, os.O_WRONLY | os.O_APPEND | os.O_CREAT | os.O_CLOEXEC, 0o644)
            try:
                write_all(fd, data)
                os.fsync(fd)
            finally:
                os.close(fd)
            if created:
                fsync_dir(self.path.parent)
        except BaseException:
            self._must_reload = True
            raise
        self.size += len(data)
