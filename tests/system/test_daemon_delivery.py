"""Orders arriving every way a practice sends them reach the outbox exactly once, whole."""
from __future__ import annotations

import json
import os
import time

import pytest

from lenslane.audit.log import iter_records
from tests.system.driver import (
    FAST_WATCH, Watch, assert_exactly_once, count, drop, make_lab, names, order, sha256_of, wait_until,
    write_backlog,
)

pytestmark = pytest.mark.slow


def test_files_present_at_start_and_renamed_in_are_each_published_once(tmp_path):
    lab = make_lab(tmp_path / "lab")
    sent = write_backlog(lab, 50)
    hidden = {".late.json.tmp": "late.json", "upload.json.part": "upload.json"}
    for temp_name, final in hidden.items():
        data = order(f"TMP-{final[:-5].upper()}")
        (lab / "inbox" / temp_name).write_text(json.dumps(data))
        sent[final] = data
    watch = Watch(lab)
    for index in range(30):
        data = order(f"MV-{index:03d}")
        drop(lab, f"mv-{index:03d}.json", json.dumps(data).encode())
        sent[f"mv-{index:03d}.json"] = data
    wait_until(lambda: count(lab / "archive") == 80, "the backlog and the renamed files")
    assert set(hidden) <= set(names(lab / "inbox")), "temp names wait, untouched, until renamed"
    for temp_name, final in hidden.items():
        os.rename(lab / "inbox" / temp_name, lab / "inbox" / final)  # a rename inside the inbox
    wait_until(lambda: count(lab / "archive") == 82, "the files renamed from temp names")
    assert watch.stop() == 0
    assert_exactly_once(lab, sent)

    starting, chain, observer = watch.events("starting")[0], watch.events("chain")[0], watch.events("observer")[0]
    assert starting["lab"] == str(lab) and "quiet_seconds" in starting["watch"]
    assert chain["stages"][0] == "validate"
    assert observer["kind"] == "inotify"
    lines = watch.events("order")
    assert len(lines) == 82
    assert all(line["outcome"] == "published" and line["order_id"] and line["ms"] >= 0 for line in lines)


def test_slow_in_place_writers_are_taken_only_when_complete(tmp_path):
    lab = make_lab(tmp_path / "lab", {**FAST_WATCH, "young_seconds": 60.0})
    watch = Watch(lab)
    one_open = json.dumps(order("SLOW-1"), indent=1).encode()
    reopening = json.dumps(order("SLOW-2"), indent=1).encode()
    thirds = [len(one_open) // 3, 2 * len(one_open) // 3]
    with open(lab / "inbox" / "slow-one-open.json", "wb") as handle:
        for start, end in zip([0, *thirds], [*thirds, len(one_open)]):
            handle.write(one_open[start:end])
            handle.flush()
            os.fsync(handle.fileno())
            time.sleep(0.7)  # longer than the quiet time: the daemon sees a stable, partial file
    for start, end in zip([0, 100, 200], [100, 200, len(reopening)]):
        with open(lab / "inbox" / "slow-reopening.json", "ab") as handle:  # each close is a close-after-write
            handle.write(reopening[start:end])
        time.sleep(0.7)
    wait_until(lambda: count(lab / "archive") == 2, "both slow files")
    assert watch.stop() == 0
    assert names(lab / "rejected") == []
    assert_exactly_once(lab, {"slow-one-open.json": order("SLOW-1"), "slow-reopening.json": order("SLOW-2")})
    assert (lab / "archive" / "slow-one-open.json").read_bytes() == one_open


def test_a_burst_of_2000_renamed_files(tmp_path):
    lab = make_lab(tmp_path / "lab")
    watch = Watch(lab)
    sent = {}
    for index in range(2000):
        data = order(f"BURST-{index:05d}")
        name = f"burst-{index:05d}.json"
        drop(lab, name, json.dumps(data).encode())
        sent[name] = data
    wait_until(lambda: count(lab / "archive") == 2000, "the whole burst")
    assert watch.stop() == 0
    assert_exactly_once(lab, sent)
    assert len(watch.events("order")) == 2000


def test_the_same_order_again_is_skipped_and_a_different_one_under_its_id_is_held(tmp_path):
    lab = make_lab(tmp_path / "lab")
    first = order("DUP-1")
    watch = Watch(lab)
    drop(lab, "dup.json", json.dumps(first).encode())
    wait_until(lambda: count(lab / "archive") == 1, "the first copy")
    published = sha256_of([lab / "outbox" / "DUP-1.json"])
    drop(lab, "dup.json", json.dumps(first, indent=4).encode())  # same order, same name, other layout
    drop(lab, "dup-resent.json", json.dumps(first).encode())
    wait_until(lambda: count(lab / "archive") == 3, "the two resent copies")
    assert watch.stop() == 0

    changed = order("DUP-1", account="test-practice-2")
    watch = Watch(lab)  # a restart: the engine knows what was published from the audit log alone
    drop(lab, "dup-changed.json", json.dumps(changed).encode())
    wait_until(lambda: (lab / "held" / "dup-changed.json.held.json").exists(), "the changed copy to be held")
    assert watch.stop() == 0

    assert names(lab / "outbox") == ["DUP-1.json"]
    assert sha256_of([lab / "outbox" / "DUP-1.json"]) == published
    archived = names(lab / "archive")
    assert len(archived) == 3 and "dup.json" in archived and "dup-resent.json" in archived
    assert json.loads((lab / "held" / "dup-changed.json").read_bytes()) == changed
    report = json.loads((lab / "held" / "dup-changed.json.held.json").read_bytes())
    assert report["order_id"] == "DUP-1" and "different content" in report["reasons"][0]["message"]
    events = [(r["event"], r["received"]["file"]) for r in iter_records(lab)
              if r.get("event") in ("published", "skipped", "held")]
    assert sorted(events) == sorted([("published", "dup.json"), ("skipped", "dup.json"),
                                     ("skipped", "dup-resent.json"), ("held", "dup-changed.json")])


def test_the_polling_observer_by_config(tmp_path):
    lab = make_lab(tmp_path / "lab", {**FAST_WATCH, "observer": "polling"})
    watch = Watch(lab)
    assert watch.events("observer")[0]["kind"] == "polling"
    sent = {}
    for index in range(5):
        sent[f"p-{index}.json"] = order(f"POLL-{index}")
        drop(lab, f"p-{index}.json", json.dumps(sent[f"p-{index}.json"]).encode())
    wait_until(lambda: count(lab / "archive") == 5, "the files under the polling observer")
    assert watch.stop() == 0
    assert_exactly_once(lab, sent)
