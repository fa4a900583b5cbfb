"""The queue page's counts and the search come from the audit index, not from reading the log from its start."""
from __future__ import annotations

import contextlib
import hashlib
import os
from datetime import date, timedelta

from lenslane.audit.index import Index
from lenslane.audit.records import AUDIT_NAME, received
from lenslane.audit.verify import verify
from lenslane.audit.writer import AuditLog
from lenslane.web.app import create_app
from lenslane.web.lab_view import counts_today, search

ORDERS = 20_000
BATCH = 64


def outcome(number: int) -> dict:
    """One pass as the lab records it (no story: the counts and the search read what arrived and the outcome)."""
    order_id, name = f"HX-{number:06d}", f"practice-{number % 7}-order-{number:06d}.json"
    digest = hashlib.sha256(name.encode()).hexdigest()
    event = {"event": "published", "order_id": order_id, "status": "review" if number % 10 == 0 else "ready",
             "received": received(name, 500, digest, "2026-12-01T00:00:00Z", f"{number}:1", {"order_id": order_id}),
             "result": f"outbox/{order_id}.json", "result_sha256": digest, "content_sha256": digest}
    if number % 25 == 0:
        event = {"event": "rejected", "order_id": None, "received": event["received"],
                 "reasons": [{"field": "lens.material", "message": "unknown material"}]}
    elif number % 40 == 1:
        event = dict(event, event="held", status=None)
    return event


def large_lab(tmp_path):
    """A lab whose log holds 20 000 passes (and a few decisions) in many rotated files, written by the engine's
    writer, with the index kept level as the engine keeps it."""
    root = tmp_path / "lab"
    root.mkdir()
    log = AuditLog(root / AUDIT_NAME, rotate_bytes=256 * 1024)
    for first in range(0, ORDERS, BATCH):
        log.append([outcome(n) for n in range(first, min(first + BATCH, ORDERS))])
    log.append([{"event": "decided", "order_id": "HX-000010", "action": "approve", "by": "QA-1", "note": "ok"},
                {"event": "decided", "order_id": "HX-000020", "action": "refuse", "by": "QA-1", "note": "no"}])
    log.close()
    return root


def expected_counts() -> dict[str, int]:
    events = [outcome(n) for n in range(ORDERS)]
    published = sum(e["event"] == "published" and e["status"] == "ready" for e in events)
    review = sum(e["event"] == "published" and e["status"] == "review" for e in events)
    rejected = sum(e["event"] == "rejected" for e in events)
    held = sum(e["event"] == "held" for e in events)
    return {"published": published + 1, "review": review, "rejected": rejected + 1, "held": held}


def test_counts_and_search_on_a_large_log_come_from_the_index(tmp_path):
    root = large_lab(tmp_path)
    rotated = sorted(root.glob("audit-*.jsonl"))
    assert len(rotated) >= 5
    # The files that hold all but the last records are moved out of the lab: whatever still answers, answers
    # from the index (the current file's last record shows the index level with the log).
    aside = tmp_path / "aside"
    aside.mkdir()
    for path in rotated:
        os.rename(path, aside / path.name)
    assert counts_today(root) == expected_counts()
    assert counts_today(root, date.today() + timedelta(days=1)) == {"published": 0, "review": 0, "rejected": 0,
                                                                     "held": 0}
    hits = search(root, "hx-000123")  # any case; in the oldest file
    assert [(h.order_id, h.file, h.outcome) for h in hits] == [("HX-000123", "practice-4-order-000123.json", "ready")]
    hits = search(root, "order-00012")  # part of a file name: the newest first, at most SEARCH_LIMIT
    assert [h.file for h in hits] == [f"practice-{n % 7}-order-{n:06d}.json" for n in range(129, 119, -1)]
    assert hits[-1].outcome == "review" and hits[4].outcome == "rejected"  # 120 and 125
    assert hits[4].link_id == "practice-6-order-000125"  # a refused input is found by its file
    assert len(search(root, "practice-3")) == 100
    assert search(root, "zz") == [] and search(root, "no such order") == []
    for path in aside.iterdir():
        os.rename(path, root / path.name)
    assert verify(root, full=True).ok  # nothing was written to the log


def test_a_short_search_text_must_be_a_whole_id_or_name(tmp_path):
    root = tmp_path / "lab"
    root.mkdir()
    with contextlib.closing(AuditLog(root / AUDIT_NAME)) as log:
        log.append([dict(outcome(1), order_id="A7"), dict(outcome(2), order_id="A77")])
    assert [h.order_id for h in search(root, "A7")] == ["A7"]
    assert [h.order_id for h in search(root, "A77")] == ["A77"]


def test_a_record_indexed_twice_counts_once(tmp_path):
    # A reader (the web page, explain) may catch the index up with the log while the engine is appending; the
    # engine's own indexing of the same records then adds nothing.
    root = tmp_path / "lab"
    root.mkdir()
    log = AuditLog(root / AUDIT_NAME)
    records = log.append([outcome(n) for n in range(3)])
    with contextlib.closing(Index(root)) as index:
        before = index.snapshot()
        placed = [(r, index.place(r["seq"]).file, index.place(r["seq"]).offset, index.place(r["seq"]).length)
                  for r in records]
        index.add(placed)
        assert index.snapshot() == before
    log.close()


def test_the_web_pages_show_the_index_answers(tmp_path):
    root = large_lab(tmp_path)
    web = create_app(root).test_client()
    page = web.get("/").get_data(as_text=True)
    assert f'<strong class="count-published">{expected_counts()["published"]}</strong> published' in page
    page = web.get("/search?q=order-019999").get_data(as_text=True)
    assert 'href="/orders/HX-019999"' in page and "practice-0-order-019999.json" in page
