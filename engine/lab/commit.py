"""Group commit: the orders processed since the last commit are made final together, synchronously.

In this order: make the batch's result files (written under temp names)
durable with one flush of the file system; rename each to its
``outbox/<order_id>.json``; fsync the folders the output files went into;
append all the batch's audit records in one write and fsync it; then move each
input out of ``work/``. A result is never renamed before its bytes are on disk,
and until the audit fsync returns every input of the batch is still in
``work/``, so a crash at any instant leaves each order either recorded (only
the move is left) or redone from its input, deterministically, over the same
output name. That is the guarantee of one order at a time, with one flush, one
folder fsync and one audit fsync per batch instead of per order.
"""
from __future__ import annotations

import os
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Callable

from lenslane.audit.log import AUDIT_NAME, AuditError, AuditLog
from lenslane.lab.errors import OutputBlocked
from lenslane.lab.files import fsync_dir, make_durable, publish_file, rename_noreplace
from lenslane.lab.history import FinalRecord, History

if TYPE_CHECKING:
    from lenslane.lab.outcomes import Processed


@dataclass
class Pending:
    """An order whose output file is written, waiting for the group commit (with its one audit record)."""

    work_name: str
    claim: str
    record: dict[str, Any]
    final: FinalRecord
    processed: "Processed"
    recorded_in_log: bool = False


@dataclass
class _Batch:
    """One batch on its way through :meth:`GroupCommit.commit`: what is left of each step."""

    orders: list[Pending] = field(default_factory=list)
    unpublished: list[tuple[str, str]] = field(default_factory=list)  # (temp, result) still to rename
    folders: set[str] = field(default_factory=set)  # still to fsync
    durable: bool = False  # the temp files' bytes are on disk


