"""The lab folder: claim, process, publish, archive — or reject, or hold.

One order's life, in the order that makes a crash at any instant safe:

1. look: an inbox entry is taken only when it is complete — moved in by a
   rename, closed after writing, or unchanged for ``watch.quiet_seconds``; a
   young file that does not parse yet is looked at again, not rejected;
2. claim: atomic rename ``inbox/<name>`` → ``work/<name>``;
3. read, validate, run the chain (nothing written yet);
4. publish: the result to ``outbox/.<id>.json.tmp``, fsync, rename to
   ``outbox/<id>.json``, fsync the folder (or, for a rejected order, the
   ``rejected/<name>.errors.json`` the same way; for a held one,
   ``held/<name>.held.json``);
5. audit: the order's records appended to ``audit.jsonl`` and fsynced;
6. archive: rename ``work/<name>`` → ``archive/<name>`` (or ``rejected/`` or ``held/``).

A file still in ``work/`` at start was claimed but not finished. Its claim key
(inode and the change time the claim gave it) says whether its final audit
record was already written: if so only step 6 is left; if not, it is redone
from step 3, and because processing is deterministic the redo publishes the
same bytes over the same name — never a second copy, never a second record.
The audit log also says which order ids were published, with a digest of their
content: the same order again is recorded and archived, a different order under
the same id is held for a person.
"""
from __future__ import annotations

import contextlib
import errno
import hashlib
import json
import os
import stat
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, ContextManager

import orjson

from lenslane.audit.log import AUDIT_NAME, AuditError, AuditLog, canonical, iter_records
from lenslane.config import CONFIG_NAME, LabConfig, template_text
from lenslane.lab.files import (
    NotRegular, fsync_dir, claim_key, claim_tag, entry_kind, free_name, open_regular, printable, read_exactly,
    make_durable, remove_temp_leftovers, write_durably, write_unsynced,
)
from lenslane.chain.host import Host
from lenslane.contract.intake import OrderRejected, read_order
from lenslane.contract.models import ORDER_ID_RE, LensOrder
from lenslane.chain.pipeline import Pipeline, StageFailure
from lenslane.vocabulary import OUTCOMES

#: review/ holds results that wait for a person and decisions/ the requests of ``lenslane decide`` (lenslane.decide).
FOLDERS = ("inbox", "outbox", "review", "rejected", "archive", "work", "held", "decisions")
ERRORS_SUFFIX = ".errors.json"
HELD_SUFFIX = ".held.json"
#: Results are written compact (a person reads them through `lenslane explain` or any JSON viewer):
#: an order's result is some 20 kB, and every byte is written and flushed once per order.
_RESULT_JSON = orjson.OPT_SERIALIZE_NUMPY
FINAL_EVENTS = OUTCOMES

#: Tests only: ``LENSLANE_FAULT_AFTER=<step>[:<n>]`` ends the process abruptly right after the
#: n-th time (default the first) a step of the publish sequence completes, as a crash would.
FAULT_VARIABLE = "LENSLANE_FAULT_AFTER"
FAULT_STEPS = ("claimed", "published", "audited", "archived")
FAULT_EXIT_CODE = 86

#: Errors opening an input that are the file's own (its permissions): the order is rejected. Any other
#: error (out of file descriptors, an I/O error) is the machine's: the read is retried.
UNREADABLE = frozenset({errno.EACCES, errno.EPERM})

#: How often a young file that does not parse yet is looked at again (s), at the least.
INCOMPLETE_RECHECK_SECONDS = 0.25


def init_lab(lab: Path) -> list[str]:
    """Make the lab folder; idempotent, never overwrites a config. Returns what it created."""
    created = []
    lab.mkdir(parents=True, exist_ok=True)
    for name in FOLDERS:
        folder = lab / name
        if not folder.is_dir():
            folder.mkdir()
            created.append(f"{name}/")
    audit = lab / AUDIT_NAME
    if not audit.exists():
        audit.touch()
        created.append(AUDIT_NAME)
    config = lab / CONFIG_NAME
    if not config.exists():
        config.write_text(template_text(), encoding="utf-8")
        created.append(CONFIG_NAME)
    return created


