"""Verifying the audit log: the hash chain, the define records, the torn lines, the outbox.

By default :func:`verify` checks what is new since the last point it found
intact (kept in the index, with that record's hash, which it checks is still
there); ``full=True`` walks every file from seq 1. Either way each record's
hash is checked against its content, each ``prev`` against the record before,
each define record's ``sha256`` against its body, and each reference to a
define against the defines before it.
"""
from __future__ import annotations

import hashlib
from dataclasses import dataclass, field
from pathlib import Path

from lenslane.audit.index import Index, Place, level_index
from lenslane.audit.results import Placed, ResultFiles, check as check_results, present_in, watched_results
from lenslane.audit.reader import (
    ROTATED_RE, Line, audit_files, file_of, iter_lines, parse_record, read_tail, rotated_name,
)
from lenslane.audit.records import DEFINE_EVENT, GENESIS, TORN_EVENT, canonical, record_hash, ref_of, refs_in

_HASH_SUFFIX = len(b',"hash":"') + 64 + len(b'"}\n')


@dataclass
class Finding:
    """One thing wrong: where, which record, what kind, in a sentence."""

    where: str
    seq: int | None
    kind: str  # edited | removed | reordered | inserted | damaged | truncated-start | renamed | result | undefined
    problem: str

    def __str__(self) -> str:
        seq = f" (seq {self.seq})" if self.seq is not None else ""
        return f"{self.where}{seq}: {self.problem}"


@dataclass
class VerifyReport:
    records: int = 0
    files: list[str] = field(default_factory=list)
    first_seq: int = 1  # where the walk began (1, or after the last verified point)
    last_seq: int = 0
    published: int = 0
    rejected: int = 0
    results_matching: int = 0
    results_gone: int = 0
    other_results_matching: dict[str, int] = field(default_factory=dict)  # review/, rejected/, archive/
    bytes: int = 0
    breaks: list[Finding] = field(default_factory=list)
    result_problems: list[Finding] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)  # tolerated crash artefacts
    since: int | None = None  # the seq verified before, for an incremental check

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
        if self.ok and not self.records and self.since is None:
            return "audit log intact: no records yet" + artefacts
        if self.ok:
            files = f"{len(self.files)} file" + ("s" if len(self.files) != 1 else "")
            scope = (f"{self.records} new records (seq {self.since + 1}–{self.last_seq}) since seq {self.since}, "
                     f"verified before," if self.since is not None and self.records
                     else f"nothing new since seq {self.since}, verified before," if self.since is not None
                     else f"{self.records} records (seq 1–{self.last_seq})")
            return (f"audit log intact: {scope} in {files}; {self.published} published, {self.rejected} rejected; "
                    f"{self.results_matching} outbox results match the log, {self.results_gone} no longer where a "
                    f"record placed them (taken away downstream, or moved on by a decision){self._others()}"
                    f"{artefacts}")
        first = (self.breaks or self.result_problems)[0]
        total = len(self.breaks) + len(self.result_problems)
        more = f" (and {total - 1} more problem(s))" if total > 1 else ""
        return f"audit log BROKEN at {first}{more}"


def hash_is_right(line: Line) -> bool:
    """Whether a record's hash is the sha256 of its canonical JSON without it.

    A line the engine wrote is that JSON with the hash added last, so its own
    bytes are hashed; any other line is decoded and encoded again.
    """
    raw, record = line.raw, line.record
    if raw.endswith(b'"}\n') and raw[-_HASH_SUFFIX:-_HASH_SUFFIX + 9] == b',"hash":"':
        if hashlib.sha256(raw[:-_HASH_SUFFIX] + b"}").hexdigest() == record["hash"]:
            return True
    return record_hash(record) == record["hash"]


