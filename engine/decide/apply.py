"""Applying decisions, by the one process that holds the lab's lock.

One decision, in the order that makes a kill at any instant apply it once or
not at all:

1. check it against the audit log: the order waits for this decision, and the
   file it applies to has the sha256 the log gave it (a request the log already
   holds a ``decided`` record for skips to step 4);
2. write what is new, durably, without removing anything the log still
   accounts for: the approved result in ``outbox/``, the refusal's report in
   ``rejected/``, a replacing revision in ``outbox/`` or ``review/`` (the
   result it supersedes hard-linked into ``archive/`` first). Every byte is
   fixed by the request, the files and the log, so a redo writes the same;
3. append the ``decided`` record (with a replace, the revision's own record too)
   in one write, fsynced: from here on the decision is made;
4. the record's ``moves``: take each file it names from where it was (review/,
   held/, the old result's place) to where it goes, or remove it — only while
   it still has the sha256 the record gave it, so finishing twice is harmless;
5. answer the request and remove it.
"""
from __future__ import annotations

import hashlib
import json
import os
import time
from pathlib import Path
from typing import Any

import orjson

from lenslane.audit.records import received as received_part
from lenslane.audit.results import file_sha256
from lenslane.chain.pipeline import StageFailure
from lenslane.decide import requests
from lenslane.decide.history import OrderLog, order_log
from lenslane.decide.model import (
    ACTION_DONE, ACTIONS, EXIT_MISMATCH, EXIT_NOT_AWAITING, EXIT_UNKNOWN, EXIT_USAGE, DecisionError, DecisionResult,
)
from lenslane.lab.files import claim_tag, create_durably, free_name, fsync_dir, printable, rename_noreplace, write_durably
from lenslane.lab.folder import (
    ERRORS_SUFFIX, HELD_SUFFIX, Lab, StageWontStop, note_published, report_bytes, result_bytes, story_fields,
)

