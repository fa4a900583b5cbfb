"""The audit log: append-only, hash-chained JSON lines in ``LAB/audit.jsonl``.

Every record carries ``seq`` (1, 2, 3…), ``ts`` (UTC), ``prev`` (the previous
record's hash) and ``hash`` (sha256 of the record's canonical JSON without its
own ``hash``). Editing, removing, reordering or inserting a record breaks the
chain, which :func:`verify` (``lenslane audit verify``) detects.

Rotation keeps the chain: when ``audit.jsonl`` has grown past
``audit.rotate_bytes`` (or the day or month of its first record is over), it is
renamed ``audit-<first seq>.jsonl`` and a fresh ``audit.jsonl`` continues with
the next ``seq`` and the last record's hash as ``prev``.

A crash can cut the last line short. When the log is next opened for writing,
the torn bytes are closed with a newline and a ``torn-line`` record is chained
to the last whole record, holding the torn bytes' offset, size and sha256. So a
torn line in the middle of the log is accepted only where such a record
accounts for exactly those bytes; any other damaged line is a break.
"""
from __future__ import annotations

import hashlib
import json
import os
import re
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Iterable, Iterator, NamedTuple

import orjson

from lenslane.audit.results import ResultFiles, check as check_results
from lenslane.lab.files import fsync_dir, write_all

AUDIT_NAME = "audit.jsonl"
GENESIS = "0" * 64
TORN_EVENT = "torn-line"
ROTATED_RE = re.compile(r"^audit-(\d{1,20})\.jsonl$")
#: The chain's own fields; an event may not carry them.
CHAIN_FIELDS = frozenset({"seq", "ts", "prev", "hash"})
#: How much of the first record's timestamp names the rotation period.
PERIOD_PREFIX = {"day": 10, "month": 7}


_CANONICAL = orjson.OPT_SORT_KEYS | orjson.OPT_SERIALIZE_NUMPY


# Placeholders for the chain fields in a pre-encoded event; the random part is drawn once per engine
# (a helper forked from it shares it), so no order's content can ever contain it.
_MARK = os.urandom(12).hex()
_SEQ_MARK, _TS_MARK, _PREV_MARK = (f"\x00{name}{_MARK}" for name in ("seq", "ts", "prev"))
_SEQ_BYTES, _TS_BYTES, _PREV_BYTES = (orjson.dumps(mark) for mark in (_SEQ_MARK, _TS_MARK, _PREV_MARK))


class EncodedEvent(NamedTuple):
    """An event already in canonical JSON, cut where the values of the chain fields go.

    Made by :func:`encode_event` (in a helper process, for instance); appending
    it writes exactly the bytes appending the event itself would. The keys are
    sorted, so the three values always come in the order ``prev``, ``seq``,
    ``ts``: the record is ``head + prev + after_prev + seq + after_seq + ts +
    tail``, one join.
    """

    head: bytes
    after_prev: bytes
    after_seq: bytes
    tail: bytes


def encode_event(event: dict[str, Any]) -> EncodedEvent:
    if not CHAIN_FIELDS.isdisjoint(event):
        raise ValueError(f"an audit event may not set {sorted(CHAIN_FIELDS & set(event))}")
    template = canonical({**event, "seq": _SEQ_MARK, "ts": _TS_MARK, "prev": _PREV_MARK})
    head, _, rest = template.partition(_PREV_BYTES)
    after_prev, _, rest = rest.partition(_SEQ_BYTES)
    after_seq, _, tail = rest.partition(_TS_BYTES)
    return EncodedEvent(head, after_prev, after_seq, tail)


class AuditError(Exception):
    """The audit log cannot be written safely (the engine must not archive the input)."""


def canonical(record: dict[str, Any]) -> bytes:
    """The record's canonical JSON: UTF-8, keys sorted, no spaces (what its hash is taken of).

    orjson writes it, about ten times faster than the standard library: an
    order makes some thirty records, and encoding them was the engine's largest
    per-order cost after the fsyncs.
    """
    return orjson.dumps(record, option=_CANONICAL)


def record_hash(record: dict[str, Any]) -> str:
    body = {k: v for k, v in record.items() if k != "hash"}
    return hashlib.sha256(canonical(body)).hexdigest()


