"""The story of one order as plain data, gathered from the audit log alone (the outbox may be gone).

:func:`order_story` returns every time the order was processed: what arrived,
the prescription, each stage with what it changed (before and after, why, the
method and its source, the inputs), the flags by level, the final lens and the
outcome. Only dicts, lists, strings, numbers and None — JSON as it stands — so
any renderer (text, HTML) can tell it without reading the log itself.

The log is read through its index (:class:`lenslane.audit.index.Index`): only
the order's own records, found by order id or by the input's file name. A pass
is one record (what arrived, the story, the run, the outcome; its repeating
parts filled in from the log's ``define`` records); a lab whose log began in
the first format, a record per event, is told the same way.
"""
from __future__ import annotations

import copy
import hashlib
from pathlib import Path
from typing import Any

from lenslane.audit.index import Index, level_index
from lenslane.audit.records import unpack
from lenslane.vocabulary import CAUTION, EYES, LEVELS, OUTCOMES, WHAT_TO_DECIDE

_LENS_ORDER = ("rx", "surfacing", "prism", "geometry")


class _Processing:
    """One pass of one input file through the engine: what arrived, the story, the outcome."""

    def __init__(self, received: dict[str, Any] | None, order_id: str | None):
        self.received = received
        self.order_id = order_id
        self.records: list[dict[str, Any]] = []  # its changes and flags, as change/flag records
        self.seqs: list[int] = [received["seq"]] if received and "seq" in received else []
        self.outcome: dict[str, Any] | None = None

    def add(self, record: dict[str, Any]) -> None:
        self.seqs.append(record["seq"])
        if record.get("event") in OUTCOMES:
            self.outcome = record
        else:
            self.records.append(record)


def _one_record_pass(record: dict[str, Any]) -> _Processing:
    """A pass written as one record: its received part, story, run and outcome in one."""
    received = dict(record["received"], seq=record["seq"], ts=record["received"].get("at"))
    processing = _Processing(received, record.get("order_id"))
    seq = record["seq"]
    processing.records = ([{"event": "change", "seq": seq, **change} for change in record.get("changes") or []]
                          + [{"event": "flag", "seq": seq, **flag} for flag in record.get("flags") or []])
    run = record.get("run") if isinstance(record.get("run"), dict) else {}
    # The outcome tells the run as a first-format outcome record did: its fields beside the outcome's.
    config = run.get("config")  # the ref of its define: a seq, or (second format) the first digits of its sha256
    processing.outcome = {**run, "config_ref": config if isinstance(config, (int, str)) else None,
                          **{k: v for k, v in record.items() if k != "run"}}
    return processing


def _processings(index: Index, key: str, decisions: list[dict[str, Any]] | None = None) -> list[_Processing]:
    """Every pass of the order id (or input file name) ``key``, oldest first, read through the index;
    its people's decisions go to ``decisions``."""
    found: list[_Processing] = []
    current: _Processing | None = None
    for place in index.places_of_order(key):
        record = index.read(place)
        if record is None:
            continue
        event = record.get("event")
        if event == "decided":
            if decisions is not None:
                decisions.append(record)
            continue
        if isinstance(record.get("received"), dict):
            found.append(_one_record_pass(unpack(record, index.body)))
            current = None
            continue
        # The first format: received, change…, flag…, outcome, each a record of its own.
        if event == "received":
            current = _Processing(record, record.get("order_id"))
            found.append(current)
            continue
        if current is None or record.get("order_id") != current.order_id:
            # An order's records without their "received" (it was in a removed part of the log).
            current = _Processing(None, record.get("order_id"))
            found.append(current)
        current.add(record)
        if event in OUTCOMES:
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
    seqs = processing.seqs or sorted({r["seq"] for r in processing.records})
    received = processing.received
    final = (outcome.get("lenses") or _final_lenses(processing)) if outcome.get("event") == "published" else {}
    lenses = {eye: _ordered(lens, _LENS_ORDER) for eye, lens in _ordered(final, EYES).items()}
    return {
        "seq": [min(seqs), max(seqs)] if seqs else None,
        "received": None if received is None else {
            "file": received.get("file"), "size": received.get("size"), "sha256": received.get("sha256"),
            "recorded_at": received.get("ts"), "account": received.get("account"),
            "wearer_ref": received.get("wearer_ref"), "placed_at": received.get("placed_at")},
        "engine": {"version": outcome.get("engine_version"), "config_sha256": outcome.get("config_sha256"),
                   "stages": chain or None, "hooks": outcome.get("hooks") or [],
                   "config_ref": outcome.get("config_ref")},
        "prescription": {eye: lens["rx"] for eye, lens in lenses.items() if "rx" in lens},
        "stages": list(stages.values()),
        "flags": flags,
        "flags_by_level": {level: [f for f in flags if f["level"] == level] for level in reversed(LEVELS)},
        "lenses": lenses,
        "outcome": _outcome(outcome),
    }


