"""An event encoded ahead (in the helper process) is written exactly as the event itself would be."""
from __future__ import annotations

import json

from lenslane.audit.log import AuditLog, encode_event, record_hash, verify

EVENT = {"event": "change", "order_id": "TST-1", "stage": "tilt", "field": "lenses.right.surfacing",
         "before": {"sphere": -4.25, "cylinder": -1.25, "axis": 170},
         "after": {"sphere": -4.2, "cylinder": -1.12, "axis": 173},
         # Content that looks like a placeholder must stay content.
         "reason": "a text with \u0000seq, \u0000ts and \u0000prev in it", "method": "m", "source": "s",
         "inputs": {"index": 1.586, "angles": [9.0, 6.0]}}


def test_an_encoded_event_gives_the_same_record_and_hash(tmp_path):
    log = AuditLog(tmp_path / "audit.jsonl")
    log.append([EVENT, encode_event(EVENT), EVENT])
    first, second, third = (json.loads(line) for line in (tmp_path / "audit.jsonl").read_text().splitlines())
    assert {k: v for k, v in second.items() if k not in ("seq", "prev", "hash")} == \
           {k: v for k, v in first.items() if k not in ("seq", "prev", "hash")}
    assert second["seq"] == 2 and second["prev"] == first["hash"] and third["prev"] == second["hash"]
    assert all(record_hash(r) == r["hash"] for r in (first, second, third))
    assert second["reason"] == EVENT["reason"]


def test_a_log_of_encoded_events_verifies(tmp_path):
    (tmp_path / "outbox").mkdir()
    AuditLog(tmp_path / "audit.jsonl").append([encode_event(EVENT) for _ in range(5)])
    assert verify(tmp_path).ok