def _utc_now() -> str:
    return datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


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
        record = json.loads(raw)
    except ValueError:  # also UnicodeDecodeError
        return None
    if isinstance(record, dict) and isinstance(record.get("seq"), int) and isinstance(record.get("hash"), str):
        return record
    return None


# --------------------------------------------------------------------------
# Writing
# --------------------------------------------------------------------------


@dataclass(frozen=True)
class _Tail:
    record: dict[str, Any] | None  # the last whole record of the file
    end: int  # offset just after it (and its newline, if it has one)
    size: int
    newline_missing: bool  # the last record is whole but its newline never reached the disk


def _read_tail(path: Path) -> _Tail:
    """Find the last whole record of a file by reading backwards from its end."""
    try:
        size = path.stat().st_size
    except FileNotFoundError:
        return _Tail(None, 0, 0, False)
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
                    return _Tail(record, end, size, is_last)
            if start == 0:
                return _Tail(None, 0, size, False)
            chunk *= 4


def _first_record(path: Path) -> dict[str, Any] | None:
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


class AuditLog:
    """Appends records to the chain; one write and one fsync per batch.

    Parameters
    ----------
    path : Path
        ``LAB/audit.jsonl``; rotated files go beside it.
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
        self._load()

    # -- state -----------------------------------------------------------------

    def _load(self) -> None:
        """Find where the chain ends; close a line a crash cut short."""
        tail = _read_tail(self.path)
        self.size = tail.size
        self._must_reload = False
        if tail.record is not None:
            self.seq, self.prev = int(tail.record["seq"]), str(tail.record["hash"])
            first = _first_record(self.path)
            self.first_seq, self.first_ts = int(first["seq"]), str(first.get("ts", ""))
        else:
            self.seq, self.prev = self._end_of_rotated_files()
            self.first_seq, self.first_ts = None, None
        if tail.end < tail.size:
            self._close_torn_tail(tail)
        elif tail.newline_missing:
            self._write(b"\n")

    def _end_of_rotated_files(self) -> tuple[int, str]:
        rotated = [p for p in audit_files(self.path.parent) if p.name != AUDIT_NAME]
        if rotated:
            last = _read_tail(rotated[-1]).record
            if last is not None:
                return int(last["seq"]), str(last["hash"])
        return 0, GENESIS

    def _close_torn_tail(self, tail: _Tail) -> None:
        with open(self.path, "rb") as handle:
            handle.seek(tail.end)
            torn = handle.read(tail.size - tail.end)
        ending = b"" if torn.endswith(b"\n") else b"\n"
        closed = torn + ending
        event = {"event": TORN_EVENT, "file": self.path.name, "offset": tail.end, "size": len(closed),
                 "sha256": hashlib.sha256(closed).hexdigest(),
                 "note": "a line cut short by a crash was closed; the chain resumes from the last whole record"}
        self._commit([event], prefix=ending)

    # -- appending ---------------------------------------------------------------

    def append(self, events: Iterable[dict[str, Any] | tuple[bytes, bytes, bytes, bytes]]) -> list[dict[str, Any]]:
        """Chain, write and fsync a batch of events; returns the records as written.

        An event is a dict, or an :class:`EncodedEvent` (its four parts as a
        plain tuple will do); an encoded event's record is returned with its
        chain fields only.

        Raises
        ------
        AuditError, OSError
            The batch is not on disk; the caller must not archive the input.
        """
        if self._must_reload:  # a failed write may have left a torn line
            self._load()
        return self._commit(list(events))

    def _commit(self, events: list[dict[str, Any]], prefix: bytes = b"") -> list[dict[str, Any]]:
        if not events:
            return []
        ts = _utc_now()
        seq, prev = self.seq, self.prev
        records, pieces = [], [prefix]
        ts_json = orjson.dumps(ts)
        prev_json = b'"%s"' % prev.encode()
        join, sha256 = b"".join, hashlib.sha256
        for event in events:
            seq += 1
            if isinstance(event, tuple):
                # An EncodedEvent, or its four parts as a plain tuple (as the helper process sends them):
                # the same bytes canonical() gives for the record, chain fields and all.
                head, after_prev, after_seq, tail = event
                body = join((head, prev_json, after_prev, b"%d" % seq, after_seq, ts_json, tail))
                record = {"seq": seq, "ts": ts, "prev": prev}
            else:
                if not CHAIN_FIELDS.isdisjoint(event):
                    raise ValueError(f"an audit event may not set {sorted(CHAIN_FIELDS & set(event))}")
                record = {"seq": seq, "ts": ts, "prev": prev, **event}
                body = canonical(record)  # what record_hash() hashes: the record without its hash
            prev = record["hash"] = sha256(body).hexdigest()
            prev_json = b'"%s"' % prev.encode()
            records.append(record)
            # The hash goes last on the line; readers parse the line, so key order there is free.
            pieces.append(body[:-1])
            pieces.append(b',"hash":%s}\n' % prev_json)
        if not prefix and self._rotation_due(ts):
            self._rotate()
        self._write(join(pieces))
        self.seq, self.prev = seq, prev
        if self.first_seq is None:
            self.first_seq, self.first_ts = records[0]["seq"], ts
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
        if target.exists():
            raise AuditError(f"cannot rotate {self.path.name}: {target.name} already exists")
        os.rename(self.path, target)
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


# --------------------------------------------------------------------------
# Reading
# --------------------------------------------------------------------------


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


def iter_lines(lab_root: Path) -> Iterator[Line]:
    """Every line of every audit file of the lab, in chain order."""
    for path in audit_files(lab_root):
        try:
            handle = open(path, "rb")
        except FileNotFoundError:
            continue  # rotated meanwhile: the next listing has it
        with handle:
            offset = 0
            for number, raw in enumerate(handle, start=1):
                yield Line(path.name, number, offset, raw, parse_record(raw))
                offset += len(raw)


def iter_records(lab_root: Path) -> Iterator[dict[str, Any]]:
    """Every whole record of the lab's audit log, oldest first, across rotated files.

    Lines that are not whole records (a line cut short by a crash) are skipped;
    :func:`verify` is the place that judges them.
    """
    for line in iter_lines(lab_root):
        if line.record is not None:
            yield line.record


# --------------------------------------------------------------------------
# Verifying
# --------------------------------------------------------------------------


@dataclass
class Finding:
    """One thing wrong: where, which record, what kind, in a sentence."""

    where: str
    seq: int | None
    kind: str  # edited | removed | reordered | inserted | damaged | truncated-start | renamed | result
    problem: str

    def __str__(self) -> str:
        seq = f" (seq {self.seq})" if self.seq is not None else ""
        return f"{self.where}{seq}: {self.problem}"


@dataclass
class VerifyReport:
    records: int = 0
    files: list[str] = field(default_factory=list)
    last_seq: int = 0
    published: int = 0
    rejected: int = 0
    results_matching: int = 0
    results_gone: int = 0
    other_results_matching: dict[str, int] = field(default_factory=dict)  # review/, rejected/, archive/
    breaks: list[Finding] = field(default_factory=list)
    result_problems: list[Finding] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)  # tolerated crash artefacts

    @property
    def ok(self) -> bool:
        return not self.breaks and not self.result_problems

    def _others(self) -> str:
        """Results the log accounts for outside outbox/: waiting for review, refused, superseded."""
        named = {"review": "in review/", "rejected": "refused in rejected/", "archive": "superseded in archive/"}
        parts = [f"{count} {named.get(folder, folder)}" for folder, count in sorted(self.other_results_matching.items())]
        return f"; also matching: {', '.join(parts)}" if parts else ""

    def summary(self) -> str:
        """One line: intact, or the first thing broken."""
        artefacts = f"; {len(self.notes)} tolerated crash artefact(s)" if self.notes else ""
        if self.ok and not self.records:
            return "audit log intact: no records yet" + artefacts
        if self.ok:
            files = f"{len(self.files)} file" + ("s" if len(self.files) != 1 else "")
            return (f"audit log intact: {self.records} records (seq 1–{self.last_seq}) in {files}; "
                    f"{self.published} published, {self.rejected} rejected; {self.results_matching} outbox "
                    f"results match the log, {self.results_gone} no longer in the outbox{self._others()}{artefacts}")
        first = (self.breaks or self.result_problems)[0]
        total = len(self.breaks) + len(self.result_problems)
        more = f" (and {total - 1} more problem(s))" if total > 1 else ""
        return f"audit log BROKEN at {first}{more}"


class _ChainWalker:
    """Follows the chain record by record and says, at the first break, what is wrong."""

    def __init__(self, report: VerifyReport):
        self.report = report
        self.last: Line | None = None  # the last record the chain was followed to
        self.before_last_hash = GENESIS  # the hash that came before it, to recognise an insertion
        self.last_linked = True  # whether the last record chained cleanly to the one before it
        self.pending: list[Line] = []  # lines that are not records, waiting for their torn-line record
        self.seen: dict[int, str] = {}  # seq → where, to tell a removal from a reordering
        self.gaps: list[tuple[Finding, range]] = []

    @property
    def last_seq(self) -> int:
        return self.last.record["seq"] if self.last else 0

    @property
    def last_hash(self) -> str:
        return self.last.record["hash"] if self.last else GENESIS

    def add(self, line: Line, first_of_file: bool = False) -> None:
        if line.record is None:
            if line.raw.strip():
                self.pending.append(line)
            else:
                self._break(line, None, "damaged", "an empty line, which the engine never writes")
            return
        record = line.record
        if self.pending:
            self._settle_pending(line)
        if not self._well_formed(line):
            return
        if first_of_file:
            self._check_file_name(line)
        if record_hash(record) != record["hash"]:
            self._break(line, record["seq"], "edited", "its content does not match its hash: the record was edited")
            self._advance(line, linked=False)
        else:
            self._link(line)
        self.seen.setdefault(record["seq"], line.where)
        self.report.records += 1
        self._count(record)

    def _well_formed(self, line: Line) -> bool:
        record = line.record
        missing = [k for k in ("ts", "prev", "event") if not isinstance(record.get(k), str)]
        if missing:
            self._break(line, record["seq"], "damaged", f"not a record of the engine: no {', '.join(missing)}")
            return False
        return True

    def _link(self, line: Line) -> None:
        record = line.record
        seq, prev = record["seq"], record["prev"]
        expected = self.last_seq + 1
        if seq == expected and prev == self.last_hash:
            self._advance(line)
        elif self.last is None:
            start = f"seq {seq}, not at seq 1" if seq != 1 else "a prev that is not the genesis hash"
            self._break(line, seq, "truncated-start",
                        f"the chain starts with {start}: the first records (or the oldest audit files) were removed")
            self._advance(line, linked=False)
        elif self.last_linked and prev == self.before_last_hash and record["hash"] == self.last_hash:
            self._break(line, seq, "inserted", f"a copy of the record on {self.last.where} was inserted")
        elif self.last_linked and prev == self.before_last_hash:
            self._break(self.last, self.last_seq, "inserted",
                        f"this record was inserted: the next record ({line.where}, seq {seq}) "
                        "chains to the record before it")
            self.last = line  # the chain goes on from the record before the inserted one
        elif seq > expected:
            missing = f"record {expected} is" if seq == expected + 1 else f"records {expected}–{seq - 1} are"
            finding = self._break(line, seq, "removed",
                                  f"seq jumps from {self.last_seq} to {seq}: {missing} missing (removed)")
            self.gaps.append((finding, range(expected, seq)))
            self._advance(line, linked=False)
        elif seq <= self.last_seq:
            self._break(line, seq, "reordered",
                        f"seq {seq} comes after seq {self.last_seq}: records are out of order (reordered) or repeated")
            self._advance(line, linked=False)
        else:
            self._break(self.last, self.last_seq, "edited",
                        f"its hash is not the prev of the next record ({line.where}, seq {seq}): "
                        "one of the two was edited and re-hashed, or replaced")
            self._advance(line, linked=False)

    def _advance(self, line: Line, linked: bool = True) -> None:
        self.before_last_hash = self.last_hash
        self.last = line
        self.last_linked = linked

    def _check_file_name(self, line: Line) -> None:
        match = ROTATED_RE.match(line.file)
        if match and int(match.group(1)) != line.record["seq"]:
            self._break(line, line.record["seq"], "renamed",
                        f"the file's name says it starts at seq {int(match.group(1))}, but its first record is "
                        f"seq {line.record['seq']}")

    def _settle_pending(self, line: Line) -> None:
        """Lines that are not records are accepted only as a torn tail closed by the engine."""
        record, pending = line.record, self.pending
        self.pending = []
        torn = b"".join(p.raw for p in pending)
        accounted = (record.get("event") == TORN_EVENT and record.get("file") == pending[0].file
                     and all(p.file == line.file for p in pending)
                     and record.get("offset") == pending[0].offset and record.get("size") == len(torn)
                     and record.get("sha256") == hashlib.sha256(torn).hexdigest()
                     and record["seq"] == self.last_seq + 1 and record.get("prev") == self.last_hash)
        if accounted:
            self.report.notes.append(
                f"{pending[0].where}: a line cut short by a crash ({len(torn)} bytes), closed by the engine's "
                f"torn-line record seq {record['seq']}; tolerated")
        else:
            self._break(pending[0], None, "damaged",
                        "not a whole record (cut short or damaged) in the middle of the log, and no torn-line "
                        "record of the engine accounts for it")

    def finish(self, final_file: str | None) -> None:
        if self.pending:
            pending, self.pending = self.pending, []
            size = sum(len(p.raw) for p in pending)
            if pending[0].file == final_file and all(p.file == final_file for p in pending):
                self.report.notes.append(
                    f"{pending[0].where}: the log ends with a line cut short by a crash ({size} bytes); tolerated — "
                    "the engine closes it with a torn-line record when it next starts")
            else:
                self._break(pending[0], None, "damaged", "not a whole record, at the end of a rotated file")
        for finding, missing in self.gaps:
            moved = [seq for seq in missing if seq in self.seen]
            if moved:
                finding.kind = "reordered"
                finding.problem = (f"it comes where seq {missing.start} was expected; seq {moved[0]} appears "
                                   f"elsewhere ({self.seen[moved[0]]}): records were reordered")
        self.report.last_seq = self.last_seq

    def _break(self, line: Line, seq: int | None, kind: str, problem: str) -> Finding:
        finding = Finding(line.where, seq, kind, problem)
        self.report.breaks.append(finding)
        return finding

    def _count(self, record: dict[str, Any]) -> None:
        if record["event"] == "published":
            self.report.published += 1
        elif record["event"] == "rejected":
            self.report.rejected += 1


def verify(lab_root: Path) -> VerifyReport:
    """Walk the whole chain of the lab's audit log and check the outbox against it.

    Returns a :class:`VerifyReport`; ``report.ok`` is false when any record was
    edited, removed, reordered or inserted, a line in the middle is damaged, or
    a published result in ``outbox/`` no longer has the sha256 the log recorded.
    """
    root = Path(lab_root)
    report = VerifyReport()
    walker = _ChainWalker(report)
    results = ResultFiles()  # which result files the log accounts for (lenslane.audit.results)
    files = audit_files(root)
    report.files = [p.name for p in files]
    current_file, first_of_file = None, True
    for line in iter_lines(root):
        if line.file != current_file:
            current_file, first_of_file = line.file, True
        walker.add(line, first_of_file and line.record is not None)
        if line.record is not None:
            first_of_file = False
            for problem in results.add(line.record, line.where):
                walker.report.breaks.append(Finding(line.where, line.record["seq"], "damaged", problem))
    walker.finish(files[-1].name if files else None)
    _check_results(root, results, report)
    return report


def _check_results(root: Path, results: ResultFiles, report: VerifyReport) -> None:
    checked = check_results(root, results)
    report.results_matching = checked.matching.get("outbox", 0)
    report.other_results_matching = {k: v for k, v in checked.matching.items() if k != "outbox"}
    report.results_gone = checked.gone
    for path, placed, actual in checked.changed:
        report.result_problems.append(Finding(
            path, placed.seq, "result",
            f"the result was changed after it was published: its sha256 is {actual}, the log recorded "
            f"{placed.sha256} ({placed.where})"))
    for path, why in checked.in_flight:
        report.notes.append(f"{path}: {why}")
    for path in checked.unaccounted:
        report.result_problems.append(Finding(
            path, None, "result",
            "no published record in the audit log accounts for this result: records were removed from the end "
            "of the log, or the file was not written by the engine"))
