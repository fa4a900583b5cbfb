"""The audit index: an SQLite file beside the log (``LAB/audit.sqlite``), derived from it, rebuildable at any time.

It answers, without reading the log from its start: where each record is
(``records``: seq → first seq of its file, offset, length; with its time, and
the order id, input file name, claim, status or decided action it concerns),
which content each published order id has (``published``: duplicate detection,
never held in memory), each define record by what it is found by and the
numbers it holds (``defines``), a trigram index of the records' order ids and
input file names for finding them by a part (``records_text``), the chain's head
in each file (``files``), counts per event and the last point ``audit verify``
checked.

The log stays the only source of truth. :meth:`Index.catch_up` compares the
index's tail (the seq, hash and place of the last record it holds) with the
log: when the record is there with that hash, it indexes what follows; when it
is not (the index is ahead of the log, the log was replaced, the file is
damaged or missing), it rebuilds the index from the whole log.
"""
from __future__ import annotations

import contextlib
import json
import os
import sqlite3
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterable, Iterator, NamedTuple

from lenslane.audit.reader import audit_files, iter_lines, file_of, read_at, ROTATED_RE
from lenslane.audit.records import DEFINE_EVENT, REF_LENGTH, define_key
from lenslane.vocabulary import OUTCOMES

INDEX_NAME = "audit.sqlite"
#: 2: records' time, status and action, defines by key with their numbers, order ids and names by trigram.
SCHEMA = 2
#: The events a record of which tells what became of an input (the first format's ``received`` too).
PASS_EVENTS = (*OUTCOMES, "received")

_TABLES = """
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value) WITHOUT ROWID;
CREATE TABLE IF NOT EXISTS records (
    seq INTEGER PRIMARY KEY, file INTEGER NOT NULL, offset INTEGER NOT NULL, length INTEGER NOT NULL,
    event TEXT, order_id TEXT, name TEXT, claim TEXT, ts TEXT, status TEXT);
CREATE INDEX IF NOT EXISTS records_order ON records (order_id) WHERE order_id IS NOT NULL;
CREATE INDEX IF NOT EXISTS records_name ON records (name) WHERE name IS NOT NULL;
CREATE INDEX IF NOT EXISTS records_claim ON records (claim) WHERE claim IS NOT NULL;
CREATE INDEX IF NOT EXISTS records_ts ON records (ts);
CREATE TABLE IF NOT EXISTS defines (
    key TEXT NOT NULL, kind TEXT NOT NULL, seq INTEGER NOT NULL, numbers BLOB, PRIMARY KEY (key, kind)) WITHOUT ROWID;
CREATE INDEX IF NOT EXISTS defines_seq ON defines (seq);
CREATE TABLE IF NOT EXISTS published (order_id TEXT PRIMARY KEY, content TEXT, seq INTEGER) WITHOUT ROWID;
CREATE TABLE IF NOT EXISTS files (first_seq INTEGER PRIMARY KEY, last_seq INTEGER, last_hash TEXT, size INTEGER);
CREATE TABLE IF NOT EXISTS counts (event TEXT PRIMARY KEY, n INTEGER NOT NULL) WITHOUT ROWID;
CREATE VIRTUAL TABLE IF NOT EXISTS records_text USING fts5(
    order_id, name, content='records', content_rowid='seq', tokenize='trigram', columnsize=0);
CREATE TRIGGER IF NOT EXISTS records_added AFTER INSERT ON records BEGIN
    INSERT INTO records_text (rowid, order_id, name) VALUES (new.seq, new.order_id, new.name);
END;
"""
#: The shortest part of an order id or file name the trigram index can find; a shorter search text must be whole.
SEARCH_MIN = 3
#: How many records whose order id or file name a search text is part of are looked at (the newest).
SEARCH_RECORDS = 1000


@dataclass(frozen=True)
class Place:
    """Where a record is: the first seq of its file, its offset and length there."""

    seq: int
    file: int
    offset: int
    length: int


