"""Outcomes: how a claimed order ends — published, rejected, held or skipped — by one mechanism.

Each outcome names where the input goes and whether a report is written
beside it; :meth:`Outcomes.settle` writes what the outcome writes (the
result under a temp name, or the report durably), chooses the input's
destination, and queues the order's audit record for the group commit, which
records it and moves the input.

Each pass is **one** audit record (:mod:`lenslane.audit.records`): its outcome,
what arrived (``received``), the story (every change and flag) and the run
(engine, chain, who made each stage, the configuration), the parts that repeat
from order to order written once into the chain by the audit log itself.
"""
from __future__ import annotations

import hashlib
import json
import os
from dataclasses import dataclass
from typing import Any, Callable

import orjson

from lenslane.contract.models import ORDER_ID_RE
from lenslane.lab.commit import GroupCommit, Pending
from lenslane.lab.errors import OutputBlocked
from lenslane.lab.examine import Examined
from lenslane.lab.files import claim_tag, create_durably, free_name, holds, printable, write_unsynced
from lenslane.lab.history import FinalRecord, History

ERRORS_SUFFIX = ".errors.json"
HELD_SUFFIX = ".held.json"
#: Results are written compact (a person reads them through `lenslane explain` or any JSON viewer):
#: an order's result is some 20 kB, and every byte is written and flushed once per order.
_RESULT_JSON = orjson.OPT_SERIALIZE_NUMPY


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
class Claimed:
    """An input in ``work/``: its name there, the name it arrived under, its claim key."""

    work_name: str
    name: str
    claim: str
    redo: bool = False


@dataclass(frozen=True)
class _Kind:
    step: str  # the word for a failed write of this outcome
    folder: str  # where the input goes
    report_suffix: str = ""  # the report written beside the input; "" for none


KINDS = {"published": _Kind("publish", "archive"), "rejected": _Kind("reject", "rejected", ERRORS_SUFFIX),
         "held": _Kind("hold", "held", HELD_SUFFIX), "skipped": _Kind("skip", "archive")}


def result_bytes(result: dict[str, Any]) -> bytes:
    """The bytes of a published result."""
    return orjson.dumps(result, option=_RESULT_JSON) + b"\n"


def story_fields(result: dict[str, Any]) -> dict[str, Any]:
    """The story a result's audit record carries: its changes and flags, in order (the final lens follows from them)."""
    return {"changes": result["changes"], "flags": result["flags"]}


def report_bytes(report: dict[str, Any]) -> bytes:
    """The bytes of a report written beside an input (``<name>.errors.json``, ``<name>.held.json``)."""
    return json.dumps(report, ensure_ascii=False, indent=1).encode("utf-8", "backslashreplace") + b"\n"