class GroupCommit:
    """Collects processed orders and makes them final in one commit; resumes a commit a failure cut short."""

    def __init__(self, root: str, history: History, open_audit: Callable[[], AuditLog],
                 reached: Callable[[str], None]):
        self.root = root
        self.work = os.path.join(root, "work")
        self.outbox = os.path.join(root, "outbox")
        self.history = history
        self._open_audit = open_audit
        self._reached = reached
        self.audit: AuditLog | None = None
        self._next = _Batch()  # processed, waiting for commit()
        self._committing: _Batch | None = None  # the batch commit() began and has not finished
        self._final: list["Processed"] = []  # made final, not yet returned by commit()
        self._destined: set[str] = set()  # where the inputs of the queued orders go (relative to the lab)

    def open_audit(self) -> None:
        """(Re)open the audit log, so its tail is the one on disk (opening may close a torn last line); the
        history answers from its index."""
        if self.audit is not None:
            self.audit.close()
            self.audit = None  # until one opens: a log that cannot be opened now is opened again at the next commit
        self.audit = self._open_audit()
        self.history.use(self.audit.index)

    # -- what the next commit takes ------------------------------------------------

    def result_written(self, temp: str, target: str) -> None:
        """A result is written under ``temp``, unsynced; the commit makes it durable and renames it to ``target``."""
        self._next.unpublished.append((temp, target))

    def folder_written(self, folder: str) -> None:
        """A file was made durable in ``folder``; the commit fsyncs the folder."""
        self._next.folders.add(folder)

    def defer(self, pending: Pending) -> None:
        self._next.orders.append(pending)
        self._destined.add(pending.final.input)

    def _batches(self) -> list[_Batch]:
        return [self._next] if self._committing is None else [self._next, self._committing]

    def is_destination(self, path: str) -> bool:
        """Whether an input waiting for a commit will go to ``path`` (relative to the lab): a name no other input
        may take. Kept as the orders are queued and leave, not gathered from the batches at every question."""
        return path in self._destined

    def set_aside(self, work_name: str) -> None:
        """Leave ``work/<work_name>`` where it is: its records are written, its move is given up until a restart."""
        for batch in self._batches():
            kept = [pending for pending in batch.orders if pending.work_name != work_name]
            for pending in batch.orders:
                if pending.work_name == work_name:
                    self._destined.discard(pending.final.input)
            batch.orders[:] = kept

    def is_pending(self, processed: "Processed") -> bool:
        """Whether ``processed`` still waits for :meth:`commit` (newest first: it is usually the one asked about)."""
        return any(pending.processed is processed for batch in self._batches() for pending in reversed(batch.orders))

    @property
    def uncommitted(self) -> int:
        """Orders processed whose audit records and archiving wait for :meth:`commit`."""
        return len(self._next.orders) + (len(self._committing.orders) if self._committing is not None else 0)

    @property
    def batched(self) -> int:
        """Orders processed since the last call of :meth:`commit` (the batch it will take next)."""
        return len(self._next.orders)

    # -- the commit -------------------------------------------------------------------

    def commit(self) -> list["Processed"]:
        """Make the orders processed since the last commit final; returns them.

        Raises :class:`OutputBlocked` when a step fails; what is not final stays
        queued, and the next call resumes it.
        """
        if self._committing is None and self._next.orders:
            self._committing, self._next = self._next, _Batch()
        if self._committing is not None:
            self._finish(self._committing)
            self._committing = None
        done, self._final = self._final, []
        return done

    def _finish(self, batch: _Batch) -> None:
        """The steps for one batch, resuming after the last one that succeeded.

        Each order made final goes to ``_final`` at once, so one that a later
        failure in the same call would hide is still returned by the next call.
        """
        first = batch.orders[0].work_name if batch.orders else None
        if batch.unpublished and not batch.durable:
            try:
                make_durable(self.outbox, [temp for temp, _ in batch.unpublished])
            except OSError as exc:
                raise OutputBlocked("publish", self.outbox, exc, first) from exc
            batch.durable = True
        while batch.unpublished:
            temp, target = batch.unpublished[0]
            try:
                publish_file(temp, target)  # a redo's result is already there, byte for byte: kept as it is
            except OSError as exc:
                raise OutputBlocked("publish", target, exc, first) from exc
            batch.unpublished.pop(0)
            batch.folders.add(os.path.dirname(target))  # outbox/, or review/
            self._reached("published")
        while batch.folders:
            folder = next(iter(batch.folders))
            try:
                fsync_dir(folder)
            except OSError as exc:
                raise OutputBlocked("publish", folder, exc, first) from exc
            batch.folders.discard(folder)
        self._record(batch.orders)
        while batch.orders:
            pending = batch.orders[0]
            self.move_input(pending.work_name, pending.final.input, pending.claim)
            self._destined.discard(pending.final.input)  # the input is there now
            self._final.append(batch.orders.pop(0).processed)

    def _record(self, orders: list[Pending]) -> None:
        unrecorded = [pending for pending in orders if not pending.recorded_in_log]
        if not unrecorded:
            return
        try:
            if self.audit is None:
                self.open_audit()
            self.audit.append([pending.record for pending in unrecorded])
        except (OSError, AuditError) as exc:
            raise OutputBlocked("audit", os.path.join(self.root, AUDIT_NAME), exc, unrecorded[0].work_name) from exc
        for pending in unrecorded:
            pending.recorded_in_log = True
            self.history.note_final(pending.claim, pending.final)
        self._reached("audited")

    def move_input(self, work_name: str, destination: str, claim: str) -> None:
        """Move a finished input out of ``work/`` to where its final record says."""
        target = f"{self.root}/{destination}"
        try:
            rename_noreplace(f"{self.work}/{work_name}", target)
        except FileNotFoundError:
            pass  # already moved, or removed by hand: nothing is left to do
        except OSError as exc:
            raise OutputBlocked("archive", target, exc, work_name) from exc
        self.history.note_moved(claim)
        self._reached("archived")