class Facts(NamedTuple):
    """What the index keeps of a record besides its place."""

    event: str | None
    order_id: str | None
    name: str | None  # the input file's name
    claim: str | None  # final records only
    ts: str | None
    status: str | None  # a published record's status, a decided record's action


def facts(record: dict[str, Any]) -> Facts:
    """What the index keeps of a record: its event, order id, input file name, (final records) claim, time, and
    the status it published with or the action a person decided."""
    event = _text(record.get("event"))
    received = record.get("received")
    if isinstance(received, dict):  # one record per pass (this format)
        name, claim = received.get("file"), received.get("claim")
    else:  # the first format: received, change…, flag…, outcome as records of their own
        name = record.get("file")
        claim = record.get("claim") if event in OUTCOMES else None
    status = record.get("status") if event == "published" else record.get("action") if event == "decided" else None
    return Facts(event, _text(record.get("order_id")), _text(name), _text(claim), _text(record.get("ts")),
                 _text(status))


def _text(value: Any) -> str | None:
    return value if isinstance(value, str) else None


class Undefined(KeyError):
    """A record refers to a define record the log does not hold (records were removed from it)."""

    def __str__(self) -> str:
        return (f"a record refers to define {self.args[0]!r}, which the audit log does not hold: records were "
                "removed from the log (`lenslane audit verify --full` tells which)")