def is_order_name(name: str) -> bool:
    """Only ``*.json`` files are orders; hidden, ``.tmp`` and ``.part`` names wait until renamed."""
    return name.endswith(".json") and not name.startswith(".") and not name.endswith((".tmp", ".part"))


# --------------------------------------------------------------------------
# What a look at an inbox entry can give
# --------------------------------------------------------------------------


@dataclass
class Processed:
    """An order that reached its end: published, rejected, held, or skipped as already published."""

    name: str
    outcome: str  # "published" | "rejected" | "held" | "skipped"
    order_id: str | None
    status: str | None = None
    reasons: list[dict[str, str]] | None = None
    redo: bool = False  # finished after a restart or a retry


@dataclass(frozen=True)
class Wait:
    """Not yet: look at the entry again at ``until`` (wall-clock seconds)."""

    until: float
    reason: str  # "settling" (still changing) | "incomplete" (young and does not parse yet)


class OutputBlocked(Exception):
    """A step that writes failed (disk full, no permission…); nothing was lost.

    ``claimed`` says whether the input is already in ``work/`` (retry with
    :meth:`Lab.process_claimed`) or still in the inbox (retry with :meth:`Lab.consider`).
    """

    def __init__(self, step: str, path: str | Path, error: Exception, claimed: bool):
        super().__init__(f"{step}: {path}: {error}")
        self.step = step
        self.path = path
        self.error = error
        self.claimed = claimed


class OrderTimeLimit(Exception):
    """The order ran past ``watch.order_time_limit_seconds``.

    Raised inside the running stage, so the pipeline fails the order with that
    stage's name.
    """


class StageWontStop(BaseException):
    """A stage caught the time-limit exception and kept running; raised past ``except Exception``."""


class Interrupted(BaseException):
    """A stop was asked while a stage still ran: the order stays claimed and is redone at the next start."""


@dataclass
class _Examined:
    size: int | None
    sha256: str | None
    order: LensOrder | None = None
    parsed: dict[str, Any] | None = None
    content_sha256: str | None = None
    problems: list[dict[str, str]] | None = None
    maybe_incomplete: bool = False
    kind: str | None = None  # what a non-regular entry is
    order_id: str | None = None


@dataclass
class _Seen:
    signature: tuple[int, int, int]  # size, mtime (ns), inode
    since: float  # when this signature was first seen (wall clock)
    failed: bool = False  # read with this signature and found incomplete


@dataclass(frozen=True)
class _Recorded:
    """A claim whose final audit record is written; only moving the input is left."""

    input: str
    outcome: str
    order_id: str | None
    status: str | None


@dataclass
class _Pending:
    """An order whose output file is written, waiting for the group commit."""

    name: str
    claim: str
    events: list[dict[str, Any]]
    recorded: _Recorded
    processed: Processed
    recorded_in_log: bool = False


class _Commit:
    """One batch on its way through :meth:`Lab.commit`: what is left of each step."""

    def __init__(self, batch: list[_Pending], unpublished: list[tuple[str, str]], folders: set[str]):
        self.batch = batch
        self.unpublished = unpublished  # (temp, result) still to rename
        self.folders = folders  # still to fsync
        self.durable = False  # the temp files' bytes are on disk


def result_bytes(result: dict[str, Any]) -> bytes:
    """The bytes of a published result."""
    return orjson.dumps(result, option=_RESULT_JSON) + b"\n"


def order_events(result: dict[str, Any]) -> list[dict[str, Any]]:
    """The audit events of a result's changes and flags, in order."""
    order_id = result["order_id"]
    events = [{"event": "change", "order_id": order_id, **change} for change in result["changes"]]
    events += [{"event": "flag", "order_id": order_id, **flag} for flag in result["flags"]]
    return events


