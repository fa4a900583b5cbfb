"""What the lab knows from its audit history: the only place the lab reads the audit log.

Two questions, asked at every order: was this order id already published, and
with which content (a resent copy is skipped, a different order under the same
id is held); and, for an input still in ``work/`` after a crash, was its final
record already written (then only its move out of ``work/`` is left). The lab
answers them from memory, filled from the log at start and kept current with
the ``note_*`` calls it makes after each commit.
"""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterable

from lenslane.vocabulary import OUTCOMES
from lenslane.audit.log import AUDIT_NAME, _read_tail, audit_files, iter_records

FINAL_EVENTS = OUTCOMES


@dataclass(frozen=True)
class FinalRecord:
    """A claim whose final audit record is written; only moving the input is left."""

    input: str  # where the input goes, relative to the lab
    outcome: str  # published | rejected | held | skipped
    order_id: str | None
    status: str | None


class History:
    """The audit history of one lab, as the lab needs it."""

    def __init__(self, root: Path):
        self.root = Path(root)
        self._published: dict[str, bytes] = {}  # order id → content sha256 (raw digest; b"" when unknown)
        self._final: dict[str, FinalRecord] = {}

    def load(self, claims: Iterable[str]) -> None:
        """Read the whole log: the published order ids, and the final records of ``claims`` (those in ``work/``)."""
        wanted = set(claims)
        self._published.clear()
        self._final.clear()
        for record in iter_records(self.root):
            event = record.get("event")
            if event == "published" and isinstance(record.get("order_id"), str):
                self._published[record["order_id"]] = _digest(record.get("content_sha256"))
            if event in FINAL_EVENTS and record.get("claim") in wanted and isinstance(record.get("input"), str):
                self._final[record["claim"]] = FinalRecord(record["input"], event, record.get("order_id"),
                                                           record.get("status"))

    def published_content(self, order_id: str) -> str | None:
        """The content sha256 of the published version of ``order_id``; ``None`` if never published.

        An empty string: published, by a record that kept no content digest.
        """
        digest = self._published.get(order_id)
        return None if digest is None else digest.hex()

    def final_record(self, claim: str) -> FinalRecord | None:
        return self._final.get(claim)

    def note_published(self, order_id: str, content_sha256: str | None) -> None:
        """An order is published (its records are on their way to the log in this batch)."""
        self._published[order_id] = _digest(content_sha256)

    def note_final(self, claim: str, record: FinalRecord) -> None:
        """A claim's final record is on disk; its input is still to be moved."""
        self._final[claim] = record

    def note_moved(self, claim: str) -> None:
        """A claim's input has left ``work/``: nothing more is asked about it."""
        self._final.pop(claim, None)

    def last_record(self) -> dict[str, Any] | None:
        """The newest whole record of the log (read from the end of the newest file that has one)."""
        for path in reversed(audit_files(self.root)):
            record = _read_tail(path).record
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


def _digest(content_sha256: Any) -> bytes:
    try:
        return bytes.fromhex(content_sha256) if isinstance(content_sha256, str) else b""
    except ValueError:
        return b""


__all__ = ["AUDIT_NAME", "FINAL_EVENTS", "FinalRecord", "History"]