class Applier:
    """Applies the requests waiting in ``decisions/`` to a lab whose lock this process holds."""

    def __init__(self, lab: Lab):
        self.lab = lab
        self.root = Path(lab.root)

    def run_pending(self) -> list[tuple[dict[str, Any] | None, DecisionResult | DecisionError]]:
        """Apply every waiting request, oldest first; each is answered and removed."""
        done = []
        requests.remove_stale_answers(self.root, time.time())
        for path in requests.pending(self.root):
            request = None
            try:
                path = requests.take(path)
                request = json.loads(path.read_bytes())
                requests.check_request(request)
                if requests.request_id(path) != request["request"]:
                    raise DecisionError(f"{path.name}: the request's name is not its id", EXIT_USAGE)
                outcome: DecisionResult | DecisionError = self.apply(request)
            except FileNotFoundError:
                continue  # withdrawn by the person who asked
            except ValueError:
                outcome = DecisionError(f"{path.name}: not a JSON decision request", EXIT_USAGE)
            except DecisionError as exc:
                outcome = exc
            requests.write_answer(path, outcome)
            self.lab.on_step("decision-answered")
            path.unlink(missing_ok=True)
            done.append((request, outcome))
        return done

    def apply(self, request: dict[str, Any]) -> DecisionResult:
        order_id = request["order_id"]
        log = order_log(self.root, order_id, self.lab.audit.index if self.lab.audit is not None else None)
        earlier = log.decided_by_request(request["request"])
        if earlier is not None:  # recorded before a crash: only the moves may be left
            self._move(earlier.get("moves") or ())
            return _result_of(earlier)
        if ACTIONS[request["action"]] == "review":
            return self._review(request, log)
        return self._held(request, log)

    # -- a result in review/ ---------------------------------------------------

    def _review(self, request: dict[str, Any], log: OrderLog) -> DecisionResult:
        order_id, action = request["order_id"], request["action"]
        path = f"review/{order_id}.json"
        placed = log.results.files.get(path)
        if placed is None:
            raise self._not_awaiting(request, log)
        data = self._read(path, placed.sha256)
        result = orjson.loads(data)
        acknowledged = [flag["code"] for flag in result.get("flags", []) if flag.get("level") == "review"]
        decided = self._decided(request, {"path": path, "sha256": placed.sha256})
        if action == "approve":
            result["status"] = "ready"
            result["approved"] = {"by": request["by"], "at": request["requested_at"], "note": request["note"],
                                  "flags_acknowledged": acknowledged}
            approved = result_bytes(result)
            target = f"outbox/{order_id}.json"
            self._create_result(target, approved)
            decided.update(result=target, result_sha256=hashlib.sha256(approved).hexdigest(), status="ready",
                           flags_acknowledged=acknowledged, moves=[{"from": path, "to": None, "sha256": placed.sha256}])
            message = f"approved: {target} published with status ready"
        else:
            name = free_name(self.root / "rejected", f"{order_id}.json", claim_tag(request["request"]), ERRORS_SUFFIX)
            reasons = [{"field": "(decision)", "message": f"refused by {request['by']}: {request['note']}"}]
            create_durably(self.root / "rejected" / f"{name}{ERRORS_SUFFIX}", report_bytes(
                {"file": f"{order_id}.json", "rejected": True, "order_id": order_id, "problems": reasons,
                 "input": f"rejected/{name}"}))
            decided.update(reasons=reasons, moves=[{"from": path, "to": f"rejected/{name}", "sha256": placed.sha256}])
            message = f"refused: the result moved to rejected/{name}, the reason beside it"
        return self._commit([decided], message)

    # -- a held order: another version of a published order ---------------------

    def _held(self, request: dict[str, Any], log: OrderLog) -> DecisionResult:
        order_id = request["order_id"]
        waiting = [path for path in log.held if (self.root / path).exists()]
        if request.get("held_file"):
            waiting = [path for path in waiting if path == f"held/{request['held_file']}"]
        if not waiting:
            raise self._not_awaiting(request, log)
        if len(waiting) > 1:
            raise DecisionError(f"order {order_id} has {len(waiting)} held versions ({', '.join(waiting)}): "
                                "name the one this decision is about (--held NAME)", EXIT_USAGE)
        held = waiting[0]
        data = self._read(held, log.held[held])
        name = held.removeprefix("held/")
        moves: list[dict[str, Any]] = []
        events: list[dict[str, Any]] = []
        decided = self._decided(request, {"path": held, "sha256": log.held[held]})
        if request["action"] == "replace":
            message = self._replace(request, log, held, data, decided, moves, events)
        else:
            destination = free_name(self.root / "archive", name, claim_tag(request["request"]))
            moves.append({"from": held, "to": f"archive/{destination}", "sha256": log.held[held]})
            message = f"discarded: the held version is kept as archive/{destination}; the published result stays"
        moves.append({"from": f"{held}{HELD_SUFFIX}", "to": None, "sha256": None})  # its report: the log tells it
        decided["moves"] = moves
        return self._commit([decided, *events], message)

    def _replace(self, request: dict[str, Any], log: OrderLog, held: str, data: bytes, decided: dict[str, Any],
                 moves: list[dict[str, Any]], events: list[dict[str, Any]]) -> str:
        """Run the held version through the chain as the order's next revision (steps 2 of a replace)."""
        lab, order_id = self.lab, request["order_id"]
        name = held.removeprefix("held/")
        examined = lab.examine(data)
        reasons = examined.problems
        result = None
        if reasons is None:
            try:
                with lab.time_limit():
                    outcome = lab.pipeline.run(examined.order, examined.parsed)
                result = outcome.result
            except StageFailure as exc:
                reasons = [{"field": exc.field, "message": exc.message}]
            except (Exception, StageWontStop) as exc:  # a stage or hook that fails, the time limit: refused
                reasons = [{"field": "(engine)", "message": f"{type(exc).__name__}: {exc}"}]
        revision = log.revision + 1
        # The revision's pass is one record, as the inbox writes it; what arrived is the held version.
        received = {**received_part(printable(name), len(data), hashlib.sha256(data).hexdigest(),
                                    request["requested_at"], None, examined.parsed), "from": held}
        if result is None:
            target = free_name(self.root / "rejected", name, claim_tag(request["request"]), ERRORS_SUFFIX)
            create_durably(self.root / "rejected" / f"{target}{ERRORS_SUFFIX}", report_bytes(
                {"file": printable(name), "rejected": True, "problems": reasons, "input": f"rejected/{target}"}))
            moves.append({"from": held, "to": f"rejected/{target}", "sha256": log.held[held]})
            events.append({"event": "rejected", "order_id": order_id, "received": received, "reasons": reasons,
                           "input": f"rejected/{target}", "revision": revision, "run": lab.run})
            decided["outcome"] = "rejected"
            return f"the new version was refused by the chain ({reasons[0]['field']}: {reasons[0]['message']}); " \
                   "the published result stays"
        current = log.current()
        folder = "review" if result["status"] == "review" else "outbox"
        target = f"{folder}/{order_id}.json"
        if (self.root / target).exists() and (current is None or current[0] != target):
            raise _stranger(target)  # before anything is kept or written
        superseded = archived = None
        if current is not None:
            path, placed = current
            superseded = placed.sha256
            archived = self._keep(path, placed.sha256, f"{order_id}.r{log.revision}.json", request["request"])
            moves.append({"from": path, "to": archived, "sha256": placed.sha256})
            decided["supersedes"] = {"path": path, "sha256": placed.sha256, "archived": archived}
        result["revision"] = revision
        if superseded:
            result["supersedes"] = superseded
        published = result_bytes(result)
        # Only the result this revision supersedes, kept in archive/ by now, may be written over.
        replaces = current is not None and archived is not None and current[0] == target
        if replaces:
            write_durably(self.root / target, published)
        else:
            self._create_result(target, published)
        destination = free_name(self.root / "archive", name, claim_tag(request["request"]))
        moves.append({"from": held, "to": f"archive/{destination}", "sha256": log.held[held]})
        decided.update(revision=revision, outcome=folder)
        events.append({
            "event": "published", "order_id": order_id, "received": received, "status": result["status"],
            "result": target, "result_sha256": hashlib.sha256(published).hexdigest(),
            "content_sha256": examined.content_sha256, "input": f"archive/{destination}", "revision": revision,
            "supersedes": superseded, "run": lab.run, **story_fields(result)})
        note_published(lab, order_id, examined.content_sha256)
        waits = " and waits for review" if folder == "review" else ""
        return f"replaced: revision {revision} published as {target}{waits}" + (
            f"; the superseded result is kept as {decided['supersedes']['archived']}" if superseded else "")

    def _create_result(self, target: str, data: bytes) -> None:
        """Write a result where the decision's record will place it. A file already there that the log does not
        place there is no one's to replace: it is kept as it is, and nothing is decided (not retried: waiting
        would not change it, and the requests after this one must not wait behind it)."""
        try:
            create_durably(self.root / target, data)
        except FileExistsError:
            raise _stranger(target) from None

    def _keep(self, path: str, sha256: str, base: str, request_id: str) -> str | None:
        """Hard-link the result a revision supersedes into archive/ (step 2); returns its path there."""
        source = self.root / path
        candidate = self.root / "archive" / base
        if file_sha256(candidate) == sha256:
            return f"archive/{base}"  # linked before a crash
        if file_sha256(source) != sha256:
            return None  # taken away downstream: nothing to keep
        name = free_name(self.root / "archive", base, claim_tag(request_id))
        os.link(source, self.root / "archive" / name)
        fsync_dir(self.root / "archive")
        return f"archive/{name}"

    # -- the common steps ----------------------------------------------------------

    def _decided(self, request: dict[str, Any], applies_to: dict[str, Any]) -> dict[str, Any]:
        return {"event": "decided", "order_id": request["order_id"], "action": request["action"],
                "by": request["by"], "note": request["note"], "decided_at": request["requested_at"],
                "request": request["request"], "applies_to": applies_to}

    def _read(self, path: str, sha256: str) -> bytes:
        try:
            data = (self.root / path).read_bytes()
        except FileNotFoundError:
            raise DecisionError(f"{path} is gone, though the audit log says it is there; nothing was decided",
                                EXIT_MISMATCH) from None
        actual = hashlib.sha256(data).hexdigest()
        if actual != sha256:
            raise DecisionError(f"{path} was changed after the engine wrote it (sha256 {actual}, the audit log "
                                f"recorded {sha256}); nothing was decided", EXIT_MISMATCH)
        return data

    def _commit(self, events: list[dict[str, Any]], message: str) -> DecisionResult:
        self.lab.on_step("decision-written")
        records = self.lab.audit.append(events)  # step 3: the decision is made
        self.lab.on_step("decision-recorded")
        self._move(events[0].get("moves") or ())
        self.lab.on_step("decision-moved")
        decided = dict(records[0])
        for record in records[1:]:
            if record.get("event") == "published":
                decided.setdefault("result", record.get("result"))
                decided.setdefault("result_sha256", record.get("result_sha256"))
                decided.setdefault("status", record.get("status"))
        return _result_of(decided, message)

    def _move(self, moves: Any) -> None:
        """Step 4: each file still with the sha256 the record gave it goes where the record says."""
        touched = set()
        for move in moves:
            source = self.root / str(move["from"])
            if not source.exists() or (move.get("sha256") and file_sha256(source) != move["sha256"]):
                continue  # moved already, or replaced in place by the new revision
            target = move.get("to")
            if target is None:
                source.unlink()
            else:
                try:
                    rename_noreplace(source, self.root / target)
                except FileExistsError:  # moved before a crash, its old name left: drop that name only
                    if file_sha256(self.root / target) != (move.get("sha256") or file_sha256(source)):
                        continue  # something else sits there: both stay, and audit verify tells of it
                    source.unlink()
                touched.add((self.root / target).parent)
            touched.add(source.parent)
        for folder in touched:
            fsync_dir(folder)

    def _not_awaiting(self, request: dict[str, Any], log: OrderLog) -> DecisionError:
        order_id, action = request["order_id"], request["action"]
        if not log.known:
            return DecisionError(f"the lab has no order {order_id}: the audit log does not know it", EXIT_UNKNOWN)
        other = [path for path in log.held if (self.root / path).exists()] if ACTIONS[action] == "review" else (
            [f"review/{order_id}.json"] if f"review/{order_id}.json" in log.results.files else [])
        if other:
            kind = ("held: another version of it waits in " + ", ".join(other) + "; decide replace or discard"
                    if ACTIONS[action] == "review" else f"in review ({other[0]}); decide approve or refuse")
            return DecisionError(f"order {order_id} cannot be {ACTION_DONE[action]}: it is {kind}", EXIT_NOT_AWAITING)
        if request.get("held_file") and ACTIONS[action] == "held":
            return DecisionError(f"order {order_id} has no held version held/{request['held_file']} waiting",
                                 EXIT_NOT_AWAITING)
        if log.decisions:
            last = log.decisions[-1]
            return DecisionError(
                f"order {order_id} is not awaiting a decision: it was already decided — {last.get('action')} by "
                f"{last.get('by')} at {last.get('decided_at')} (\"{last.get('note')}\"; audit seq {last.get('seq')})",
                EXIT_NOT_AWAITING)
        outcome = log.last_outcome or {}
        state = {"published": f"published with status {outcome.get('status')} as {outcome.get('result')}",
                 "rejected": "rejected by the engine", "skipped": "published"}.get(outcome.get("event"), "processed")
        return DecisionError(f"order {order_id} is not awaiting a decision: it was {state}", EXIT_NOT_AWAITING)


def _result_of(record: dict[str, Any], message: str | None = None) -> DecisionResult:
    if message is None:
        message = f"{ACTION_DONE[record['action']]} (already recorded, audit seq {record['seq']})"
    return DecisionResult(order_id=record["order_id"], action=record["action"], by=record["by"], note=record["note"],
                          decided_at=record["decided_at"], request=record["request"], seq=record["seq"],
                          message=message, result=record.get("result"), result_sha256=record.get("result_sha256"),
                          status=record.get("status"))


def _stranger(target: str) -> DecisionError:
    return DecisionError(f"{target} is already there, a file the audit log does not account for; it is kept as it is "
                         "and nothing was decided — move it out of the lab's folders (keep it elsewhere) and decide "
                         "again", EXIT_MISMATCH)