class Index:
    """The index of one lab's audit log.

    ``writable=False`` never creates or changes the file on disk: when it is
    missing or behind, an index is built in memory instead (for a lab folder
    the reader may not write to). An index this process may not write (another
    user's lab) is opened so too: it is read, never removed or rewritten.
    """

    def __init__(self, lab_root: Path, writable: bool = True):
        self.root = Path(lab_root)
        self.path = self.root / INDEX_NAME
        self.writable = writable
        self.db = self._open()

    # -- opening, and starting again -------------------------------------------

    def _open(self) -> sqlite3.Connection:
        if self.writable and not self._may_write():
            self.writable = False
        if self.writable:
            if not self.path.exists():
                self._remove()  # a journal left beside a removed index belongs to nothing now
            try:
                return self._connect(str(self.path))
            except (sqlite3.DatabaseError, OSError):
                self._remove()
                try:
                    return self._connect(str(self.path))
                except (sqlite3.DatabaseError, OSError):
                    pass  # a folder the process may not write to: an index in memory
        elif self.path.exists():
            try:
                return self._connect(f"file:{self.path}?mode=ro", uri=True, create=False)
            except (sqlite3.DatabaseError, OSError):
                pass
        self.writable = False
        return self._connect(":memory:")

    @staticmethod
    def _connect(target: str, uri: bool = False, create: bool = True) -> sqlite3.Connection:
        db = sqlite3.connect(target, uri=uri, timeout=30.0, isolation_level=None, check_same_thread=False)
        try:
            if create:
                db.execute("PRAGMA journal_mode=WAL")
                db.execute("PRAGMA synchronous=NORMAL")  # derived data: catch_up() repairs what a crash loses
                db.executescript(_TABLES)
                version = db.execute("SELECT value FROM meta WHERE key='schema'").fetchone()
                if version is None:
                    db.execute("INSERT OR REPLACE INTO meta VALUES ('schema', ?)", (SCHEMA,))
                elif version[0] != SCHEMA:
                    raise sqlite3.DatabaseError(f"index schema {version[0]}, this engine writes {SCHEMA}")
            db.execute("SELECT count(*) FROM meta").fetchone()
        except BaseException:
            db.close()
            raise
        return db

    def _may_write(self) -> bool:
        """Whether this process may change the index: write in the lab folder, and the file itself if it is there."""
        return os.access(self.root, os.W_OK) and (not self.path.exists() or os.access(self.path, os.W_OK))

    def _remove(self) -> None:
        for suffix in ("", "-wal", "-shm"):
            with contextlib.suppress(FileNotFoundError):
                os.unlink(f"{self.path}{suffix}")

    def close(self) -> None:
        self.db.close()

    def rebuild(self) -> int:
        """Forget everything and index the whole log again; returns the number of records indexed."""
        if self.writable:
            self.db.close()
            self._remove()
            self.db = self._connect(str(self.path))
        else:
            self.db.close()
            self.db = self._connect(":memory:")
        return self._index_from(None)

    # -- keeping up with the log -------------------------------------------------

    def meta(self, key: str) -> Any:
        row = self.db.execute("SELECT value FROM meta WHERE key=?", (key,)).fetchone()
        return row[0] if row else None

    def tail(self) -> Place | None:
        seq = self.meta("tail_seq")
        if seq is None:
            return None
        return Place(seq, self.meta("tail_file"), self.meta("tail_offset"), self.meta("tail_length"))

    def catch_up(self) -> str:
        """Bring the index level with the log; returns what it did: ``level``, ``caught up`` or ``rebuilt``."""
        try:
            return self._catch_up()
        except sqlite3.OperationalError:  # a full disk, a read-only file: not damage
            if self.writable:
                raise  # the caller decides (the engine blocks and retries)
            self.rebuild()  # a read-only index behind the log: answered from memory
            return "rebuilt"
        except sqlite3.DatabaseError:  # damaged where opening it did not look
            self.rebuild()
            return "rebuilt"

    def _catch_up(self) -> str:
        tail = self.tail()
        if tail is None:
            if not any(p.stat().st_size for p in audit_files(self.root) if p.exists()):
                return "level"
            self.rebuild()
            return "rebuilt"
        record = read_at(self.root, tail.file, tail.offset, tail.length)
        if record is None or record.get("seq") != tail.seq or record.get("hash") != self.meta("tail_hash"):
            self.rebuild()
            return "rebuilt"
        added = self._index_from(tail)
        return "caught up" if added else "level"

    def _index_from(self, tail: Place | None) -> int:
        start = None
        if tail is not None:
            path = file_of(self.root, tail.file)
            if path is None:
                return 0
            start = (path, tail.offset + tail.length)
        batch: list[tuple[dict[str, Any], int, int, int]] = []
        added = 0
        first_seq_of: dict[str, int] = {start[0].name: tail.file} if start is not None else {}
        for line in iter_lines(self.root, start):
            record = line.record
            if record is None:
                continue
            first = first_seq_of.get(line.file)
            if first is None:  # a rotated file's name says it; in audit.jsonl, the first record met is its first
                match = ROTATED_RE.match(line.file)
                first = first_seq_of[line.file] = int(match.group(1)) if match else record["seq"]
            batch.append((record, first, line.offset, len(line.raw)))
            if len(batch) >= 4096:
                self.add(batch)
                added += len(batch)
                batch = []
        if batch:
            self.add(batch)
            added += len(batch)
        return added

    def add(self, placed: Iterable[tuple[dict[str, Any], int, int, int]]) -> None:
        """Index records just written (or read): each with its file's first seq, its offset and length.

        Records the index already holds are left alone (a reader that caught up with the log while the
        engine was writing it may have indexed them first).
        """
        db = self.db
        db.execute("BEGIN IMMEDIATE")
        try:
            self._add(placed, self.meta("tail_seq") or 0)
            db.execute("COMMIT")
        except BaseException:
            if db.in_transaction:  # a failed COMMIT (a full disk) may have rolled it back already
                db.execute("ROLLBACK")
            raise

    def _add(self, placed: Iterable[tuple[dict[str, Any], int, int, int]], after: int) -> None:
        rows, defines, published, counts = [], [], [], {}
        heads: dict[int, tuple[int, str, int]] = {}
        last = None
        for record, first, offset, length in placed:
            seq = record["seq"]
            if seq <= after:
                continue
            about = facts(record)
            rows.append((seq, first, offset, length, *about))
            if about.event == DEFINE_EVENT and isinstance(record.get("sha256"), str):
                key, numbers = define_key(record)
                defines.append((key, str(record.get("kind")), seq, numbers))
            elif about.event == "published" and about.order_id is not None:
                published.append((about.order_id, record.get("content_sha256"), seq))
            counts[about.event] = counts.get(about.event, 0) + 1
            heads[first] = (seq, record["hash"], offset + length)
            last = (seq, record["hash"], first, offset, length)
        if last is None:
            return
        db = self.db
        db.executemany("INSERT OR REPLACE INTO records VALUES (?,?,?,?,?,?,?,?,?,?)", rows)
        db.executemany("INSERT OR IGNORE INTO defines VALUES (?,?,?,?)", defines)
        db.executemany("INSERT OR REPLACE INTO published VALUES (?,?,?)", published)
        db.executemany("INSERT INTO counts VALUES (?, ?) ON CONFLICT(event) DO UPDATE SET n = n + excluded.n",
                       [(event or "", n) for event, n in counts.items()])
        db.executemany("INSERT OR REPLACE INTO files VALUES (?,?,?,?)",
                       [(first, seq, digest, size) for first, (seq, digest, size) in heads.items()])
        db.executemany("INSERT OR REPLACE INTO meta VALUES (?,?)", list(zip(
            ("tail_seq", "tail_hash", "tail_file", "tail_offset", "tail_length"), last)))

    # -- questions -----------------------------------------------------------------

    def place(self, seq: int) -> Place | None:
        row = self.db.execute("SELECT seq, file, offset, length FROM records WHERE seq=?", (seq,)).fetchone()
        return Place(*row) if row else None

    def read(self, place: Place) -> dict[str, Any] | None:
        return read_at(self.root, place.file, place.offset, place.length)

    def places_of_order(self, key: str) -> list[Place]:
        """The records of an order id, or of an input file name (with or without ``.json``), oldest first.

        A file name also brings the records of the order id read from that file.
        """
        rows = self.db.execute(
            "SELECT seq, file, offset, length FROM records WHERE order_id IN "
            "(SELECT ? UNION SELECT order_id FROM records WHERE name IN (?, ?) AND order_id IS NOT NULL) "
            "UNION SELECT seq, file, offset, length FROM records WHERE name IN (?, ?) ORDER BY 1",
            (key, key, f"{key}.json", key, f"{key}.json")).fetchall()
        return [Place(*row) for row in rows]

    def final_of_claim(self, claim: str) -> dict[str, Any] | None:
        rows = self.db.execute("SELECT seq, file, offset, length, event FROM records WHERE claim=? ORDER BY seq DESC",
                               (claim,)).fetchall()
        for seq, file, offset, length, event in rows:
            if event in OUTCOMES:
                return read_at(self.root, file, offset, length)
        return None

    def published_content(self, order_id: str) -> str | None:
        row = self.db.execute("SELECT content FROM published WHERE order_id=?", (order_id,)).fetchone()
        return row[0] if row else None

    def is_published(self, order_id: str) -> bool:
        return self.db.execute("SELECT 1 FROM published WHERE order_id=?", (order_id,)).fetchone() is not None

    def defines_of(self, keys: list[tuple[str, str]]) -> dict[tuple[str, str], tuple[int, bytes | None]]:
        """The define records of these kinds found by these keys (:func:`lenslane.audit.records.define_key`) that
        the log holds, asked for in one question: for each, its seq and the numbers it holds."""
        wanted = set(keys)
        rows = self.db.execute(
            "SELECT kind, key, seq, numbers FROM defines WHERE key IN (SELECT value FROM json_each(?))",
            (json.dumps(sorted({key for _, key in wanted})),))
        return {(kind, key): (seq, numbers) for kind, key, seq, numbers in rows if (kind, key) in wanted}

    def define_at(self, ref: int | str) -> tuple[int, str] | None:
        """The seq and kind of the define a record refers to: by its seq, or (the second format) by the first
        hex digits of its sha256."""
        if isinstance(ref, str):
            if len(ref) != REF_LENGTH:
                return None
            row = self.db.execute("SELECT seq, kind FROM defines WHERE key >= ? AND key < ? ORDER BY seq LIMIT 1",
                                  (ref, ref + "g")).fetchone()
        else:
            row = self.db.execute("SELECT seq, kind FROM defines WHERE seq=?", (ref,)).fetchone()
        return (row[0], row[1]) if row else None

    def body(self, ref: int | str) -> Any:
        """The body of the define record a record refers to, read from the log (:class:`Undefined`, a
        ``KeyError``, when the log defines no such ref)."""
        found = self.define_at(ref)
        place = self.place(found[0]) if found else None
        record = self.read(place) if place else None
        if record is None or record.get("event") != DEFINE_EVENT or (
                isinstance(ref, str) and not str(record.get("sha256")).startswith(ref)):
            raise Undefined(ref)
        return record["body"]

    def outcomes_between(self, start: str, end: str) -> list[tuple[str, str | None, int]]:
        """How many records of each event (and status or action) were written from ``start`` to before ``end``
        (UTC times as the records write them), for outcomes and decisions."""
        return self.db.execute(
            "SELECT event, status, count(*) FROM records WHERE ts >= ? AND ts < ? "
            "AND event IN (?, ?, ?, ?, ?) GROUP BY event, status",
            (start, end, *OUTCOMES, "decided")).fetchall()

    def search(self, text: str, limit: int) -> list[tuple[str | None, str | None, str, str | None, str | None]]:
        """The inputs whose order id or file name contains ``text`` (in any case), newest first: for each (order
        id, file name), its last record's (order id, file name, event, status, time).

        A text shorter than :data:`SEARCH_MIN` must be a whole order id or file name (with or without
        ``.json``). Of the records it is found in, the newest :data:`SEARCH_RECORDS` are looked at.
        """
        if len(text) >= SEARCH_MIN:
            found = "SELECT rowid FROM records_text WHERE records_text MATCH ? ORDER BY rowid DESC LIMIT ?"
            arguments: tuple[Any, ...] = ('"' + text.replace('"', '""') + '"', SEARCH_RECORDS)
        else:
            found = "SELECT seq FROM records WHERE order_id IN (?, ?) UNION SELECT seq FROM records WHERE name IN (?, ?)"
            arguments = (text, f"{text}.json") * 2
        return self.db.execute(
            f"WITH found(seq) AS ({found}),"
            " last AS (SELECT max(seq) AS seq FROM records WHERE seq IN found AND event IN (?, ?, ?, ?, ?)"
            "  GROUP BY order_id, name)"
            " SELECT order_id, name, event, status, ts FROM records WHERE seq IN last ORDER BY seq DESC LIMIT ?",
            (*arguments, *PASS_EVENTS, limit)).fetchall()

    def counts(self) -> dict[str, int]:
        return {event: n for event, n in self.db.execute("SELECT event, n FROM counts ORDER BY event")}

    def set_verified(self, place: Place, digest: str) -> None:
        if not self.writable:
            return
        values = (place.seq, digest, place.file, place.offset, place.length)
        self.db.executemany("INSERT OR REPLACE INTO meta VALUES (?,?)", list(zip(
            ("verified_seq", "verified_hash", "verified_file", "verified_offset", "verified_length"), values)))

    def verified(self) -> tuple[Place, str] | None:
        seq = self.meta("verified_seq")
        if seq is None:
            return None
        return (Place(seq, self.meta("verified_file"), self.meta("verified_offset"), self.meta("verified_length")),
                self.meta("verified_hash"))

    def snapshot(self) -> dict[str, list[tuple]]:
        """Every row of every table but the verified point (for comparing a rebuilt index with a live one)."""
        tables = {}
        for table in ("records", "defines", "published", "files", "counts"):
            tables[table] = sorted(self.db.execute(f"SELECT * FROM {table}").fetchall(), key=repr)
        tables["meta"] = sorted(row for row in self.db.execute("SELECT * FROM meta") if not str(row[0]).startswith("verified"))
        return tables


@contextlib.contextmanager
def level_index(lab_root: Path, index: Index | None = None) -> Iterator[Index]:
    """The lab's audit index, level with its log, for a block: ``index`` when the caller has it open (and keeps it
    level: the engine's own), else one opened and brought level for the block and closed after it."""
    if index is not None:
        yield index
        return
    with contextlib.closing(Index(Path(lab_root))) as own:
        own.catch_up()
        yield own
