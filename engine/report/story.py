"""The story of one order as plain data, gathered from the audit log alone (the outbox may be gone).

:func:`order_story` returns every time the order was processed: what arrived,
the prescription, each stage with what it changed (before and after, why, the
method and its source, the inputs), the flags by level, the final lens and the
outcome. Only dicts, lists, strings, numbers and None — JSON as it stands — so
any renderer (text, HTML) can tell it without reading the log itself.
"""
from __future__ import annotations

import hashlib
from pathlib import Path
from typing import Any

from lenslane.audit.log import iter_records
from lenslane.vocabulary import CAUTION, EYES, LEVELS, OUTCOMES, WHAT_TO_DECIDE

_LENS_ORDER = ("rx", "surfacing", "prism", "geometry")


class _Processing:
    """The records of one pass of one input file through the engine."""

    def __init__(self, received: dict[str, Any] | None, order_id: str | None):
        self.received = received
        self.order_id = order_id
        self.records: list[dict[str, Any]] = [received] if received else []
        self.outcome: dict[str, Any] | None = None

    def matches(self, order_id: str) -> bool:
        if self.order_id is not None:
            return self.order_id == order_id
        # Rejected before its order id could be read: known only by its file name.
        name = (self.received or {}).get("file") or ""
        return Path(name).stem == order_id


def _processings(lab_root: Path, order_id: str, decisions: list[dict[str, Any]] | None = None) -> list[_Processing]:
    """Each pass of the order through the engine; its people's decisions go to ``decisions``."""
    found: list[_Processing] = []
    current: _Processing | None = None
    for record in iter_records(lab_root):
        event = record.get("event")
        if event == "decided":
            if record.get("order_id") == order_id and decisions is not None:
                decisions.append(record)
            continue
        if event == "received":
            current = _Processing(record, record.get("order_id"))
            if current.matches(order_id):
                found.append(current)
            continue
        if "order_id" not in record:
            continue  # the log's own records (torn-line), not an order's
        if current is None or record.get("order_id") != current.order_id:
            # An order's records without their "received" (it was in a removed part of the log).
            current = _Processing(None, record.get("order_id"))
            if current.matches(order_id):
                found.append(current)
        current.records.append(record)
        if event in OUTCOMES:
            current.outcome = record
            current = None
    return found


def _change_item(record: dict[str, Any]) -> dict[str, Any]:
    return {"seq": record.get("seq"), "field": record.get("field", ""),
            "before": record.get("before"), "after": record.get("after"),
            "reason": record.get("reason"), "method": record.get("method"), "source": record.get("source"),
            "inputs": record.get("inputs") or {}}


def _flag_item(record: dict[str, Any]) -> dict[str, Any]:
    level = record.get("level")
    return {"seq": record.get("seq"), "code": record.get("code"), "level": level, "eye": record.get("eye"),
            "stage": record.get("stage"), "message": record.get("message"), "values": record.get("values") or {},
            "decide": WHAT_TO_DECIDE.get(level, "decide as the message says")}


def _ordered(mapping: dict[str, Any], first: tuple[str, ...]) -> dict[str, Any]:
    """The log stores keys sorted; put them back in the order a person reads them."""
    keys = [k for k in first if k in mapping] + [k for k in mapping if k not in first]
    return {k: mapping[k] for k in keys}


def _stages_run(outcome: dict[str, Any]) -> list[str]:
    """The chain as far as it ran: all of it, up to the stage that failed, or none (refused, held, skipped)."""
    chain = list(outcome.get("stages") or [])
    if outcome.get("event") == "published":
        return chain
    if outcome.get("event") != "rejected":
        return []
    fields = [str(r.get("field", "")) for r in outcome.get("reasons") or []]
    failed = [f[len("(stage "):-1] for f in fields if f.startswith("(stage ")]
    if failed and failed[0] in chain:
        return chain[: chain.index(failed[0]) + 1]
    if any(f == "(result)" or f.startswith("(plugin ") for f in fields):
        return chain  # every stage ran; the finished result, or a hook after it, failed
    return []


def _made_by(outcome: dict[str, Any], chain: list[str]) -> dict[str, dict[str, Any]]:
    """Each stage's plugin, distribution and version, from the outcome record (when it says)."""
    return {entry.get("stage"): {k: entry.get(k) for k in ("plugin", "distribution", "version")}
            for entry in outcome.get("chain") or [] if entry.get("stage") in chain}


