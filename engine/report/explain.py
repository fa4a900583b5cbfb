"""The story of one order, told from the audit log alone (the outbox may be gone).

:func:`order_story` gathers every time the order was processed — what arrived,
each stage with what it changed and why, every flag, the final lens and the
outcome — as plain data; :func:`render` writes it for a person, values in the
trade's notation (``−4.25 −1.25 × 170``, ``1.12Δ base 26.6°``, ``6.8 mm``).
"""
from __future__ import annotations

import hashlib
from pathlib import Path
from typing import Any

from lenslane.audit.log import iter_records
from lenslane.contract.models import CAUTION

MINUS = "\u2212"  # the minus sign the trade prints, not a hyphen

DECISIONS = {
    "review": "held for review: a person decides before the order goes to production",
    "warning": "check before production; the order is not held",
    "info": "for information; no decision is needed unless it surprises you",
}

#: The events that end one pass of an input through the engine.
OUTCOMES = ("published", "rejected", "held", "skipped")

_LABELS = {"front_curve_d": "front curve", "center_thickness_mm": "centre thickness",
           "blank_min_diameter_mm": "minimum blank diameter", "base_deg": "base"}
_UNITS = (("_mm", " mm"), ("_deg", "°"), ("_d", " D"), ("_g", " g"), ("_m", " m"))
_EYE_ORDER = ("right", "left")
_LENS_ORDER = ("rx", "surfacing", "prism", "geometry")
_GEOMETRY_ORDER = ("front_curve_d", "center_thickness_mm", "edge_min_mm", "edge_max_mm",
                   "blank_min_diameter_mm", "weight_g")


# --------------------------------------------------------------------------
# The trade's notation
# --------------------------------------------------------------------------


def number(value: float, decimals: int = 2, sign: bool = False) -> str:
    """A number with the typographic minus; ``sign`` also writes ``+`` (powers always carry a sign)."""
    text = f"{abs(value):.{decimals}f}"
    if float(text) == 0:
        return text
    if value < 0:
        return MINUS + text
    return "+" + text if sign else text


def power_text(power: dict[str, Any], add: bool = True) -> str:
    """A sphero-cylinder as written on a prescription: ``−4.25 −1.25 × 170 add +2.25``.

    Full-precision values are written as the result publishes them: 0.01 D and
    a whole degree 1–180. ``add=False`` leaves out the add.

    Examples
    --------
    >>> power_text({"sphere": -4.2, "cylinder": -1.12, "axis": 173})
    '−4.20 −1.12 × 173'
    >>> power_text({"sphere": 0.0, "cylinder": -0.5, "axis": 90, "add": 2.0})
    'plano −0.50 × 90 add +2.00'
    >>> power_text({"sphere": -4.2013, "cylinder": -1.1249, "axis": 179.6, "add": 2.0}, add=False)
    '−4.20 −1.12 × 180'
    """
    sphere = power.get("sphere", 0.0)
    cylinder = power.get("cylinder") or 0.0
    text = "plano" if round(sphere, 2) == 0 else number(sphere, sign=True)
    if round(cylinder, 2) != 0:
        axis = round(power.get("axis") or 180) % 180 or 180
        text += f" {number(cylinder, sign=True)} × {axis}"
    elif text != "plano":
        text += " DS"
    if add and power.get("add") is not None:
        text += f" add {number(power['add'], sign=True)}"
    return text


def prism_text(prism: dict[str, Any]) -> str:
    """A resultant prism: ``1.12Δ base 26.6°``, or ``no prism``.

    Examples
    --------
    >>> prism_text({"amount": 1.12, "base_deg": 26.6})
    '1.12Δ base 26.6°'
    """
    amount = prism.get("amount") or 0.0
    if round(amount, 2) == 0:
        return "no prism"
    return f"{number(amount)}Δ base {number(prism.get('base_deg', 0.0), 1)}°"


