"""``lenslane queue``: review results with their flags, held versions with their differences, oldest first."""
from __future__ import annotations

import json
import os
import time

from lenslane.cli import main
from lenslane.decide import queue
from lenslane.decide.listing import age_text, differences, render
from tests.decide.helpers import ready_order, review_order


def test_a_review_result_waits_in_review_never_in_outbox(make_lab, drop):
    lab = make_lab()
    drop(lab, review_order("RV-0001"))
    drop(lab, ready_order("OK-0001"))
    lab.drain()
    assert os.listdir(lab.root / "outbox") == ["OK-0001.json"]
    assert os.listdir(lab.root / "review") == ["RV-0001.json"]
    result = json.loads((lab.root / "review" / "RV-0001.json").read_bytes())
    assert result["status"] == "review"


def test_the_queue_lists_review_and_held_orders_oldest_first(make_lab, drop):
    lab = make_lab()
    drop(lab, ready_order("OK-0001"))
    lab.drain()
    changed = ready_order("OK-0001", sphere=-1.50)
    changed["fit"]["left"]["pd_mm"] = 31.0
    changed["lens"]["front_curve_d"] = 4.0
    drop(lab, changed, "OK-0001-corrected.json")
    lab.drain()
    drop(lab, review_order("RV-0001"))
    lab.drain()
    # The held version waited first: an hour ago; the review result since now.
    hour_ago = time.time() - 3600
    os.utime(lab.root / "held" / "OK-0001-corrected.json.held.json", (hour_ago, hour_ago))

    items = queue(lab.root)
    assert [(i.kind, i.order_id) for i in items] == [("held", "OK-0001"), ("review", "RV-0001")]
    held, review = items
    assert held.path == "held/OK-0001-corrected.json" and held.compared_with == "outbox/OK-0001.json"
    assert held.actions == ("replace", "discard") and 3599 < held.age_seconds < 3700
    assert held.differences == [
        {"field": "rx.right.sphere", "published": -1.0, "held": -1.5},
        {"field": "lens.front_curve_d", "published": "(absent)", "held": 4.0},
        {"field": "fit.left.pd_mm", "published": 32.0, "held": 31.0},
    ]
    assert held.reason.startswith("order OK-0001 was already published (outbox/OK-0001.json) with different content")
    assert "\n  why: order OK-0001 was already published" in render(items)  # the held report's own words
    assert review.path == "review/RV-0001.json" and review.actions == ("approve", "refuse")
    assert any(f["code"] == "fitting-height-low" and f["level"] == "review" and f["eye"] == "right"
               for f in review.flags)


def test_the_queue_command_prints_text_and_json(make_lab, drop, capsys):
    lab = make_lab()
    assert main(["queue", str(lab.root)]) == 0
    assert "nothing waits for a person" in capsys.readouterr().out
    drop(lab, review_order("RV-0001"))
    lab.drain()
    assert main(["queue", str(lab.root)]) == 0
    out = capsys.readouterr().out
    assert "RV-0001  in review — review/RV-0001.json, waiting" in out
    assert "[review] fitting-height-low (right eye)" in out and "decide: approve" in out and "licensed" in out
    assert main(["queue", str(lab.root), "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert [item["order_id"] for item in data["waiting"]] == ["RV-0001"] and "licensed" in data["caution"]
    assert main(["queue", str(lab.root / "nowhere")]) == 2  # not a lab folder: a mistake in the command
    assert "nowhere is not a lab folder" in capsys.readouterr().err


def test_differences_name_every_field_that_differs():
    published = {"rx": {"right": {"sphere": -1.0, "prism": [{"amount": 1.0, "base": "in"}]}}, "account": "a"}
    held = {"rx": {"right": {"sphere": -1.0, "prism": [{"amount": 1.5, "base": "in"}, {"amount": 0.5, "base": "up"}]}},
            "account": "a"}
    assert differences(published, held) == [
        {"field": "rx.right.prism[0].amount", "published": 1.0, "held": 1.5},
        {"field": "rx.right.prism[1].amount", "published": "(absent)", "held": 0.5},
        {"field": "rx.right.prism[1].base", "published": "(absent)", "held": "up"},
    ]
    assert differences(held, held) == []


def test_ages_read_as_a_person_says_them():
    assert [age_text(s) for s in (5, 125, 3 * 3600 + 5 * 60, 2 * 86400 + 4 * 3600)] == \
        ["5 s", "2 min", "3 h 05 min", "2 d 04 h"]


def test_the_queue_is_read_while_decisions_move_its_files(make_lab, drop):
    """The web page lists the queue while the engine applies decisions: a file taken away between the moments the
    listing reads it is left out of that listing, never an error. Here a person moves the results in and out."""
    import threading

    lab = make_lab()
    drop(lab, ready_order("OK-0001"))
    lab.drain()
    drop(lab, ready_order("OK-0001", sphere=-1.50), "OK-0001-corrected.json")
    drop(lab, review_order("RV-0001"))
    lab.drain()
    moving = [lab.root / "review" / "RV-0001.json", lab.root / "held" / "OK-0001-corrected.json.held.json"]
    stop = threading.Event()

    def move_back_and_forth() -> None:
        while not stop.is_set():
            for path in moving:
                path.rename(lab.root / path.name)
                (lab.root / path.name).rename(path)

    mover = threading.Thread(target=move_back_and_forth)
    mover.start()
    try:
        seen = set()
        for _ in range(3000):
            seen.update(item.kind for item in queue(lab.root))
    finally:
        stop.set()
        mover.join()
    assert seen == {"review", "held"}  # both listed when they were there
