"""The audit index: derived from the log, rebuilt from it, caught up at start; the lab's history through it."""
from __future__ import annotations

import contextlib
import copy
import json
import shutil

from lenslane.audit.index import INDEX_NAME, Index
from lenslane.cli import main
from lenslane.lab.folder import Lab
from tests.system.driver import read_only


def snapshot(root):
    with contextlib.closing(Index(root)) as index:
        return index.snapshot()


def busy_rotating_lab(make_lab, drop, order_dict):
    lab = make_lab({"audit": {"rotate_bytes": 2000}})
    for number in range(1, 7):
        order = copy.deepcopy(order_dict)
        order["order_id"] = f"IDX-{number:04d}"
        order["rx"]["right"]["sphere"] = -1.0 - number / 4
        drop(lab, order)
    drop(lab, {"format": "lens-order/1", "order_id": "IDX-BAD", "account": "test-practice"}, "idx-bad.json")
    lab.drain()
    return lab


def test_the_index_rebuilt_from_the_log_equals_the_live_one(make_lab, drop, order_dict, capsys):
    lab = busy_rotating_lab(make_lab, drop, order_dict)
    assert len(list(lab.root.glob("audit-*.jsonl"))) >= 2  # the live index followed rotations
    live = snapshot(lab.root)
    assert len(live["records"]) == sum(1 for _ in open(lab.root / "audit.jsonl")) + sum(
        sum(1 for _ in open(p)) for p in lab.root.glob("audit-*.jsonl"))
    assert main(["audit", "reindex", str(lab.root)]) == 0
    assert "audit index rebuilt from the log" in capsys.readouterr().out
    assert snapshot(lab.root) == live


def test_a_deleted_or_damaged_index_is_rebuilt_when_the_engine_starts(make_lab, drop, order_dict):
    lab = busy_rotating_lab(make_lab, drop, order_dict)
    live = snapshot(lab.root)
    lab.audit.index.close()  # the engine has stopped
    for damage in ("delete", "garbage", "truncate"):
        path = lab.root / INDEX_NAME
        if damage == "delete":
            path.unlink()
        elif damage == "garbage":
            path.write_bytes(b"this is not an SQLite file" * 100)
        else:
            path.write_bytes(path.read_bytes()[:1000])
        # The rebuilt index knows what was published: a resend of the same order is not published again.
        resent = copy.deepcopy(order_dict)
        resent["order_id"] = "IDX-0002"
        resent["rx"]["right"]["sphere"] = -1.5
        (lab.inbox / f"resend-{damage}.json").write_text(json.dumps(resent, indent=1), encoding="utf-8")
        restarted = Lab(lab.root, lab.host)
        [done] = restarted.drain()
        assert restarted.audit.index_state == "rebuilt", damage
        assert done.outcome == "skipped"
        restarted.audit.index.close()
        after = snapshot(lab.root)
        assert len(after["records"]) == len(live["records"]) + 1
        with contextlib.closing(Index(lab.root)) as index:
            index.rebuild()
        assert snapshot(lab.root) == after
        live = after


def test_an_index_behind_the_log_catches_up_at_start(make_lab, drop, order_dict):
    lab = busy_rotating_lab(make_lab, drop, order_dict)
    lab.audit.close()  # its journal goes into the file
    saved = lab.root / "saved.sqlite"
    shutil.copy(lab.root / INDEX_NAME, saved)
    order = copy.deepcopy(order_dict)
    order["order_id"] = "IDX-0100"
    drop(lab, order)
    lab.drain()
    lab.audit.close()  # the engine stopped (its index's last commit is lost just below)
    live = snapshot(lab.root)
    for suffix in ("-wal", "-shm"):
        (lab.root / f"{INDEX_NAME}{suffix}").unlink(missing_ok=True)
    shutil.copy(saved, lab.root / INDEX_NAME)  # as if the index's last commit was lost in a crash
    restarted = Lab(lab.root, lab.host)
    restarted.recover()
    assert restarted.audit.index_state == "caught up"
    assert snapshot(lab.root) == live


def test_history_answers_the_lab_from_the_index(make_lab, drop, order_dict):
    lab = busy_rotating_lab(make_lab, drop, order_dict)
    lab.recover()
    history = lab.history
    assert history.is_published("IDX-0003") and not history.is_published("IDX-BAD")
    published = [json.loads(line) for path in sorted(lab.root.glob("audit*.jsonl"))
                 for line in path.read_bytes().splitlines() if b'"order_id":"IDX-0003"' in line]
    assert history.published_content("IDX-0003") == published[-1]["content_sha256"]
    claim = published[-1]["received"]["claim"]
    assert history.final_record(claim).seq == published[-1]["seq"]  # the lab's FinalRecord
    assert history.final_record("0:0") is None


def test_a_reader_who_may_not_write_the_lab_reads_its_index_and_never_removes_it(busy_lab, capsys):
    root = busy_lab.root
    before = snapshot(root)
    journal = [path for path in (root / f"{INDEX_NAME}-wal", root / f"{INDEX_NAME}-shm") if path.exists()]
    with read_only(root / INDEX_NAME, *journal, root):
        assert main(["explain", str(root), "TST-0003"]) == 0
        assert "TST-0003" in capsys.readouterr().out
        assert main(["audit", "verify", str(root), "--full"]) == 0
        assert capsys.readouterr().out.startswith("audit log intact")
        assert (root / INDEX_NAME).exists()
    assert snapshot(root) == before  # the index is there, unchanged


def test_a_story_whose_define_records_were_removed_is_refused_in_one_line(make_lab, drop, order_dict, capsys):
    # The oldest audit file removed: the later records still refer to the defines it held. explain says so and
    # where to look, exit 1, not a traceback.
    lab = busy_rotating_lab(make_lab, drop, order_dict)
    first = sorted(lab.root.glob("audit-*.jsonl"))[0]
    first.unlink()
    assert main(["audit", "reindex", str(lab.root)]) == 0
    capsys.readouterr()
    assert main(["explain", str(lab.root), "IDX-0006"]) == 1
    err = capsys.readouterr().err
    assert err.startswith("lenslane: a record refers to define ") and "which the audit log does not hold" in err
    assert "`lenslane audit verify --full` tells which" in err
