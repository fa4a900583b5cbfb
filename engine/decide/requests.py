"""Decision requests: how a person's decision reaches the lab's one writer.

``lenslane decide`` never writes the audit log or moves a result itself while
another process may. It drops a request into ``LAB/decisions/`` the way a sender
drops an order (written under a temp name, fsynced, renamed in), and whoever
holds the lab's lock takes it (a rename to ``<id>.taken``, after which it can no
longer be withdrawn) and applies it: the running engine (woken by SIGUSR1, and
looking at the folder at every rescan anyway), or, when no engine runs,
``lenslane decide`` itself after taking the lock. The applier writes an answer
beside the request (``<id>.answer.json``) and then removes the request, so a
request still in the folder is not finished; the audit log says whether it was
already recorded.
"""
from __future__ import annotations

import json
import os
import secrets
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

from lenslane.audit.results import REQUESTS
from lenslane.contract.models import ORDER_ID_RE
from lenslane.decide.model import ACTIONS, EXIT_USAGE, DecisionError, DecisionResult
from lenslane.lab.files import create_durably, fsync_dir, rename_noreplace, write_durably

FORMAT = "lens-decision-request/1"
ANSWER_SUFFIX = ".answer.json"
TAKEN_SUFFIX = ".taken"
#: An answer no one came for (the person's command was stopped) is removed after this long (s).
ANSWER_KEEP_SECONDS = 3600.0
#: Longest name and note a request may carry (characters).
MAX_BY, MAX_NOTE = 200, 4000


def utc_now() -> str:
    return datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def new_request(order_id: str, action: str, by: str, note: str, held_file: str | None = None) -> dict[str, Any]:
    """A request, checked; raises :class:`DecisionError` (exit 2) when it is not well formed."""
    request = {"format": FORMAT, "request": "", "order_id": order_id, "action": action, "by": by, "note": note,
               "requested_at": utc_now()}
    if held_file:
        request["held_file"] = held_file
    check_request(request)
    stamp = request["requested_at"].replace("-", "").replace(":", "").replace(".", "")
    request["request"] = f"{stamp}-{secrets.token_hex(4)}"
    return request


def check_request(request: Any) -> None:
    def bad(message: str) -> DecisionError:
        return DecisionError(message, EXIT_USAGE)

    if not isinstance(request, dict) or request.get("format") != FORMAT:
        raise bad(f"not a decision request ({FORMAT})")
    order_id, action = request.get("order_id"), request.get("action")
    if not isinstance(order_id, str) or not ORDER_ID_RE.match(order_id):
        raise bad(f"order_id: {order_id!r} is not an order id")
    if action not in ACTIONS:
        raise bad(f"action: {action!r} is not one of {', '.join(ACTIONS)}")
    for key, longest in (("by", MAX_BY), ("note", MAX_NOTE)):
        value = request.get(key)
        if not isinstance(value, str) or not value.strip():
            raise bad(f"{key}: required — {'who decides' if key == 'by' else 'why'}, in words")
        if len(value) > longest or any(ord(c) < 32 and c not in "\t\n" for c in value):
            raise bad(f"{key}: at most {longest} characters, no control characters")
    held = request.get("held_file")
    if held is not None and (not isinstance(held, str) or "/" in held or held.startswith(".")):
        raise bad(f"held_file: {held!r} is not a file name in held/")


def folder(lab_root: Path) -> Path:
    return Path(lab_root) / REQUESTS


def write_request(lab_root: Path, request: dict[str, Any]) -> Path:
    """Drop a request into ``decisions/``: temp name, fsync, rename, fsync the folder."""
    target = folder(lab_root) / f"{request['request']}.json"
    target.parent.mkdir(exist_ok=True)
    create_durably(target, json.dumps(request, ensure_ascii=False, indent=1).encode() + b"\n")
    return target


def pending(lab_root: Path) -> list[Path]:
    """Requests not yet finished, oldest first (their names start with the time they were made):
    ``<id>.json`` waiting, ``<id>.taken`` taken by an applier that has not finished it. Only plain files are
    requests (``lenslane decide`` writes them): a folder or link of such a name is no request, and never one that
    stops the requests after it."""
    try:
        entries = list(os.scandir(folder(lab_root)))
    except FileNotFoundError:
        return []
    return [folder(lab_root) / n for n in sorted(entry.name for entry in entries if entry.is_file(follow_symlinks=False))
            if not n.startswith(".") and (n.endswith(TAKEN_SUFFIX) or n.endswith(".json") and not n.endswith(ANSWER_SUFFIX))]


def request_id(path: Path) -> str:
    return path.name.removesuffix(TAKEN_SUFFIX).removesuffix(".json")


def take(path: Path) -> Path:
    """Claim a waiting request (atomic rename): from now on it cannot be withdrawn. FileNotFoundError: withdrawn."""
    if path.name.endswith(TAKEN_SUFFIX):
        return path
    taken = path.with_name(request_id(path) + TAKEN_SUFFIX)
    rename_noreplace(path, taken)
    fsync_dir(path.parent)  # taken for good: after a power loss it is not withdrawn as if never taken
    return taken


def answer_path(request_path: Path) -> Path:
    return request_path.with_name(request_id(request_path) + ANSWER_SUFFIX)


def write_answer(request_path: Path, outcome: DecisionResult | DecisionError) -> None:
    if isinstance(outcome, DecisionError):
        answer = {"ok": False, "message": outcome.message, "exit_code": outcome.exit_code}
    else:
        answer = {"ok": True, "decision": outcome.to_dict()}
    write_durably(answer_path(request_path), json.dumps(answer, ensure_ascii=False).encode() + b"\n")


def read_answer(request_path: Path) -> DecisionResult | DecisionError | None:
    """The answer to a request, once there; removes it."""
    path = answer_path(request_path)
    try:
        answer = json.loads(path.read_bytes())
    except FileNotFoundError:
        return None
    except ValueError:
        return None  # never half-written (renamed in whole); a stranger's file: wait for the real one
    path.unlink(missing_ok=True)
    if answer.get("ok"):
        return DecisionResult(**answer["decision"])
    return DecisionError(answer["message"], int(answer["exit_code"]))


def remove_stale_answers(lab_root: Path, now: float) -> None:
    """Answers whose asker stopped waiting: the audit log keeps the decision, the answer is only a reply."""
    try:
        names = os.listdir(folder(lab_root))
    except FileNotFoundError:
        return
    for name in names:
        path = folder(lab_root) / name
        try:
            if name.endswith(ANSWER_SUFFIX) and now - path.stat().st_mtime > ANSWER_KEEP_SECONDS:
                path.unlink()
        except FileNotFoundError:
            pass