class _ChainWalker:
    """Follows the chain record by record and says, at the first break, what is wrong."""

    def __init__(self, report: VerifyReport, index: Index | None, start: Line | None = None):
        self.report = report
        self.index = index  # for refs defined before the walk began
        self.last: Line | None = start  # the last record the chain was followed to
        self.before_last_hash = GENESIS  # the hash that came before it, to recognise an insertion
        self.last_linked = True  # whether the last record chained cleanly to the one before it
        self.pending: list[Line] = []  # lines that are not records, waiting for their torn-line record
        self.seen: dict[int, str] = {}  # seq → where, for seqs found missing earlier: a reordering, not a removal
        self.gaps: list[tuple[Finding, range]] = []
        self.defined: dict[int | str, str] = {}  # each define walked, by seq and by its sha256's first digits → kind

    @property
    def last_seq(self) -> int:
        return self.last.record["seq"] if self.last else 0

    @property
    def last_hash(self) -> str:
        return self.last.record["hash"] if self.last else GENESIS

    def add(self, line: Line, first_of_file: bool = False) -> None:
        self.report.bytes += len(line.raw)
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
        if not hash_is_right(line):
            self._break(line, record["seq"], "edited", "its content does not match its hash: the record was edited")
            self._advance(line, linked=False)
        else:
            self._link(line)
        self._check_defines(line)
        if self.gaps:  # only the seqs a gap misses are remembered, so memory does not grow with the log
            seq = record["seq"]
            if any(seq in missing for _, missing in self.gaps):
                self.seen.setdefault(seq, line.where)
        self.report.records += 1
        if record["event"] == "published":
            self.report.published += 1
        elif record["event"] == "rejected":
            self.report.rejected += 1

    def _well_formed(self, line: Line) -> bool:
        record = line.record
        missing = [k for k in ("ts", "prev", "event") if not isinstance(record.get(k), str)]
        if missing:
            self._break(line, record["seq"], "damaged", f"not a record of the engine: no {', '.join(missing)}")
            return False
        return True

    def _check_defines(self, line: Line) -> None:
        record = line.record
        if record["event"] == DEFINE_EVENT:
            digest = record.get("sha256")
            if not isinstance(digest, str) or hashlib.sha256(canonical(record.get("body"))).hexdigest() != digest:
                self._break(line, record["seq"], "edited", "a define record whose body does not match its sha256")
                return
            self.defined[record["seq"]] = self.defined[ref_of(digest)] = str(record.get("kind"))
        for ref, kind in refs_in(record):
            found = self.defined.get(ref) if ref is not None else None
            if found is None and ref is not None and self.index is not None:
                found = self._defined_before(ref)
                if found is not None:  # a define from before the walk's start, known from now on
                    self.defined[ref] = found
            if found != kind:
                what = f"refers to {ref!r}, which no define record before it holds" if found is None else (
                    f"refers to {ref!r} as a {kind}, but that define record holds a {found}")
                self._break(line, record["seq"], "undefined", what)
                break

    def _defined_before(self, ref: int | str) -> str | None:
        found = self.index.define_at(ref)
        return found[1] if found is not None and found[0] < self.report.first_seq else None

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
        """Lines that are not records are accepted only as a torn tail closed by the engine.

        The torn-line record follows the torn bytes in the same file. It names
        them by the seq they follow (the first format named the file and the
        offset; the offset still holds after a rotation, the name not, so only
        the offset is checked there).
        """
        record, pending = line.record, self.pending
        self.pending = []
        torn = b"".join(p.raw for p in pending)
        same_file = all(p.file == line.file for p in pending)
        if "after_seq" in record:
            placed = record.get("after_seq") == self.last_seq
        else:
            placed = record.get("offset") == pending[0].offset
        accounted = (record.get("event") == TORN_EVENT and same_file and placed
                     and record.get("size") == len(torn) and record.get("sha256") == hashlib.sha256(torn).hexdigest()
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


def verify(lab_root: Path, full: bool = False, index: Index | None = None) -> VerifyReport:
    """Check the lab's audit log and the outbox against it; incrementally unless ``full``.

    Returns a :class:`VerifyReport`; ``report.ok`` is false when any record was
    edited, removed, reordered or inserted, a line in the middle is damaged, a
    define record does not match its sha256 or a reference has no define before
    it, or a published result in ``outbox/`` no longer has the sha256 the log
    recorded. When intact, the last record becomes the next check's starting point. ``index``: the lab's audit
    index, level with its log, when the caller has it open.
    """
    root = Path(lab_root)
    with level_index(root, index) as index:
        report = VerifyReport()
        start_line, start = None, None
        verified = None if full else index.verified()
        if verified is not None:
            place, digest = verified
            start_line = _line_at(root, place)
            if start_line is None or start_line.record.get("hash") != digest:
                report.breaks.append(Finding(
                    f"seq {place.seq}", place.seq, "edited",
                    "the record verified intact last time is no longer there with the same hash: the log up to it was "
                    "changed since (run `lenslane audit verify --full` and compare with your checkpoints)"))
                return report
            report.since = report.last_seq = place.seq
            report.first_seq = place.seq + 1
            _check_files(root, index, place.file, report)
            if report.breaks:
                return report
            start = (file_of(root, place.file), place.offset + place.length)
        _walk(root, report, index, start_line, start)
        if report.ok and report.last_seq:
            last = index.tail()
            if last is not None and last.seq == report.last_seq:
                index.set_verified(last, index.meta("tail_hash"))
        return report


def _check_files(root: Path, index: Index, before: int, report: VerifyReport) -> None:
    """Each audit file verified before is still there, ending with the record it ended with."""
    for first, last_seq, last_hash in index.db.execute(
            "SELECT first_seq, last_seq, last_hash FROM files WHERE first_seq < ? ORDER BY first_seq", (before,)):
        path = root / rotated_name(first)
        tail = read_tail(path).record
        if tail is None:
            report.breaks.append(Finding(path.name, first, "removed",
                                         f"the audit file holding seq {first}–{last_seq}, verified before, is gone"))
        elif (tail["seq"], tail["hash"]) != (last_seq, last_hash):
            report.breaks.append(Finding(path.name, tail["seq"], "edited",
                                         f"the file verified before ended with seq {last_seq} (hash {last_hash}); it "
                                         f"now ends with seq {tail['seq']}: it was changed or cut"))


def _line_at(root: Path, place: Place) -> Line | None:
    path = file_of(root, place.file)
    if path is None:
        return None
    with open(path, "rb") as handle:
        handle.seek(place.offset)
        raw = handle.read(place.length)
    record = parse_record(raw)
    return Line(path.name, 0, place.offset, raw, record) if record is not None else None


def _walk(root: Path, report: VerifyReport, index: Index, start_line: Line | None,
          start: tuple[Path, int] | None) -> None:
    walker = _ChainWalker(report, index if start is not None else None, start_line)
    results = ResultFiles(present=present_in(root))  # which result files the log accounts for
    files = audit_files(root)
    if start is not None:
        files = [p for p in files if p.name == start[0].name or files.index(p) > files.index(start[0])]
    report.files = [p.name for p in files]
    current_file, first_of_file = start[0].name if start else None, start is None
    for line in iter_lines(root, start):
        if line.file != current_file:
            current_file, first_of_file = line.file, True
        walker.add(line, first_of_file and line.record is not None)
        if line.record is not None:
            first_of_file = False
            for problem in results.add(line.record, line.where):
                report.breaks.append(Finding(line.where, line.record["seq"], "damaged", problem))
    walker.finish(files[-1].name if files else None)
    _check_results(root, results, report, index if start is not None else None)


def _check_results(root: Path, results: ResultFiles, report: VerifyReport, index: Index | None) -> None:
    """Compare the result folders with what the walked records account for (and, from a verified point, the index)."""
    if index is not None:
        _placed_before(root, results, index)
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
        if index is not None and _known_before(index, path):
            continue  # accounted for by records before the point this check started from
        report.result_problems.append(Finding(
            path, None, "result",
            "no published record in the audit log accounts for this result: records were removed from the end "
            "of the log, or the file was not written by the engine"))


def _placed_before(root: Path, results: ResultFiles, index: Index) -> None:
    """Results in outbox/ and review/ placed by records before the walk: what the last of them says they are."""
    for path, name in watched_results(root):
        if path in results.files:
            continue
        for place in reversed(index.places_of_order(name.removesuffix(".json"))):
            record = index.read(place)
            if record is not None and record.get("event") in ("published", "decided") and record.get("result") == path:
                results.files[path] = Placed(str(record.get("result_sha256")), record["seq"], f"seq {record['seq']}")
                break


def _known_before(index: Index, path: str) -> bool:
    order_id = path.split("/", 1)[1].removesuffix(".json")
    return index.db.execute("SELECT 1 FROM records WHERE order_id=? AND event IN ('published', 'decided') LIMIT 1",
                            (order_id,)).fetchone() is not None