def _content_key(content_sha256: str | None) -> bytes | None:
    """What the index keeps of a content digest: 16 bytes are plenty to tell two orders apart."""
    return bytes.fromhex(content_sha256)[:16] if content_sha256 else None


def note_published(lab: "Lab", order_id: str, content_sha256: str | None) -> None:
    """An order id published with this content by something other than the inbox (a person's replace)."""
    lab.published[order_id] = _content_key(content_sha256)


def _report_bytes(report: dict[str, Any]) -> bytes:
    return json.dumps(report, ensure_ascii=False, indent=1).encode("utf-8", "backslashreplace") + b"\n"


def _fault_from_environment() -> tuple[str, int] | None:
    value = os.environ.get(FAULT_VARIABLE, "").strip()
    if not value:
        return None
    step, _, count = value.partition(":")
    if step not in FAULT_STEPS:
        raise ValueError(f"{FAULT_VARIABLE}={value!r}: the step must be one of {', '.join(FAULT_STEPS)}")
    return step, int(count or 1)


class Lab:
    """A lab folder with its engine: looks at inbox entries and takes orders through to the end, one at a time.

    ``time_limit`` is a factory of the context manager that bounds one run of
    the chain; the daemon installs its clock there (the default sets no limit).
    """

    def __init__(self, root: Path, host: Host):
        self.root = Path(root)
        # Opened by recover(), under the lab's lock: opening may close a torn last line.
        self.audit: AuditLog | None = None
        self.use_host(host)
        for name in FOLDERS:
            setattr(self, name, self.root / name)
            (self.root / name).mkdir(exist_ok=True)
        # The same folders as plain strings: joining them costs far less per order than pathlib does.
        self._root = os.fspath(self.root)
        self._inbox, self._work, self._outbox = (os.path.join(self._root, n) for n in ("inbox", "work", "outbox"))
        self.time_limit: Callable[[], ContextManager[Any]] = contextlib.nullcontext
        self.published: dict[str, bytes | None] = {}  # order id → content key, from the audit log
        self.stage_seconds: dict[str, float] = {}  # time spent in each stage, summed over the run
        self._recorded: dict[str, _Recorded] = {}
        self._batch: list[_Pending] = []  # processed, waiting for commit()
        self._unsynced_folders: set[str] = set()
        self._unpublished: list[tuple[str, str]] = []  # (temp, result) written, not yet durable and renamed
        self._committing: _Commit | None = None  # the batch commit() began and has not finished
        self._final: list[Processed] = []  # made final, not yet returned by commit()
        self._watching: dict[str, _Seen] = {}
        self._fault = _fault_from_environment()
        self._fault_count = 0

    def use_host(self, host: Host) -> None:
        """Work with ``host`` (its config and chain) from the next order on: at start, and on a reload."""
        self.host = host
        self.config: LabConfig = host.config
        self.pipeline = Pipeline(host)
        self.engine_fields = host.provenance
        watch = host.config.watch
        self.quiet_seconds = watch.quiet_seconds
        self.young_seconds = watch.young_seconds
        self.max_order_bytes = watch.max_order_bytes
        if self.audit is not None:
            self.audit.rotate_bytes = host.config.audit.rotate_bytes
            self.audit.rotate_period = host.config.audit.rotate_period

    def _open_audit(self) -> AuditLog:
        audit = self.config.audit
        return AuditLog(self.root / AUDIT_NAME, audit.rotate_bytes, audit.rotate_period)

    # -- start -----------------------------------------------------------------

    def recover(self) -> list[str]:
        """Get ready to work after whatever ended the last run; returns the names in ``work/`` to finish.

        Call it once, holding the lab's lock, before anything else: it reopens
        the audit log (so its tail is the one on disk), removes temp files a
        crash left (never published), and reads the audit history: which order
        ids were published, and which claims in ``work/`` already have their
        final record.
        """
        self.audit = self._open_audit()
        for folder in (self.outbox, self.review, self.rejected, self.held, self.archive):
            remove_temp_leftovers(folder)
        names = sorted(os.listdir(self.work))
        claims = {}
        for name in names:
            with contextlib.suppress(FileNotFoundError):
                claims[claim_key(os.lstat(self.work / name))] = name
        self._read_history(claims)
        return names

    def _read_history(self, claims: dict[str, str]) -> None:
        self.published.clear()
        self._recorded.clear()
        for record in iter_records(self.root):
            event = record.get("event")
            if event == "published" and isinstance(record.get("order_id"), str):
                self.published[record["order_id"]] = _content_key(record.get("content_sha256"))
            if event in FINAL_EVENTS and record.get("claim") in claims and isinstance(record.get("input"), str):
                self._recorded[record["claim"]] = _Recorded(record["input"], event, record.get("order_id"),
                                                            record.get("status"))

    def pending(self) -> list[str]:
        """Order names in the inbox, oldest name first."""
        try:
            names = os.listdir(self.inbox)
        except FileNotFoundError:
            return []
        return sorted(n for n in names if is_order_name(n))

    def forget_missing(self, present: set[str]) -> None:
        """Drop what was remembered about entries no longer in the inbox."""
        for name in [n for n in self._watching if n not in present]:
            del self._watching[name]

    # -- looking at an inbox entry -------------------------------------------

    def consider(self, name: str, moved: bool = False, closed: bool = False) -> Processed | Wait | None:
        """Look at ``inbox/<name>``: take it through to the end if it is complete, else say when to look again.

        Parameters
        ----------
        name : str
            An order name (see :func:`is_order_name`) in the inbox.
        moved : bool
            It was renamed into the inbox (so it is complete; a file that
            does not parse is rejected at once).
        closed : bool
            A writer closed it after writing (so no quiet time is waited).

        Returns
        -------
        Processed, Wait or None
            ``None`` when the entry is gone (taken by someone else, deleted).
        """
        path = f"{self._inbox}/{name}"
        try:
            info = os.lstat(path)
        except FileNotFoundError:
            self._watching.pop(name, None)
            return None
        if not stat.S_ISREG(info.st_mode) or info.st_size > self.max_order_bytes:
            return self._claim(name)  # judged in work/, never opened here
        now = time.time()
        seen = self._seen(name, info, now)
        age = now - info.st_mtime if info.st_mtime <= now else now - seen.since  # a future mtime: a skewed clock
        quiet = age >= self.quiet_seconds or now - seen.since >= self.quiet_seconds
        if not (moved or quiet or (closed and info.st_size > 0)):
            return Wait(now + self.quiet_seconds - max(age, now - seen.since), "settling")
        young = not moved and age < self.young_seconds
        if seen.failed and young:
            return self._wait_incomplete(now, age)
        try:
            fd, opened = open_regular(path)
        except FileNotFoundError:
            self._watching.pop(name, None)
            return None
        except NotRegular:
            return self._claim(name)  # swapped meanwhile: work/ says what it is
        except OSError as exc:
            if exc.errno not in UNREADABLE:
                raise OutputBlocked("read", path, exc, claimed=False) from exc
            return self._claim(name)  # the sender's permissions: work/ says why
        try:
            if opened.st_size > self.max_order_bytes:
                return self._claim(name)
            examined = self.examine(read_exactly(fd, opened.st_size))
        finally:
            os.close(fd)
        if examined.maybe_incomplete and young and opened.st_size > 0:
            seen.failed = True
            return self._wait_incomplete(now, age)
        return self._claim(name, opened, examined)

    def _seen(self, name: str, info: os.stat_result, now: float) -> _Seen:
        signature = (info.st_size, info.st_mtime_ns, info.st_ino)
        seen = self._watching.get(name)
        if seen is None or seen.signature != signature:
            seen = self._watching[name] = _Seen(signature, now)
        return seen

    def _wait_incomplete(self, now: float, age: float) -> Wait:
        recheck = max(self.quiet_seconds, INCOMPLETE_RECHECK_SECONDS)
        return Wait(now + min(recheck, self.young_seconds - age), "incomplete")

    def _claim(self, name: str, opened: os.stat_result | None = None,
               examined: _Examined | None = None) -> Processed | None:
        claimed = f"{self._work}/{name}"
        try:
            os.rename(f"{self._inbox}/{name}", claimed)
        except FileNotFoundError:
            self._watching.pop(name, None)
            return None
        except OSError as exc:
            raise OutputBlocked("claim", self._work, exc, claimed=False) from exc
        self._watching.pop(name, None)
        try:
            info = os.lstat(claimed)
        except FileNotFoundError:
            return None
        self._reached("claimed")
        if opened is not None and (info.st_ino, info.st_size, info.st_mtime_ns) != (
                opened.st_ino, opened.st_size, opened.st_mtime_ns):
            examined = None  # not the bytes that were read: read the claimed file itself
        return self.process_claimed(name, info, examined)

    # -- one claimed order -----------------------------------------------------

    def examine(self, raw: bytes) -> _Examined:
        """Parse and validate the bytes of one order (no file is touched)."""
        sha256 = hashlib.sha256(raw).hexdigest()
        try:
            order, parsed = read_order(raw, self.host.settings.materials)
        except OrderRejected as exc:
            return _Examined(len(raw), sha256, problems=exc.problems, maybe_incomplete=exc.maybe_incomplete)
        content = hashlib.sha256(canonical(parsed)).hexdigest()
        return _Examined(len(raw), sha256, order, parsed, content, order_id=order.order_id)

    def _examine_claimed(self, path: str, info: os.stat_result) -> _Examined:
        if not stat.S_ISREG(info.st_mode):
            return self._not_a_file(entry_kind(info.st_mode))
        try:
            fd, opened = open_regular(path)
        except NotRegular as exc:
            return self._not_a_file(exc.kind)
        except OSError as exc:
            if exc.errno not in UNREADABLE:  # out of file descriptors, an I/O error: not the order's fault
                raise OutputBlocked("read", path, exc, claimed=True) from exc
            return _Examined(info.st_size, None, problems=[
                {"field": "(file)", "message": f"cannot be read: {exc.strerror or exc}"}])
        try:
            if opened.st_size > self.max_order_bytes:
                return _Examined(opened.st_size, None, problems=[{"field": "(file)", "message": (
                    f"the file is {opened.st_size} bytes, over the limit of {self.max_order_bytes} bytes "
                    "(watch.max_order_bytes); it was not read")}])
            return self.examine(read_exactly(fd, opened.st_size))
        finally:
            os.close(fd)

    @staticmethod
    def _not_a_file(kind: str) -> _Examined:
        return _Examined(None, None, kind=kind, problems=[{"field": "(file)", "message": (
            f"is a {kind}, not a plain file: moved aside without being followed or opened")}])

    def process_claimed(self, name: str, info: os.stat_result | None = None,
                        examined: _Examined | None = None, redo: bool = False) -> Processed | None:
        """Take ``work/<name>`` through to its end; the same call finishes it after a crash or a failed write.

        Raises
        ------
        OutputBlocked
            A write failed; the input is still in ``work/``. Call again later.
        Interrupted
            A stop was asked while a stage ran; the input is still in ``work/``.
        """
        path = f"{self._work}/{name}"
        if info is None:
            try:
                info = os.lstat(path)
            except FileNotFoundError:
                return None
        claim = claim_key(info)
        done = self._recorded.get(claim)
        if done is not None:
            self._move_input(name, done.input, claim)
            return Processed(printable(name), done.outcome, done.order_id, done.status, redo=True)
        if examined is None:
            examined = self._examine_claimed(path, info)
        received = {"event": "received", "file": printable(name), "size": examined.size,
                    "sha256": examined.sha256, "claim": claim}
        if examined.kind:
            received["kind"] = examined.kind
        if examined.problems is not None:
            return self._reject(name, claim, received, examined.problems, redo=redo)
        order_id = examined.order_id
        received["order_id"] = order_id
        if order_id in self.published:
            if self.published[order_id] == _content_key(examined.content_sha256):
                return self._skip(name, claim, received, examined, redo)
            return self._hold(name, claim, received, examined, redo)
        try:
            with self.time_limit():
                outcome = self.pipeline.run(examined.order, examined.parsed)
        except StageFailure as exc:
            problems = [{"field": exc.field, "message": exc.message}]
            return self._reject(name, claim, received, problems, order_id, redo)
        except (OrderTimeLimit, StageWontStop) as exc:
            problems = [{"field": "(stage unknown)", "message": str(exc)}]
            return self._reject(name, claim, received, problems, order_id, redo)
        except Exception as exc:  # e.g. a result_ready hook that raised: the order fails, the engine goes on
            problems = [{"field": "(engine)", "message": f"{type(exc).__name__}: {exc}"}]
            return self._reject(name, claim, received, problems, order_id, redo)
        for stage, seconds in outcome.timings.items():
            self.stage_seconds[stage] = self.stage_seconds.get(stage, 0.0) + seconds
        return self._publish(name, claim, received, outcome.result, examined, redo)

    def _publish(self, name: str, claim: str, received: dict[str, Any], result: dict[str, Any],
                 examined: _Examined, redo: bool) -> Processed:
        """Write the result under a temp name and queue the order's records for :meth:`commit`."""
        order_id = result["order_id"]
        if not ORDER_ID_RE.match(order_id):  # validated by the contract already; never a path
            raise ValueError(f"order id {order_id!r} cannot name a file")
        data = result_bytes(result)
        # A result that needs a person waits in review/, never in outbox/ (lenslane decide approves or refuses it).
        folder = "review" if result["status"] == "review" else "outbox"
        target = f"{self._root}/{folder}/{order_id}.json"
        try:
            self._unpublished.append((write_unsynced(target, data), target))  # made durable by commit()
        except OSError as exc:
            raise OutputBlocked("publish", target, exc, claimed=True) from exc
        destination = f"archive/{free_name(self.archive, name, claim_tag(claim))}"
        events: list[Any] = [received]
        events += order_events(result)
        events.append({"event": "published", "order_id": order_id, "file": printable(name),
                       "status": result["status"], "result": f"{folder}/{order_id}.json",
                       "result_sha256": hashlib.sha256(data).hexdigest(), "lenses": result["lenses"],
                       "content_sha256": examined.content_sha256, "claim": claim, "input": destination,
                       **self.engine_fields})
        self.published[order_id] = _content_key(examined.content_sha256)
        return self._defer(name, claim, events, _Recorded(destination, "published", order_id, result["status"]),
                           Processed(printable(name), "published", order_id, result["status"], redo=redo))

    def _reject(self, name: str, claim: str, received: dict[str, Any], problems: list[dict[str, str]],
                order_id: str | None = None, redo: bool = False) -> Processed:
        target = free_name(self.rejected, name, claim_tag(claim), ERRORS_SUFFIX)
        destination = f"rejected/{target}"
        report = {"file": printable(name), "rejected": True, "problems": problems, "input": printable(destination)}
        self._write("reject", self.rejected / f"{target}{ERRORS_SUFFIX}", _report_bytes(report))
        return self._defer(name, claim, [received, {"event": "rejected", "order_id": order_id, "file": printable(name),
                                                    "reasons": problems, "claim": claim, "input": printable(destination),
                                                    **self.engine_fields}],
                           _Recorded(destination, "rejected", order_id, None),
                           Processed(printable(name), "rejected", order_id, reasons=problems, redo=redo))

    def _hold(self, name: str, claim: str, received: dict[str, Any], examined: _Examined, redo: bool) -> Processed:
        order_id = examined.order_id
        target = free_name(self.held, name, claim_tag(claim), HELD_SUFFIX)
        destination = f"held/{target}"
        reasons = [{"field": "order_id", "message": (
            f"order {order_id} was already published (outbox/{order_id}.json) with different content; this "
            "copy is held for a person to compare the two and decide — it was not processed")}]
        report = {"file": printable(name), "held": True, "order_id": order_id, "reasons": reasons,
                  "published": f"outbox/{order_id}.json", "input": printable(destination)}
        self._write("hold", self.held / f"{target}{HELD_SUFFIX}", _report_bytes(report))
        return self._defer(name, claim, [received, {"event": "held", "order_id": order_id, "file": printable(name),
                                                    "reasons": reasons, "content_sha256": examined.content_sha256,
                                                    "claim": claim, "input": printable(destination),
                                                    **self.engine_fields}],
                           _Recorded(destination, "held", order_id, None),
                           Processed(printable(name), "held", order_id, reasons=reasons, redo=redo))

    def _skip(self, name: str, claim: str, received: dict[str, Any], examined: _Examined, redo: bool) -> Processed:
        order_id = examined.order_id
        destination = f"archive/{free_name(self.archive, name, claim_tag(claim))}"
        return self._defer(name, claim, [received, {
            "event": "skipped", "order_id": order_id, "file": printable(name),
            "reason": f"the same order (same content) was already published as outbox/{order_id}.json; "
                      "this copy is recorded and archived, nothing is published again",
            "content_sha256": examined.content_sha256, "claim": claim, "input": destination,
            **self.engine_fields}], _Recorded(destination, "skipped", order_id, None),
            Processed(printable(name), "skipped", order_id, redo=redo))

    # -- the steps that write ------------------------------------------------

    def _write(self, step: str, path: str | Path, data: bytes) -> None:
        try:
            write_durably(path, data, sync_folder=False)  # the folder is fsynced by commit()
        except OSError as exc:
            raise OutputBlocked(step, path, exc, claimed=True) from exc
        self._unsynced_folders.add(os.path.dirname(os.fspath(path)))
        self._reached("published")

    def _defer(self, name: str, claim: str, events: list[dict[str, Any]], recorded: _Recorded,
               processed: Processed) -> Processed:
        """Queue an order whose output file is written for :meth:`commit`, which records and archives it."""
        self._batch.append(_Pending(name, claim, events, recorded, processed))
        return processed

    def is_pending(self, processed: Processed) -> bool:
        """Whether ``processed`` still waits for :meth:`commit`."""
        batches = [self._batch] if self._committing is None else [self._batch, self._committing.batch]
        return any(pending.processed is processed for batch in batches for pending in batch)

    @property
    def uncommitted(self) -> int:
        """Orders processed whose audit records and archiving wait for :meth:`commit`."""
        return len(self._batch) + (len(self._committing.batch) if self._committing is not None else 0)

    @property
    def batched(self) -> int:
        """Orders processed since the last call of :meth:`commit` (the batch it will take next)."""
        return len(self._batch)

    def commit(self) -> list[Processed]:
        """Make the orders processed since the last commit final: group commit.

        In this order: make the batch's result files (written under temp
        names) durable with one flush of the file system; rename each to its
        ``outbox/<order_id>.json``; fsync the folders the output files were
        renamed into; append all the batch's audit records in one write and
        fsync it; then move each input out of ``work/``. A result is never
        renamed before its bytes are on disk, and until the audit fsync returns
        every input of the batch is still in ``work/``, so a crash at any
        instant leaves each order either recorded (only the move is left) or
        redone from its input, deterministically, over the same output name.
        That is the guarantee of one order at a time, with one flush, one
        folder fsync and one audit fsync per batch instead of per order.

        Returns the orders now final. Raises :class:`OutputBlocked` when a step
        fails; what is not final stays queued, and the next call resumes it.
        """
        if self._committing is None and self._batch:
            self._committing = _Commit(self._batch, self._unpublished, self._unsynced_folders)
            self._batch, self._unpublished, self._unsynced_folders = [], [], set()
        if self._committing is not None:
            self._finish(self._committing)
            self._committing = None
        done, self._final = self._final, []
        return done

    def _finish(self, unit: "_Commit") -> None:
        """The steps of :meth:`commit` for one batch, resuming after the last one that succeeded.

        Each order made final goes to ``_final`` at once, so one that a later
        failure in the same call would hide is still returned by the next call.
        """
        if unit.unpublished and not unit.durable:
            try:
                make_durable(self._outbox, [temp for temp, _ in unit.unpublished])
            except OSError as exc:
                raise OutputBlocked("publish", self._outbox, exc, claimed=True) from exc
            unit.durable = True
        while unit.unpublished:
            temp, target = unit.unpublished[0]
            try:
                os.replace(temp, target)
            except OSError as exc:
                raise OutputBlocked("publish", target, exc, claimed=True) from exc
            unit.unpublished.pop(0)
            unit.folders.add(os.path.dirname(target))  # outbox/, or review/
            self._reached("published")
        while unit.folders:
            folder = next(iter(unit.folders))
            try:
                fsync_dir(folder)
            except OSError as exc:
                raise OutputBlocked("publish", folder, exc, claimed=True) from exc
            unit.folders.discard(folder)
        batch = unit.batch
        unrecorded = [pending for pending in batch if not pending.recorded_in_log]
        if unrecorded:
            if self.audit is None:
                self.audit = self._open_audit()
            try:
                self.audit.append([event for pending in unrecorded for event in pending.events])
            except (OSError, AuditError) as exc:
                raise OutputBlocked("audit", self.audit.path, exc, claimed=True) from exc
            for pending in unrecorded:
                pending.recorded_in_log = True
                self._recorded[pending.claim] = pending.recorded
            self._reached("audited")
        while batch:
            pending = batch[0]
            self._move_input(pending.name, pending.recorded.input, pending.claim)
            self._final.append(batch.pop(0).processed)

    def _move_input(self, name: str, destination: str, claim: str) -> None:
        target = f"{self._root}/{destination}"
        try:
            os.rename(f"{self._work}/{name}", target)
        except FileNotFoundError:
            pass  # already moved, or removed by hand: nothing is left to do
        except OSError as exc:
            raise OutputBlocked("archive", target, exc, claimed=True) from exc
        self._recorded.pop(claim, None)
        self._reached("archived")

    def _reached(self, step: str) -> None:
        if self._fault is not None and self._fault[0] == step:
            self._fault_count += 1
            if self._fault_count >= self._fault[1]:
                os._exit(FAULT_EXIT_CODE)  # as abrupt as a crash: no clean-up, no flushing

    # -- for library use -------------------------------------------------------

    def drain(self) -> list[Processed]:
        """Finish what ``work/`` holds, then every complete order now in the inbox, one commit per order.

        For scripts and tests; ``lenslane watch --once`` goes through the
        daemon, which adds the lock, the time limit, retries, logs and the
        group commit of a backlog.
        """
        done = []
        for name in self.recover():
            processed = self.process_claimed(name, redo=True)
            if processed is not None:
                done += self.commit() if self.uncommitted else [processed]
        names = self.pending()
        while names:
            settling = []
            for name in names:
                outcome = self.consider(name)
                if isinstance(outcome, Processed):
                    done += self.commit() if self.uncommitted else [outcome]
                elif isinstance(outcome, Wait) and outcome.reason == "settling":
                    settling.append((outcome.until, name))
            if settling:
                time.sleep(max(0.0, min(until for until, _ in settling) - time.time()))
            names = [name for _, name in settling]
        return done