def geometry_text(geometry: dict[str, Any]) -> str:
    """Lens geometry with units: ``front curve 4.00 D, centre thickness 1.0 mm, edge 3.9–6.8 mm, …``."""
    parts = []
    keys = [k for k in _GEOMETRY_ORDER if k in geometry] + sorted(k for k in geometry if k not in _GEOMETRY_ORDER)
    for key in keys:
        if key == "edge_max_mm" and "edge_min_mm" in geometry:
            continue
        if key == "edge_min_mm" and "edge_max_mm" in geometry:
            parts.append(f"edge {number(geometry['edge_min_mm'], 1)}–{number(geometry['edge_max_mm'], 1)} mm")
            continue
        parts.append(_item_text(key, geometry[key]))
    return ", ".join(parts)


def value_text(field: str, value: Any) -> str:
    """A result field's value in the notation its field calls for."""
    if value is None:
        return "(not set)"
    last = field.rsplit(".", 1)[-1]
    if isinstance(value, dict):
        if last in ("rx", "surfacing") or "sphere" in value:
            return power_text(value)
        if last == "prism" or "base_deg" in value:
            return prism_text(value)
        if last == "geometry":
            return geometry_text(value)
        return ", ".join(_item_text(k, v) for k, v in value.items())
    return _scalar_text(last, value)


def inputs_text(inputs: dict[str, Any]) -> str:
    """The inputs a method used, each with its unit: ``refraction vertex 12.0 mm, index 1.586``."""
    return ", ".join(_item_text(k, v) for k, v in inputs.items()) or "none recorded"


def _label(key: str) -> str:
    if key in _LABELS:
        return _LABELS[key]
    for suffix, _ in _UNITS:
        if key.endswith(suffix) and len(key) > len(suffix):
            return key[: -len(suffix)].replace("_", " ")
    return key.replace("_", " ")


def _item_text(key: str, value: Any) -> str:
    if isinstance(value, dict) and not {"sphere", "amount"} & value.keys():
        return f"{_label(key)} ({inputs_text(value)})"  # the inputs of one of several methods
    if isinstance(value, dict):
        return f"{_label(key)} {value_text(key, value)}"
    if isinstance(value, list):
        return f"{_label(key)} " + ("[" + "; ".join(_list_item_text(key, v) for v in value) + "]" if value else "none")
    return f"{_label(key)} {_scalar_text(key, value)}"


def _list_item_text(key: str, value: Any) -> str:
    if isinstance(value, dict) and "amount" in value and "base" in value:
        base = value["base"]
        base = f"{number(base, 1)}°" if isinstance(base, (int, float)) else base
        return f"{number(value['amount'])}Δ base {base}"
    if isinstance(value, dict):
        return ", ".join(_item_text(k, v) for k, v in value.items())
    return _scalar_text(key, value)


def _scalar_text(key: str, value: Any) -> str:
    if isinstance(value, bool):
        return "yes" if value else "no"
    if value is None:
        return "none"
    if not isinstance(value, (int, float)):
        return str(value)
    if key in ("sphere", "cylinder", "add"):
        return f"{number(value, sign=True)} D"
    if key == "axis":
        return f"{value}°"
    if key == "amount":
        return f"{number(value)}Δ"
    if key == "base_deg":
        return f"{number(value, 1)}°"
    for suffix, unit in _UNITS:
        if key.endswith(suffix):
            decimals = {"_d": 2, "_m": 4}.get(suffix, 1)
            return number(value, decimals, sign=suffix == "_d") + unit
    if isinstance(value, int):
        return number(value, 0)
    return number(value, 4).rstrip("0").rstrip(".")


# --------------------------------------------------------------------------
# Gathering the story
# --------------------------------------------------------------------------


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
    field = record.get("field", "")
    inputs = record.get("inputs") or {}
    return {
        "seq": record.get("seq"), "field": field,
        "before": record.get("before"), "after": record.get("after"),
        "before_text": value_text(field, record.get("before")),
        "after_text": value_text(field, record.get("after")),
        "reason": record.get("reason"), "method": record.get("method"), "source": record.get("source"),
        "inputs": inputs, "inputs_text": inputs_text(inputs),
    }


def _flag_item(record: dict[str, Any]) -> dict[str, Any]:
    level = record.get("level")
    return {"seq": record.get("seq"), "code": record.get("code"), "level": level, "eye": record.get("eye"),
            "stage": record.get("stage"), "message": record.get("message"), "values": record.get("values") or {},
            "decide": DECISIONS.get(level, "decide as the message says")}


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
    failed = [r.get("field", "")[len("(stage "):-1] for r in outcome.get("reasons") or []
              if str(r.get("field", "")).startswith("(stage ")]
    if failed and failed[0] in chain:
        return chain[: chain.index(failed[0]) + 1]
    return []


