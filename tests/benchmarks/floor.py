"""The floor: only what any safe engine must do per order, nothing more.

Read and parse each order, write a small result through a temp file with fsync
and rename, append and fsync one audit line, archive the input.
"""
from __future__ import annotations

import json
import os
import sys
from pathlib import Path


def drain(lab: Path) -> int:
    inbox, outbox, archive = lab / "inbox", lab / "outbox", lab / "archive"
    for folder in (outbox, archive):
        folder.mkdir(exist_ok=True)
    count = 0
    audit = os.open(lab / "audit.jsonl", os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
    try:
        for name in sorted(os.listdir(inbox)):
            if not name.endswith(".json"):
                continue
            order = json.loads((inbox / name).read_bytes())
            result = json.dumps({"order_id": order["order_id"], "status": "ready"}).encode()
            temp = outbox / f".{order['order_id']}.json.tmp"
            fd = os.open(temp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o644)
            os.write(fd, result)
            os.fsync(fd)
            os.close(fd)
            os.rename(temp, outbox / f"{order['order_id']}.json")
            os.write(audit, json.dumps({"order_id": order["order_id"], "event": "published"}).encode() + b"\n")
            os.fsync(audit)
            os.rename(inbox / name, archive / name)
            count += 1
    finally:
        os.close(audit)
    return count


if __name__ == "__main__":
    print(drain(Path(sys.argv[1])))
