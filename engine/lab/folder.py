"""The lab folder: claim, process, publish, archive — or reject, or hold.

One order's life, in the order that makes a crash at any instant safe:

1. look (:mod:`~lenslane.lab.arrival`): an inbox entry is taken only when it is complete;
2. claim (:mod:`~lenslane.lab.claim`): an atomic rename into ``work/``;
3. read, validate, run the chain (:mod:`~lenslane.lab.examine`; nothing written yet);
4. end it (:mod:`~lenslane.lab.outcomes`): the result under a temp name, or a report;
5. group commit (:mod:`~lenslane.lab.commit`): results durable and renamed into
   ``outbox/``, the audit records appended and fsynced, the inputs moved out of ``work/``.

After a crash, :mod:`~lenslane.lab.recovery` finishes what ``work/`` holds. The
audit history (:mod:`~lenslane.lab.history`) says which order ids were
published, with a digest of their content: the same order again is recorded and
archived, a different order under the same id is held for a person.
"""
from __future__ import annotations

import contextlib
import os
import time
from pathlib import Path
from typing import Any, Callable, ContextManager

from lenslane.audit.index import INDEX_NAME, Index
from lenslane.audit.log import AUDIT_NAME, AuditLog
from lenslane.audit.records import received as received_part, run_definition, utc_now
from lenslane.chain.host import Host
from lenslane.chain.pipeline import Pipeline, StageFailure
from lenslane.config import CONFIG_NAME, LabConfig, template_text
from lenslane.lab.arrival import Arrivals, Complete, Wait, is_order_name, order_names
from lenslane.lab.aside import Aside, SetAside
from lenslane.lab.claim import Claims
from lenslane.lab.commit import GroupCommit
from lenslane.lab.errors import Interrupted, OrderTimeLimit, OutputBlocked, StageWontStop
from lenslane.lab.examine import Examined, examine, examine_claimed
from lenslane.lab.files import claim_key, printable
from lenslane.lab.history import History
from lenslane.lab.outcomes import (
    ERRORS_SUFFIX, HELD_SUFFIX, Claimed, Outcomes, Processed, report_bytes, result_bytes, story_fields,
)
from lenslane.lab.recovery import recover

#: review/ holds results that wait for a person and decisions/ the requests of ``lenslane decide`` (lenslane.decide).
FOLDERS = ("inbox", "outbox", "review", "rejected", "archive", "work", "held", "decisions")
#: The steps of an order's way that :class:`Lab` reports to its ``on_step`` callback, as each completes.
STEPS = ("claimed", "published", "audited", "archived")
#: The steps of a person's decision that the lab reports the same way (lenslane.decide.apply: its files
#: written, its record appended, its files moved, its answer written).
DECISION_STEPS = ("decision-written", "decision-recorded", "decision-moved", "decision-answered")

__all__ = ["DECISION_STEPS", "ERRORS_SUFFIX", "FOLDERS", "HELD_SUFFIX", "STEPS", "Interrupted", "Lab", "OrderTimeLimit",
           "OutputBlocked", "Processed", "StageWontStop", "Wait", "init_lab", "is_order_name", "note_published",
           "report_bytes", "result_bytes", "story_fields"]


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
    if not (lab / INDEX_NAME).exists():
        Index(lab).close()  # the log's index, empty as the log is
        created.append(INDEX_NAME)
    config = lab / CONFIG_NAME
    if not config.exists():
        config.write_text(template_text(), encoding="utf-8")
        created.append(CONFIG_NAME)
    return created


def note_published(lab: "Lab", order_id: str, content_sha256: str | None) -> None:
    """An order id published with this content by something other than the inbox (a person's replace)."""
    lab.history.note_published(order_id, content_sha256)