def _story_of(processing: _Processing) -> dict[str, Any]:
    outcome = processing.outcome or {}
    chain = _stages_run(outcome)
    stages: dict[str, dict[str, Any]] = {name: {"stage": name, "changes": [], "flags": []} for name in chain}
    flags = []
    for record in processing.records:
        if record.get("event") == "change":
            name = record.get("stage", "?")
            stages.setdefault(name, {"stage": name, "changes": [], "flags": []})["changes"].append(_change_item(record))
        elif record.get("event") == "flag":
            flag = _flag_item(record)
            flags.append(flag)
            name = flag["stage"] or "?"
            stages.setdefault(name, {"stage": name, "changes": [], "flags": []})["flags"].append(flag["code"])
    seqs = [r["seq"] for r in processing.records]
    received = processing.received
    lenses = {eye: _ordered(lens, _LENS_ORDER)
              for eye, lens in _ordered(outcome.get("lenses") or {}, _EYE_ORDER).items()}
    return {
        "seq": [min(seqs), max(seqs)] if seqs else None,
        "received": None if received is None else {
            "file": received.get("file"), "size": received.get("size"), "sha256": received.get("sha256"),
            "recorded_at": received.get("ts")},
        "engine": {"version": outcome.get("engine_version"), "config_sha256": outcome.get("config_sha256"),
                   "stages": chain or None},
        "stages": list(stages.values()),
        "flags": flags,
        "outcome": _outcome(outcome),
        "lenses": lenses,
        "lenses_text": {eye: {part: value_text(part, value) for part, value in lens.items()}
                        for eye, lens in lenses.items()},
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


# --------------------------------------------------------------------------
# Telling it
# --------------------------------------------------------------------------


def render(story: dict[str, Any]) -> str:
    """The story for a person to read."""
    if not story["found"]:
        return f"order {story['order_id']} is not in the audit log of {story['lab']}"
    count = len(story["processings"])
    lines = [f"Order {story['order_id']} — from the audit log of {story['lab']}",
             "Processed once." if count == 1 else f"Processed {count} times; each is told below, oldest first."]
    decisions = list(story.get("decisions") or [])
    for number_, processing in enumerate(story["processings"], start=1):
        while decisions and processing["seq"] and decisions[0]["seq"] < processing["seq"][0]:
            lines += [""] + _render_decision(decisions.pop(0))
        lines.append("")
        lines += _render_processing(processing, number_, count)
    for decision in decisions:
        lines += [""] + _render_decision(decision)
    lines += ["", story["caution"]]
    return "\n".join(lines)


def _render_processing(p: dict[str, Any], index: int, count: int) -> list[str]:
    seq = p["seq"]
    lines = [f"== Processing {index} of {count} (audit records seq {seq[0]}–{seq[1]}) =="]
    received = p["received"]
    if received:
        lines.append(f"Arrived:  {received['file']}, {received['size']} bytes, sha256 {received['sha256']}, "
                     f"recorded {received['recorded_at']}")
    else:
        lines.append("Arrived:  (the record of its arrival is not in the log)")
    engine = p["engine"]
    if engine["version"]:
        lines.append(f"Engine:   lenslane {engine['version']}, config sha256 {engine['config_sha256']}")
    if engine["stages"]:
        lines.append("Chain:    " + " → ".join(engine["stages"]))
    if p["stages"]:
        lines += _render_stages(p["stages"])
    elif p["outcome"]["event"] == "rejected":
        lines.append("Stages:   none ran; the order was refused when it was read")
    elif p["outcome"]["event"] in ("held", "skipped"):
        lines.append("Stages:   none ran; see the outcome")
    lines += _render_flags(p["flags"])
    if p["lenses"]:
        lines.append("Final lens:")
        for eye, parts in p["lenses_text"].items():
            for position, (part, text) in enumerate(parts.items()):
                lines.append(f"  {eye if position == 0 else '':<6} {part:<10} {text}")
    lines += _render_outcome(p["outcome"])
    return lines


def _render_stages(stages: list[dict[str, Any]]) -> list[str]:
    lines = []
    for position, stage in enumerate(stages, start=1):
        codes = list(dict.fromkeys(stage["flags"]))
        counted = [f"{code} ×{stage['flags'].count(code)}" if stage["flags"].count(code) > 1 else code
                   for code in codes]
        raised = f"; raised {', '.join(counted)} (see Flags)" if codes else ""
        if not stage["changes"]:
            lines.append(f"Stage {position} of {len(stages)}: {stage['stage']} — changed nothing{raised}")
            continue
        lines.append(f"Stage {position} of {len(stages)}: {stage['stage']}{raised}")
        for change in stage["changes"]:
            lines.append(f"  {change['field']}: {change['before_text']} → {change['after_text']}")
            lines.append(f"      why:    {change['reason']}")
            lines.append(f"      inputs: {change['inputs_text']}")
            lines.append(f"      method: {change['method']} — source: {change['source']}")
    return lines


def _render_flags(flags: list[dict[str, Any]]) -> list[str]:
    if not flags:
        return ["Flags:    none"]
    lines = [f"Flags ({len(flags)}):"]
    for flag in flags:
        eye = f"{flag['eye']} eye" if flag["eye"] else "both eyes"
        lines.append(f"  [{flag['level']}] {flag['code']} ({eye}, stage {flag['stage']}): {flag['message']}")
        lines.append(f"      decide: {flag['decide']}")
    return lines


def _render_decision(decision: dict[str, Any]) -> list[str]:
    """A person's decision, as the audit chain holds it."""
    applies = decision.get("applies_to") or {}
    lines = [f"== Decision: {decision['action']} by {decision['by']}, {decision['decided_at']} (audit seq "
             f"{decision['seq']}, recorded {decision['recorded_at']}) ==",
             f"Why:      {decision['note']}",
             f"On:       {applies.get('path')}, sha256 {applies.get('sha256')}"]
    if decision.get("flags_acknowledged"):
        lines.append("Flags acknowledged: " + ", ".join(decision["flags_acknowledged"]))
    if decision.get("result"):
        now = f"; {decision['result_now']}" if decision.get("result_now") else ""
        lines.append(f"Result:   {decision['result']}, status {decision.get('status')}, sha256 "
                     f"{decision['result_sha256']}{now}")
    for reason in decision.get("reasons") or []:
        lines.append(f"  {reason.get('field')}: {reason.get('message')}")
    superseded = decision.get("supersedes")
    if superseded:
        kept = f", kept as {superseded['archived']}" if superseded.get("archived") else ""
        lines.append(f"Replaces: {superseded['path']}, sha256 {superseded['sha256']}{kept}; the next processing is "
                     f"revision {decision.get('revision')}")
    elif decision["action"] == "replace" and decision.get("outcome") == "rejected":
        lines.append("The new version was refused by the chain (see the next processing); the published result stays")
    return lines


def _render_outcome(outcome: dict[str, Any]) -> list[str]:
    if outcome["event"] == "published":
        now = f"; {outcome['result_now']}" if outcome.get("result_now") else ""
        revision = f", revision {outcome['revision']} (supersedes sha256 {outcome.get('supersedes')})" \
            if outcome.get("revision") else ""
        lines = [f"Outcome:  published, status {outcome['status']}{revision}, recorded {outcome['recorded_at']}",
                 f"Result:   {outcome['result']}, sha256 {outcome['result_sha256']}{now}"]
        return lines + ([f"Input:    now {outcome['input']}"] if outcome.get("input") else [])
    if outcome["event"] is not None:
        meaning = {"rejected": "rejected, not made", "held": "held for a person, not processed",
                   "skipped": "skipped, already published with the same content"}.get(outcome["event"],
                                                                                     outcome["event"])
        lines = [f"Outcome:  {meaning}, recorded {outcome['recorded_at']}" + (":" if outcome.get("reasons") else "")]
        lines += [f"  {reason.get('field')}: {reason.get('message')}" for reason in outcome.get("reasons", [])]
        if outcome.get("input"):
            lines.append(f"Input:    now {outcome['input']}")
        return lines
    return ["Outcome:  not recorded — the engine stopped before it finished this pass; "
            "an unfinished order is redone when the engine next starts"]
