"""The lab folder: claim, process, publish, archive or reject.

One order's life, in the order that makes a crash at any instant safe:

1. claim: atomic rename ``inbox/<name>`` → ``work/<name>``;
2. read, validate, run the chain (nothing written yet);
3. publish: the result to ``outbox/.<id>.json.tmp``, fsync, rename to
   ``outbox/<id>.json``, fsync the folder (or, for a rejected order, the
   ``rejected/<name>.errors.json`` the same way);
4. audit: the order's records appended to ``audit.jsonl`` and fsynced;
5. archive: rename ``work/<name>`` → ``archive/<name>`` (or ``rejected/<name>``).

A file still in ``work/`` at start was claimed but not finished: it is redone,
and because processing is deterministic the redo publishes the same bytes.
"""
from __future__ import annotations

import hashlib
import json
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from engine import __version__
from engine.audit import AUDIT_NAME, AuditLog
from engine.config import CONFIG_NAME, TEMPLATE, LabConfig
from engine.fsio import TEMP_SUFFIX, unique_path, write_durably
from engine.host import Host
from engine.intake import OrderRejected, read_order
from engine.models import ORDER_ID_RE
from engine.pipeline import Pipeline, StageFailure

FOLDERS = ("inbox", "outbox", "rejected", "archive", "work")


def init_lab(lab: Path) -> list[str]:
    """Make the lab folder; idempotent, never overwrites a config. Returns what it created."""
    created = []
    lab.mkdir(parents=True, exist_ok=True)
    for name in FOLDERS:
        folder = lab / name
        if not folder.is_dir():
            folder.mkdir()
            created.append(f"{name}/")
    audit = lab / AUDIT_NAME
    if not audit.exists():
        audit.touch()
        created.append(AUDIT_NAME)
    config = lab / CONFIG_NAME
    if not config.exists():
        config.write_text(TEMPLATE.read_text(encoding="utf-8"), encoding="utf-8")
        created.append(CONFIG_NAME)
    return created


def is_order_name(name: str) -> bool:
    """Only ``*.json`` files are orders; hidden, ``.tmp`` and ``.part`` names wait until renamed."""
    return name.endswith(".json") and not name.startswith(".") and not name.endswith((".tmp", ".part"))


@dataclass
class Processed:
    name: str
    outcome: str  # "published" | "rejected"
    order_id: str | None
    status: str | None = None
    reasons: list[dict[str, str]] | None = None


class Lab:
    """A lab folder with its engine: processes orders one at a time."""

    def __init__(self, root: Path, host: Host):
        self.root = Path(root)
        self.host = host
        self.config: LabConfig = host.config
        self.pipeline = Pipeline(host)
        for name in FOLDERS:
            setattr(self, name, self.root / name)
            (self.root / name).mkdir(exist_ok=True)
        self.audit = AuditLog(self.root / AUDIT_NAME)
        self.engine_fields = {"engine_version": __version__, "config_sha256": host.config_sha256}

    # -- discovery -----------------------------------------------------------

    def pending(self) -> list[str]:
        """Order names in the inbox, oldest name first."""
        try:
            names = os.listdir(self.inbox)
        except FileNotFoundError:
            return []
        return sorted(n for n in names if is_order_name(n))

    def recover(self) -> list[Processed]:
        """Redo orders claimed but not finished; clean leftover temp files (never published)."""
        for folder in (self.outbox, self.rejected, self.archive):
            for name in os.listdir(folder):
                if name.startswith(".") and name.endswith(TEMP_SUFFIX):
                    os.unlink(folder / name)
        return [self._process_claimed(name) for name in sorted(os.listdir(self.work)) if is_order_name(name)]

    # -- one order -----------------------------------------------------------

    def claim(self, name: str) -> bool:
        try:
            os.rename(self.inbox / name, self.work / name)
        except FileNotFoundError:
            return False  # gone meanwhile
        return True

    def process(self, name: str) -> Processed | None:
        if not self.claim(name):
            return None
        return self._process_claimed(name)

    def _process_claimed(self, name: str) -> Processed:
        path = self.work / name
        raw = path.read_bytes()
        received = {"event": "received", "file": name, "size": len(raw),
                    "sha256": hashlib.sha256(raw).hexdigest()}
        try:
            order, parsed = read_order(raw, self.host.settings.materials)
        except OrderRejected as exc:
            return self._reject(name, received, exc.problems)
        received["order_id"] = order.order_id
        try:
            outcome = self.pipeline.run(order, parsed)
        except StageFailure as exc:
            problems = [{"field": f"(stage {exc.stage})", "message": exc.message}]
            return self._reject(name, received, problems, order_id=order.order_id)
        return self._publish(name, received, outcome.result)

    def _publish(self, name: str, received: dict[str, Any], result: dict[str, Any]) -> Processed:
        order_id = result["order_id"]
        assert ORDER_ID_RE.match(order_id)  # validated by the contract; never a path
        data = json.dumps(result, ensure_ascii=False, indent=1).encode() + b"\n"
        write_durably(self.outbox / f"{order_id}.json", data)
        events = [received]
        events += [{"event": "change", "order_id": order_id, **change} for change in result["changes"]]
        events += [{"event": "flag", "order_id": order_id, **flag} for flag in result["flags"]]
        events.append({"event": "published", "order_id": order_id, "file": name, "status": result["status"],
                       "result": f"outbox/{order_id}.json",
                       "result_sha256": hashlib.sha256(data).hexdigest(),
                       "lenses": result["lenses"], **self.engine_fields})
        self.audit.append(events)
        os.rename(self.work / name, unique_path(self.archive, name))
        return Processed(name, "published", order_id, result["status"])

    def _reject(self, name: str, received: dict[str, Any], problems: list[dict[str, str]],
                order_id: str | None = None) -> Processed:
        report = {"file": name, "rejected": True, "problems": problems}
        write_durably(self.rejected / f"{name}.errors.json",
                      json.dumps(report, ensure_ascii=False, indent=1).encode() + b"\n")
        self.audit.append([received, {"event": "rejected", "order_id": order_id, "file": name,
                                      "reasons": problems, **self.engine_fields}])
        os.replace(self.work / name, self.rejected / name)
        return Processed(name, "rejected", order_id, reasons=problems)

    def drain(self) -> list[Processed]:
        """Process every order now in the inbox (and any left claimed by a crash)."""
        done = self.recover()
        for name in self.pending():
            processed = self.process(name)
            if processed is not None:
                done.append(processed)
        return done