def _final_lenses(processing: _Processing) -> dict[str, Any]:
    """The final lens from the changes: each part of each eye is what the last change to it set."""
    lenses: dict[str, dict[str, Any]] = {}
    for record in processing.records:
        parts = str(record.get("field", "")).split(".")
        if record.get("event") == "change" and len(parts) >= 3 and parts[0] == "lenses":
            place = lenses.setdefault(parts[1], {})
            for part in parts[2:-1]:
                place = place.setdefault(part, {})
            place[parts[-1]] = copy.deepcopy(record.get("after"))  # a later change to a part changes this copy only
    return lenses


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
    placed = ([(s["seq"][1] if s["seq"] else 0, s["outcome"]) for s in stories]
              + [(d["seq"], d) for d in decisions or []])
    inputs = {story["outcome"].get("input"): story["outcome"] for story in stories if story["outcome"].get("input")}
    for _, outcome in sorted(placed, key=lambda item: item[0] or 0):
        for move in outcome.get("moves") or ():
            if move.get("from") in inputs and move.get("to"):  # a held input, archived or refused by a decision
                inputs[move["from"]]["input"] = move["to"]
            if move.get("from") in latest:
                moved = latest.pop(move["from"])
                to = f"moved to {move['to']}" if move.get("to") else "removed"
                moved["result_now"] = f"{to} by the {outcome['action']} decision (seq {outcome['seq']})"
                if move.get("to"):  # and there now? (a refused result in rejected/, a superseded one in archive/)
                    state = _file_state(Path(lab_root) / move["to"], move.get("sha256"))
                    moved["result_now"] += {"same": ", unchanged there", "gone": "; no longer there",
                                            "changed": "; CHANGED there since"}[state]
        if outcome.get("event", "published") == "published" and outcome.get("result"):
            if outcome["result"] in latest:
                latest[outcome["result"]]["result_now"] = "replaced by a later processing"
            latest[outcome["result"]] = outcome
    for path, outcome in latest.items():
        folder = path.split("/", 1)[0]  # outbox, or review while it waits for a person
        outcome["result_now"] = {"same": f"still in {folder}/, unchanged", "gone": f"no longer in {folder}/",
                                 "changed": "CHANGED since it was published"}[
            _file_state(Path(lab_root) / path, outcome.get("result_sha256"))]


def _file_state(path: Path, sha256: Any) -> str:
    """``same`` when the file has the sha256 the log recorded, ``changed`` when it has other bytes, else ``gone``."""
    try:
        data = path.read_bytes()
    except (FileNotFoundError, IsADirectoryError):
        return "gone"
    return "same" if hashlib.sha256(data).hexdigest() == sha256 else "changed"


def order_story(lab_root: Path, order_id: str, index: Index | None = None) -> dict[str, Any]:
    """Everything the audit log says about one order, as data (``found`` false when it says nothing).

    ``order_id`` may also be the name of the input file (with or without
    ``.json``), which finds an order refused before its id could be read.
    ``index``: the lab's audit index, if the caller has it open.
    """
    records: list[dict[str, Any]] = []
    with level_index(lab_root, index) as index:
        stories = [_story_of(p) for p in _processings(index, order_id, records)]
    decisions = [_decision_item(record) for record in records]
    _check_result_files(Path(lab_root), stories, decisions)
    return {"order_id": order_id, "lab": str(lab_root), "found": bool(stories or decisions),
            "processings": stories, "decisions": decisions, "caution": CAUTION}


def configurations(lab_root: Path, story: dict[str, Any]) -> list[dict[str, Any]]:
    """The configuration in force for each pass of a story (each once), from the log's define records."""
    seen, out = set(), []
    with level_index(lab_root) as index:
        for processing in story["processings"]:
            engine = processing["engine"]
            ref = engine.get("config_ref")
            if (ref, engine.get("config_sha256")) in seen:
                continue
            seen.add((ref, engine.get("config_sha256")))
            try:
                config = index.body(ref) if ref else None
            except KeyError:
                config = None
            out.append({"config_sha256": engine.get("config_sha256"), "config": config})
    return out
