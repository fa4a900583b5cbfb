"""The audit history the lab asks during its work, answered by the index (never by reading the whole log).

- :meth:`History.published_content`: the content sha256 of the version of an
  order id that was published last (duplicate detection);
- :meth:`History.final_record`: the final record of a claim (after a crash,
  whether an order in ``work/`` was already recorded);
- ``note_*``: what the lab made final in memory but the log does not hold yet
  (an order published earlier in the same batch).
"""
from __future__ import annotations

from typing import Any

from lenslane.audit.index import Index


class History:
    def __init__(self, index: Index):
        self.index = index
        self._pending: dict[str, str | None] = {}  # order id → content, published in a batch not yet in the log

    def is_published(self, order_id: str) -> bool:
        return order_id in self._pending or self.index.is_published(order_id)

    def published_content(self, order_id: str) -> str | None:
        """The content sha256 of the last published version of ``order_id``, or ``None`` if never published."""
        if order_id in self._pending:
            return self._pending[order_id]
        return self.index.published_content(order_id)

    def final_record(self, claim: str) -> dict[str, Any] | None:
        """The record that ended the pass of the input claimed as ``claim``, if the log holds one."""
        return self.index.final_of_claim(claim)

    def note_published(self, order_id: str, content_sha256: str | None) -> None:
        """An order is published and its record waits for the batch's append."""
        self._pending[order_id] = content_sha256

    def note_recorded(self, order_ids: list[str | None]) -> None:
        """The batch's records are in the log (and the index): its orders need not be remembered here."""
        for order_id in order_ids:
            self._pending.pop(order_id, None)
