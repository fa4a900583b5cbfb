"""What the lab knows from its audit history: the only place the lab reads the audit log.

Two questions, asked at every order: was this order id already published, and
with which content (a resent copy is skipped, a different order under the same
id is held); and, for an input still in ``work/`` after a crash, was its final
record already written (then only its move out of ``work/`` is left). Both are
answered by the audit index (:class:`lenslane.audit.index.Index`), never by
reading the whole log; the ``note_*`` calls the lab makes as it publishes and
records cover what the log does not hold yet.
"""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

from lenslane.audit.index import Index
from lenslane.audit.log import AUDIT_NAME, audit_files
from lenslane.audit.reader import read_tail


@dataclass(frozen=True)
class FinalRecord:
    """A claim whose final audit record is written; only moving the input is left."""

    input: str  # where the input goes, relative to the lab
    outcome: str  # published | rejected | held | skipped
    order_id: str | None
    status: str | None
    seq: int | None = None  # the record's seq in the log (None: in this batch, not yet written)


class History:
    """The audit history of one lab, as the lab needs it.

    :meth:`use` gives it the audit log's index (the lab does when it opens the
    log); until then it knows nothing published and no final record.
    """

    def __init__(self, root: Path):
        self.root = Path(root)
        self.index: Index | None = None
        self._published: dict[str, str | None] = {}  # order id → content, published in a batch not yet in the log
        self._final: dict[str, FinalRecord] = {}  # recorded in this run, input not yet moved

    def use(self, index: Index) -> None:
        """Answer from ``index`` (the audit log's, opened or reopened); what was noted stays noted."""
        self.index = index

    def load(self) -> None:
        """Get ready for a new run: forget what was noted (the log now holds all it will); ask the index anew."""
        self._final.clear()
        self._published.clear()

    def is_published(self, order_id: str) -> bool:
        return self.index is not None and (order_id in self._published or self.index.is_published(order_id))

    def published_content(self, order_id: str) -> str | None:
        """The content sha256 of the published version of ``order_id``; ``None`` if never published.

        An empty string: published, by a record that kept no content digest.
        """
        if not self.is_published(order_id):
            return None
        if order_id in self._published:
            return self._published[order_id] or ""
        return self.index.published_content(order_id) or ""

    def final_record(self, claim: str) -> FinalRecord | None:
        """The final record of the input claimed as ``claim``, if the log holds one (or this run wrote it)."""
        if claim in self._final:
            return self._final[claim]
        record = self.index.final_of_claim(claim) if self.index is not None else None
        if record is None or not isinstance(record.get("input"), str):
            return None
        final = FinalRecord(record["input"], record["event"], record.get("order_id"), record.get("status"),
                            record.get("seq"))
        self._final[claim] = final
        return final

    def note_published(self, order_id: str, content_sha256: str | None) -> None:
        """An order is published (its record is on its way to the log in this batch)."""
        if self.index is not None:
            self._published[order_id] = content_sha256

    def note_final(self, claim: str, record: FinalRecord) -> None:
        """A claim's final record is on disk (and in the index); its input is still to be moved."""
        self._final[claim] = record
        self._published.pop(record.order_id, None)  # the index answers for it now

    def note_moved(self, claim: str) -> None:
        """A claim's input has left ``work/``: nothing more is asked about it."""
        self._final.pop(claim, None)

    def last_record(self) -> dict[str, Any] | None:
        """The newest whole record of the log (read from the end of the newest file that has one)."""
        for path in reversed(audit_files(self.root)):
            record = read_tail(path).record
            if record is not None:
                return record
        return None

    def size(self) -> int:
        """Bytes in all the lab's audit files."""
        total = 0
        for path in audit_files(self.root):
            try:
                total += path.stat().st_size
            except FileNotFoundError:
                continue
        return total


__all__ = ["AUDIT_NAME", "FinalRecord", "History"]
