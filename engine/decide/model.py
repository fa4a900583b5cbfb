"""What the decision desk hands out: queue items, decision results, and the errors with their exit codes."""
from __future__ import annotations

from dataclasses import asdict, dataclass, field
from typing import Any

#: Each action, and what the order must be waiting for.
ACTIONS = {"approve": "review", "refuse": "review", "replace": "held", "discard": "held"}
#: What each action does, in the lab's words (the queue, the web page and their help say it the same way).
ACTION_MEANINGS = {
    "approve": "publish the result to outbox/ with status ready, its flags acknowledged",
    "refuse": "move the result to rejected/ with your reason",
    "replace": "run the new version through the chain as the order's next revision, superseding the published result",
    "discard": "archive the new version; the published result stays",
}
#: Each action as done.
ACTION_DONE = {"approve": "approved", "refuse": "refused", "replace": "replaced", "discard": "discarded"}

EXIT_OK = 0
EXIT_BLOCKED = 1  # the lab could not be written (disk full…); the request stays and is applied later
EXIT_USAGE = 2  # a request that is not well formed (argparse uses 2 too)
EXIT_UNKNOWN = 4  # the lab has no such order
EXIT_NOT_AWAITING = 5  # not waiting for this decision: decided already, or waiting for another kind
EXIT_MISMATCH = 6  # the files are not what the audit log says: nothing is decided on them
EXIT_NOT_TAKEN = 7  # the running engine did not take the request in time; it was withdrawn, nothing decided


class DecisionError(Exception):
    """A decision that was not applied, with what to tell the person and the exit code."""

    def __init__(self, message: str, exit_code: int):
        super().__init__(message)
        self.message = message
        self.exit_code = exit_code


@dataclass
class QueueItem:
    """One thing that waits for a person."""

    kind: str  # "review" (a result needs a person) | "held" (another version of a published order)
    order_id: str
    path: str  # lab-relative: review/<order_id>.json, or held/<name> (the held input)
    since: str  # UTC, when it began to wait
    age_seconds: float
    actions: tuple[str, ...]
    decide: str  # what the person decides, in a sentence
    flags: list[dict[str, Any]] = field(default_factory=list)  # review: every flag of the result
    differences: list[dict[str, Any]] = field(default_factory=list)  # held: field, published, held
    compared_with: str | None = None  # held: the published result the differences are against
    revision: int | None = None
    pending_request: str | None = None  # a decision already asked for and not yet applied
    reason: str | None = None  # held: why it was held, in its report's words

    def to_dict(self) -> dict[str, Any]:
        data = asdict(self)
        data["actions"] = list(self.actions)
        return data


@dataclass
class DecisionResult:
    """A decision applied (and recorded in the audit chain)."""

    order_id: str
    action: str
    by: str
    note: str
    decided_at: str
    request: str
    seq: int  # the audit record of the decision
    message: str  # what happened, in a sentence
    result: str | None = None  # lab-relative path of the result it published, if any
    result_sha256: str | None = None
    status: str | None = None

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)