class Lab:
    """A lab folder with its engine: looks at inbox entries and takes orders through to the end, one at a time.

    Parameters
    ----------
    time_limit : callable
        A factory of the context manager that bounds one run of the chain; the
        daemon gives its clock (the default sets no limit).
    on_step : callable, optional
        Called with each step's name (:data:`STEPS`, :data:`DECISION_STEPS`) as it completes; for
        observers of the engine's progress, tests among them.
    """

    def __init__(self, root: Path, host: Host, *, time_limit: Callable[[], ContextManager[Any]] = contextlib.nullcontext,
                 on_step: Callable[[str], None] | None = None):
        self.root = Path(root)
        for name in FOLDERS:
            setattr(self, name, self.root / name)
            (self.root / name).mkdir(exist_ok=True)
        root_text = os.fspath(self.root)
        self._work = os.path.join(root_text, "work")
        self.time_limit = time_limit
        self.on_step = on_step or (lambda step: None)
        self.stage_seconds: dict[str, float] = {}  # time spent in each stage, summed over the run
        self.history = History(self.root)
        self.aside = Aside()  # entries that could not be taken, left where they are
        self.arrivals = Arrivals(os.path.join(root_text, "inbox"), host.config.watch, self.examine)
        self.claims = Claims(os.path.join(root_text, "inbox"), self._work)
        self.commits = GroupCommit(root_text, self.history, self._open_audit, self.on_step)
        self.outcomes = Outcomes(root_text, self.history, self.commits, {}, self.on_step)
        self.use_host(host)

    def use_host(self, host: Host) -> None:
        """Work with ``host`` (its config and chain) from the next order on: at start, and on a reload."""
        self.host = host
        self.config: LabConfig = host.config
        self.pipeline = Pipeline(host)
        self.outcomes.run = run_definition(host.provenance, host.effective_config)
        self.arrivals.use(host.config.watch)
        if self.commits.audit is not None:
            self.commits.audit.rotate_bytes = host.config.audit.rotate_bytes
            self.commits.audit.rotate_period = host.config.audit.rotate_period

    @property
    def run(self) -> dict[str, Any]:
        """What ran the orders, as every final record refers to it: the engine's version, the chain and who made
        each stage, the configuration and its digest."""
        return self.outcomes.run

    @property
    def audit(self) -> AuditLog | None:
        """The audit log, opened by :meth:`recover`."""
        return self.commits.audit

    def _open_audit(self) -> AuditLog:
        audit = self.config.audit
        return AuditLog(self.root / AUDIT_NAME, audit.rotate_bytes, audit.rotate_period)

    def recover(self) -> list[str]:
        """Get ready to work after whatever ended the last run; returns the names in ``work/`` to finish.

        Call it once, holding the lab's lock, before anything else: it reopens
        the audit log (so its tail is the one on disk) and reads its history.
        """
        self.commits.open_audit()
        return recover(os.fspath(self.root), self.claims, self.history)

    def pending(self) -> list[str]:
        """Order names in the inbox, oldest name first."""
        return order_names(self.arrivals.inbox)

    def forget_missing(self, present: set[str]) -> bool:
        """Drop what was remembered about entries no longer in the inbox; True when one set aside is gone."""
        self.arrivals.forget_missing(present)
        return self.aside.forget_missing(present)

    def set_aside(self, blocked: OutputBlocked, tries: int) -> SetAside:
        """Give up on the entry a step failed for: left where it is, not tried again while unchanged.

        An input whose move out of ``work/`` failed leaves the batch (its records are written; the
        next start moves it).
        """
        if blocked.work_name is not None:
            self.commits.set_aside(blocked.work_name)
        return self.aside.add_blocked(blocked, tries, self._work)

    def examine(self, raw: bytes) -> Examined:
        """Parse and validate the bytes of one order (no file is touched)."""
        return examine(raw, self.host.settings.materials)

    # -- one entry, from the inbox to its end --------------------------------------------

    def consider(self, name: str, moved: bool = False, closed: bool = False) -> Processed | Wait | None:
        """Look at ``inbox/<name>``: take it through to the end if it is complete, else say when to look again.

        ``moved``: it was renamed into the inbox (so it is complete; a file that
        does not parse is rejected at once). ``closed``: a writer closed it after
        writing (so no quiet time is waited). Returns ``None`` when the entry is
        gone (taken by someone else, deleted).
        """
        if self.aside.entries and self._still_aside(name):
            return None
        seen = self.arrivals.look(name, moved, closed)
        if not isinstance(seen, Complete):
            return seen
        claimed = self.claims.claim(name)
        self.arrivals.forget(name)
        if claimed is None:
            return None
        work_name, info = claimed
        self.on_step("claimed")
        examined, opened = seen.examined, seen.opened
        if opened is not None and (info.st_ino, info.st_size, info.st_mtime_ns) != (
                opened.st_ino, opened.st_size, opened.st_mtime_ns):
            examined = None  # not the bytes that were read: read the claimed file itself
        # A claim made just now has no final record to look up: its key (the inode and the change time this
        # rename gave it) is new. Only an input found in work/ (a redo, a retry) may have one.
        return self._process(work_name, info, self._claimed(work_name, info), examined)

    def _still_aside(self, name: str) -> bool:
        try:
            return self.aside.holds(name, os.lstat(f"{self.arrivals.inbox}/{name}"))
        except OSError:
            return False

    def process_claimed(self, work_name: str, info: os.stat_result | None = None,
                        examined: Examined | None = None, redo: bool = False) -> Processed | None:
        """Take ``work/<work_name>`` through to its end; the same call finishes it after a crash or a failed write.

        Raises
        ------
        OutputBlocked
            A write failed; the input is still in ``work/``. Call again later.
        Interrupted
            A stop was asked while a stage ran; the input is still in ``work/``.
        """
        if info is None:
            try:
                info = os.lstat(f"{self._work}/{work_name}")
            except FileNotFoundError:
                return None
        claimed = self._claimed(work_name, info, redo)
        done = self.history.final_record(claimed.claim)
        if done is not None:
            self.commits.move_input(work_name, done.input, claimed.claim)
            return Processed(printable(claimed.name), done.outcome, done.order_id, done.status, redo=True)
        return self._process(work_name, info, claimed, examined)

    def _claimed(self, work_name: str, info: os.stat_result, redo: bool = False) -> Claimed:
        return Claimed(work_name, self.claims.original_name(work_name), claim_key(info), redo)

    def _process(self, work_name: str, info: os.stat_result, claimed: Claimed, examined: Examined | None) -> Processed:
        """Examine ``work/<work_name>`` (unless its bytes were examined on arrival) and decide its end."""
        path = f"{self._work}/{work_name}"
        if examined is None:
            try:
                examined = examine_claimed(path, info, self.config.watch.max_order_bytes, self.host.settings.materials)
            except OSError as exc:  # out of file descriptors, an I/O error: not the order's fault
                raise OutputBlocked("read", path, exc, work_name) from exc
        return self._decide(claimed, examined)

    def _decide(self, claimed: Claimed, examined: Examined) -> Processed:
        received = received_part(printable(claimed.name), examined.size, examined.sha256, utc_now(), claimed.claim,
                                 examined.parsed, examined.kind)
        order_id = examined.order_id
        if examined.problems is not None:
            return self.outcomes.reject(claimed, received, examined.problems, order_id)
        published = self.history.published_content(order_id)
        if published is not None:
            if published == examined.content_sha256:
                return self.outcomes.skip(claimed, received, examined)
            return self.outcomes.hold(claimed, received, examined)
        try:
            with self.time_limit():
                outcome = self.pipeline.run(examined.order, examined.parsed)
        except StageFailure as exc:
            problems = [{"field": exc.field, "message": exc.message}]
            return self.outcomes.reject(claimed, received, problems, order_id)
        except (OrderTimeLimit, StageWontStop) as exc:
            problems = [{"field": "(stage unknown)", "message": str(exc)}]
            return self.outcomes.reject(claimed, received, problems, order_id)
        except Exception as exc:  # e.g. a result_ready hook that raised: the order fails, the engine goes on
            problems = [{"field": "(engine)", "message": f"{type(exc).__name__}: {exc}"}]
            return self.outcomes.reject(claimed, received, problems, order_id)
        for stage, seconds in outcome.timings.items():
            self.stage_seconds[stage] = self.stage_seconds.get(stage, 0.0) + seconds
        return self.outcomes.publish(claimed, received, outcome.result, examined)

    # -- the group commit -------------------------------------------------------------------

    def commit(self) -> list[Processed]:
        """Make the orders processed since the last commit final (see :mod:`lenslane.lab.commit`)."""
        return self.commits.commit()

    def is_pending(self, processed: Processed) -> bool:
        """Whether ``processed`` still waits for :meth:`commit`."""
        return self.commits.is_pending(processed)

    @property
    def uncommitted(self) -> int:
        return self.commits.uncommitted

    @property
    def batched(self) -> int:
        return self.commits.batched

    def drain(self) -> list[Processed]:
        """Finish what ``work/`` holds, then every complete order now in the inbox (see :func:`drain`)."""
        return drain(self)


def drain(lab: Lab) -> list[Processed]:
    """Finish what ``work/`` holds, then every complete order now in the inbox, one commit per order.

    For scripts and tests; ``lenslane watch --once`` goes through the daemon,
    which adds the lock, the time limit, retries, logs and the group commit of a
    backlog.
    """
    done = []
    for name in lab.recover():
        processed = lab.process_claimed(name, redo=True)
        if processed is not None:
            done += lab.commit() if lab.uncommitted else [processed]
    names = lab.pending()
    while names:
        settling = []
        for name in names:
            outcome = lab.consider(name)
            if isinstance(outcome, Processed):
                done += lab.commit() if lab.uncommitted else [outcome]
            elif isinstance(outcome, Wait) and outcome.reason == "settling":
                settling.append((outcome.until, name))
        if settling:
            time.sleep(max(0.0, min(until for until, _ in settling) - time.time()))
        names = [name for _, name in settling]
    return done
