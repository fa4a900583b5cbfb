"""People decide: the review queue, held orders, and every decision in the audit chain.

The interface the command line and the web page use:

- :func:`queue` ``(lab_root) -> list[QueueItem]``: what waits for a person, oldest first;
- :func:`decide` ``(lab_root, order_id, action, by, note) -> DecisionResult``, raising
  :class:`DecisionError` (``message``, ``exit_code``).
"""
from lenslane.decide.client import decide
from lenslane.decide.listing import queue
from lenslane.decide.model import ACTIONS, DecisionError, DecisionResult, QueueItem

__all__ = ["ACTIONS", "DecisionError", "DecisionResult", "QueueItem", "decide", "queue"]