class Outcomes:
    """Ends claimed orders; every ending goes through :meth:`settle`."""

    def __init__(self, root: str, history: History, commit: GroupCommit, run: dict[str, Any],
                 reached: Callable[[str], None]):
        self.root = root
        self.history = history
        self.commit = commit
        self.run = run  # what ran the orders (lenslane.audit.records.run_definition)
        self._reached = reached

    def publish(self, claimed: Claimed, received: dict[str, Any], result: dict[str, Any],
                examined: Examined) -> Processed:
        """Write the result under a temp name; the group commit makes it durable and renames it into place."""
        order_id = result["order_id"]
        if not ORDER_ID_RE.match(order_id):  # validated by the contract already; never a path
            raise ValueError(f"order id {order_id!r} cannot name a file")
        data = result_bytes(result)
        # A result that needs a person waits in review/, never in outbox/ (lenslane decide approves or refuses it).
        folder = "review" if result["status"] == "review" else "outbox"
        target = f"{self.root}/{folder}/{order_id}.json"
        if os.path.lexists(target) and not holds(target, data):
            return self.hold(claimed, received, examined, [{"field": "order_id", "message": (
                f"{folder}/{order_id}.json is already there, and not as this order makes it (a result the audit log "
                "does not know, or one made before a crash with other settings); it is kept as it is, and this "
                "copy is held for a person to decide — nothing was published")}])
        try:
            self.commit.result_written(write_unsynced(target, data), target)
        except OSError as exc:
            raise OutputBlocked("publish", target, exc, claimed.work_name) from exc
        self.history.note_published(order_id, examined.content_sha256)
        return self.settle(claimed, received, "published", order_id, {
            "status": result["status"], "result": f"{folder}/{order_id}.json",
            "result_sha256": hashlib.sha256(data).hexdigest(), "content_sha256": examined.content_sha256,
            **story_fields(result)}, status=result["status"])

    def reject(self, claimed: Claimed, received: dict[str, Any], problems: list[dict[str, str]],
               order_id: str | None = None) -> Processed:
        return self.settle(claimed, received, "rejected", order_id, {"reasons": problems},
                           report={"rejected": True, "problems": problems}, reasons=problems)

    def hold(self, claimed: Claimed, received: dict[str, Any], examined: Examined,
             reasons: list[dict[str, str]] | None = None) -> Processed:
        order_id = examined.order_id
        reasons = reasons or [{"field": "order_id", "message": (
            f"order {order_id} was already published (outbox/{order_id}.json) with different content; this "
            "copy is held for a person to compare the two and decide — it was not processed")}]
        return self.settle(claimed, received, "held", order_id,
                           {"reasons": reasons, "content_sha256": examined.content_sha256},
                           report={"held": True, "order_id": order_id, "reasons": reasons,
                                   "published": f"outbox/{order_id}.json"}, reasons=reasons)

    def skip(self, claimed: Claimed, received: dict[str, Any], examined: Examined) -> Processed:
        order_id = examined.order_id
        return self.settle(claimed, received, "skipped", order_id, {
            "reason": f"the same order (same content) was already published as outbox/{order_id}.json; "
                      "this copy is recorded and archived, nothing is published again",
            "content_sha256": examined.content_sha256})

    def settle(self, claimed: Claimed, received: dict[str, Any], outcome: str, order_id: str | None,
               fields: dict[str, Any], *, report: dict[str, Any] | None = None, status: str | None = None,
               reasons: list[dict[str, str]] | None = None) -> Processed:
        """The one ending: choose where the input goes, write the report if any, queue the record."""
        kind = KINDS[outcome]
        folder = os.path.join(self.root, kind.folder)
        name = printable(claimed.name)

        def report_for(target: str) -> bytes:
            return report_bytes({"file": name, **(report or {}), "input": printable(f"{kind.folder}/{target}")})

        def taken(target: str) -> bool:
            """An input is there or on its way there, or a report of other bytes (a redo's own is the same)."""
            report_path = os.path.join(folder, f"{target}{kind.report_suffix}")
            return (self.commit.is_destination(f"{kind.folder}/{target}")
                    or os.path.lexists(os.path.join(folder, target))
                    or (report is not None and os.path.lexists(report_path)
                        and not holds(report_path, report_for(target))))

        target = free_name(folder, claimed.name, claim_tag(claimed.claim), kind.report_suffix, taken)
        destination = f"{kind.folder}/{target}"
        if report is not None:
            self._write_report(kind.step, os.path.join(folder, f"{target}{kind.report_suffix}"),
                               report_for(target), claimed)
        final = {"event": outcome, "order_id": order_id, "received": received, **fields,
                 "input": printable(destination), "run": self.run}
        processed = Processed(name, outcome, order_id, status, reasons, redo=claimed.redo)
        self.commit.defer(Pending(claimed.work_name, claimed.claim, final,
                                  FinalRecord(destination, outcome, order_id, status), processed))
        return processed

    def _write_report(self, step: str, path: str, data: bytes, claimed: Claimed) -> None:
        try:
            create_durably(path, data, sync_folder=False)  # the folder is fsynced by the commit
        except OSError as exc:
            raise OutputBlocked(step, path, exc, claimed.work_name) from exc
        self.commit.folder_written(os.path.dirname(path))
        self._reached("published")
