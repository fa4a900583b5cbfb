"""``lenslane queue``: what waits for a person, oldest first.

Read from the folders alone (``review/`` and ``held/``), so it is quick at any
size of history and never writes: each review result with its flags, each held
version with what differs from the published one, field by field.
"""
from __future__ import annotations

import json
import os
import time
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

from lenslane.decide import requests
from lenslane.decide.model import ACTION_MEANINGS, QueueItem
from lenslane.lab.folder import HELD_SUFFIX

ABSENT = "(absent)"
DECIDE_REVIEW = "; ".join(f"{action}: {ACTION_MEANINGS[action]}" for action in ("approve", "refuse"))
DECIDE_HELD = "; ".join(f"{action}: {ACTION_MEANINGS[action]}" for action in ("replace", "discard"))


def _utc(timestamp: float) -> str:
    return datetime.fromtimestamp(timestamp, timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def _load(path: Path) -> Any:
    try:
        return json.loads(path.read_bytes())
    except (OSError, ValueError):
        return None


def _since(path: Path) -> float | None:
    """When ``path`` began to wait (its modification time); ``None`` when it is gone (decided meanwhile)."""
    try:
        return path.stat().st_mtime
    except FileNotFoundError:
        return None


def _names(folder: Path) -> list[str]:
    try:
        return sorted(n for n in os.listdir(folder) if not n.startswith("."))
    except FileNotFoundError:
        return []


def flatten(value: Any, prefix: str = "") -> dict[str, Any]:
    """Every leaf of a JSON value by its path: ``rx.right.sphere``, ``rx.right.prism[0].amount``."""
    if isinstance(value, dict) and value:
        found: dict[str, Any] = {}
        for key, item in value.items():
            found.update(flatten(item, f"{prefix}.{key}" if prefix else str(key)))
        return found
    if isinstance(value, list) and value:
        found = {}
        for index, item in enumerate(value):
            found.update(flatten(item, f"{prefix}[{index}]"))
        return found
    return {prefix: value}


def differences(published: Any, held: Any) -> list[dict[str, Any]]:
    """What differs between two orders, field by field, in the held version's order of fields."""
    before, after = flatten(published), flatten(held)
    fields = list(after) + [f for f in before if f not in after]
    return [{"field": f, "published": before.get(f, ABSENT), "held": after.get(f, ABSENT)}
            for f in fields if before.get(f, ABSENT) != after.get(f, ABSENT)]


def queue(lab_root: Path) -> list[QueueItem]:
    """Orders in review and held orders, oldest first, each with its age."""
    root = Path(lab_root)
    if not root.is_dir():
        raise FileNotFoundError(f"{root}: no such lab folder")
    now = time.time()
    asked: dict[str, str] = {}
    for path in requests.pending(root):
        request = _load(path)
        if isinstance(request, dict) and isinstance(request.get("order_id"), str):
            asked.setdefault(request["order_id"], f"{request.get('action')} by {request.get('by')}")
    items = []
    for name in _names(root / "review"):
        since = _since(root / "review" / name)  # first: a file gone after it is read too is left out
        result = _load(root / "review" / name)
        if not name.endswith(".json") or since is None or not isinstance(result, dict):
            continue
        items.append(QueueItem(
            kind="review", order_id=str(result.get("order_id")), path=f"review/{name}", since=_utc(since),
            age_seconds=round(now - since, 1), actions=("approve", "refuse"), decide=DECIDE_REVIEW,
            flags=[{k: flag.get(k) for k in ("code", "level", "eye", "message")} for flag in result.get("flags", [])],
            revision=result.get("revision"), pending_request=asked.get(str(result.get("order_id")))))
    for name in _names(root / "held"):
        if not name.endswith(HELD_SUFFIX):
            continue
        since = _since(root / "held" / name)
        report = _load(root / "held" / name)
        held_name = name.removesuffix(HELD_SUFFIX)
        held = _load(root / "held" / held_name)  # an order that passed intake: a JSON object while it is there
        if since is None or not isinstance(report, dict) or not isinstance(held, dict):
            continue
        order_id = str(report.get("order_id"))
        published, compared = None, None
        for folder in ("outbox", "review"):
            result = _load(root / folder / f"{order_id}.json")
            if isinstance(result, dict):
                published, compared = result.get("order"), f"{folder}/{order_id}.json"
                break
        reasons = report.get("reasons")
        reason = reasons[0].get("message") if isinstance(reasons, list) and reasons and isinstance(reasons[0], dict) \
            else None
        items.append(QueueItem(
            kind="held", order_id=order_id, path=f"held/{held_name}", since=_utc(since),
            age_seconds=round(now - since, 1), actions=("replace", "discard"), decide=DECIDE_HELD,
            differences=differences(published or {}, held), compared_with=compared,
            pending_request=asked.get(order_id), reason=reason if isinstance(reason, str) else None))
    items.sort(key=lambda item: (-item.age_seconds, item.order_id))
    return items


def age_text(seconds: float) -> str:
    """``45 s``, ``12 min``, ``3 h 05 min``, ``2 d 04 h``."""
    seconds = max(0, int(seconds))
    if seconds < 60:
        return f"{seconds} s"
    minutes = seconds // 60
    if minutes < 60:
        return f"{minutes} min"
    hours, minutes = divmod(minutes, 60)
    if hours < 24:
        return f"{hours} h {minutes:02d} min"
    days, hours = divmod(hours, 24)
    return f"{days} d {hours:02d} h"


def _value(value: Any) -> str:
    return value if value == ABSENT else json.dumps(value, ensure_ascii=False)


def render(items: list[QueueItem]) -> str:
    """The queue for a person to read."""
    if not items:
        return "nothing waits for a person"
    lines = [f"{len(items)} waiting for a person, oldest first"]
    for item in items:
        lines.append("")
        what = "in review" if item.kind == "review" else "held"
        revision = f", revision {item.revision}" if item.revision else ""
        lines.append(f"{item.order_id}  {what}{revision} — {item.path}, waiting {age_text(item.age_seconds)} "
                     f"(since {item.since})")
        for flag in item.flags:
            eye = f"{flag['eye']} eye" if flag.get("eye") else "both eyes"
            lines.append(f"  [{flag['level']}] {flag['code']} ({eye}): {flag['message']}")
        if item.reason:
            lines.append(f"  why: {item.reason}")
        if item.kind == "held":
            against = item.compared_with or "no published result found"
            lines.append(f"  differs from {against} in {len(item.differences)} field(s):")
            for diff in item.differences:
                lines.append(f"    {diff['field']}: {_value(diff['published'])} → {_value(diff['held'])}")
        lines.append(f"  decide: {item.decide}")
        if item.pending_request:
            lines.append(f"  a decision is on its way: {item.pending_request} (not yet applied)")
    return "\n".join(lines)