def _story_of(processing: _Processing) -> dict[str, Any]:
    outcome = processing.outcome or {}
    chain = _stages_run(outcome)
    made_by = _made_by(outcome, chain)
    stages: dict[str, dict[str, Any]] = {}

    def stage_entry(name: str) -> dict[str, Any]:
        if name not in stages:
            stages[name] = {"stage": name, "made_by": made_by.get(name), "changes": [], "flags": []}
        return stages[name]

    for name in chain:
        stage_entry(name)
    flags = []
    for record in processing.records:
        if record.get("event") == "change":
            stage_entry(record.get("stage", "?"))["changes"].append(_change_item(record))
        elif record.get("event") == "flag":
            flag = _flag_item(record)
            flags.append(flag)
            stage_entry(flag["stage"] or "?")["flags"].append(flag["code"])
    seqs = [r["seq"] for r in processing.records]
    received = processing.received
    lenses = {eye: _ordered(lens, _LENS_ORDER)
              for eye, lens in _ordered(outcome.get("lenses") or {}, EYES).items()}
    return {
        "seq": [min(seqs), max(seqs)] if seqs else None,
        "received": None if received is None else {
            "file": received.get("file"), "size": received.get("size"), "sha256": received.get("sha256"),
            "recorded_at": received.get("ts")},
        "engine": {"version": outcome.get("engine_version"), "config_sha256": outcome.get("config_sha256"),
                   "stages": chain or None, "hooks": outcome.get("hooks") or []},
        "prescription": {eye: lens["rx"] for eye, lens in lenses.items() if "rx" in lens},
        "stages": list(stages.values()),
        "flags": flags,
        "flags_by_level": {level: [f for f in flags if f["level"] == level] for level in reversed(LEVELS)},
        "lenses": lenses,
        "outcome": _outcome(outcome),
    }


def _outcome(outcome: dict[str, Any]) -> dict[str, Any]:
    event = outcome.get("event")
    if event is None:
        return {"event": None, "status": "unfinished"}
    told = {"event": event, "status": outcome.get("status") or event, "recorded_at": outcome.get("ts"),
            "input": outcome.get("input")}
    if event == "published":
        told.update(result=outcome.get("result"), result_sha256=outcome.get("result_sha256"))
    if outcome.get("revision"):
        told.update(revision=outcome["revision"], supersedes=outcome.get("supersedes"))
    reasons = outcome.get("reasons") or ([{"field": "(order)", "message": outcome["reason"]}]
                                         if outcome.get("reason") else [])
    if reasons:
        told["reasons"] = reasons
    return told


def _decision_item(record: dict[str, Any]) -> dict[str, Any]:
    item = {key: record.get(key) for key in ("seq", "action", "by", "note", "decided_at", "applies_to")}
    item["recorded_at"] = record.get("ts")
    for key in ("result", "result_sha256", "status", "flags_acknowledged", "reasons", "revision", "supersedes",
                "outcome"):
        if record.get(key) is not None:
            item[key] = record[key]
    item["moves"] = record.get("moves") or []
    return item


def _check_result_files(lab_root: Path, stories: list[dict[str, Any]],
                        decisions: list[dict[str, Any]] | None = None) -> None:
    """Say, for the last result placed at each path, whether the file is still what was placed there."""
    latest: dict[str, dict[str, Any]] = {}
    placed = [(s["processings_seq"], s["outcome"]) for s in stories] + [(d["seq"], d) for d in decisions or []]
    inputs = {story["outcome"].get("input"): story["outcome"] for story in stories if story["outcome"].get("input")}
    for _, outcome in sorted(placed, key=lambda item: item[0] or 0):
        for move in outcome.get("moves") or ():
            if move.get("from") in inputs and move.get("to"):  # a held input, archived or refused by a decision
                inputs[move["from"]]["input"] = move["to"]
            if move.get("from") in latest:
                moved = latest.pop(move["from"])
                to = f"moved to {move['to']}" if move.get("to") else "removed"
                moved["result_now"] = f"{to} by the {outcome['action']} decision (seq {outcome['seq']})"
        if outcome.get("event", "published") == "published" and outcome.get("result"):
            if outcome["result"] in latest:
                latest[outcome["result"]]["result_now"] = "replaced by a later processing"
            latest[outcome["result"]] = outcome
    for path, outcome in latest.items():
        try:
            data = (Path(lab_root) / path).read_bytes()
        except (FileNotFoundError, IsADirectoryError):
            outcome["result_now"] = "no longer in the outbox"
            continue
        same = hashlib.sha256(data).hexdigest() == outcome.get("result_sha256")
        outcome["result_now"] = "still in the outbox, unchanged" if same else "CHANGED since it was published"


def order_story(lab_root: Path, order_id: str) -> dict[str, Any]:
    """Everything the audit log says about one order, as data (``found`` false when it says nothing)."""
    records: list[dict[str, Any]] = []
    stories = [_story_of(p) for p in _processings(Path(lab_root), order_id, records)]
    decisions = [_decision_item(record) for record in records]
    for story in stories:
        story["processings_seq"] = story["seq"][1] if story["seq"] else 0
    _check_result_files(Path(lab_root), stories, decisions)
    for story in stories:
        del story["processings_seq"]
    return {"order_id": order_id, "lab": str(lab_root), "found": bool(stories or decisions),
            "processings": stories, "decisions": decisions, "caution": CAUTION}
