"""Killed at any instant, restarted: every order exactly once, no temp files, no half-written result."""
from __future__ import annotations

import json
import signal

import pytest

from lenslane.audit.log import iter_records
from lenslane.lab.folder import STEPS
from tests.system.crashing import CRASH_EXIT_CODE
from tests.system.driver import (
    Watch, assert_exactly_once, count, drop, make_lab, names, order, order_bytes, run_crashing, run_once, sha256_of,
    temp_leftovers, wait_until, write_backlog,
)

pytestmark = pytest.mark.slow


def test_kill_9_at_three_points_of_a_backlog_then_once(tmp_path):
    lab = make_lab(tmp_path / "lab")
    total = 600
    sent = write_backlog(lab, total)
    for fraction in (0.05, 0.40, 0.75):
        watch = Watch(lab, ready=False)
        wait_until(lambda: count(lab / "archive") >= fraction * total, f"{fraction:.0%} of the backlog", every=0.002)
        assert watch.kill() == -signal.SIGKILL
    left = total - count(lab / "archive")
    done = run_once(lab)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip().splitlines()[-1].startswith(f"{left} orders: {left} published")
    assert_exactly_once(lab, sent)


@pytest.mark.parametrize("step", STEPS)
def test_a_crash_right_after_each_step_is_finished_once_at_restart(tmp_path, step):
    lab = make_lab(tmp_path / "lab")
    sent = write_backlog(lab, 6)
    # The third order of the batch; "audited" is reached once per group commit, so its first time.
    crashed = run_crashing(lab, f"{step}:1" if step == "audited" else f"{step}:3")
    assert crashed.returncode == CRASH_EXIT_CODE
    results_before = sha256_of((lab / "outbox").glob("*.json"))
    left = 6 - count(lab / "archive")
    # Group commit: the orders of the batch that crashed are still claimed, none is lost or half-done.
    waiting = [n for n in names(lab / "inbox") if n.endswith(".json")]
    assert names(lab / "work") and len(names(lab / "work")) + len(waiting) == left

    done = run_once(lab)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip().splitlines()[-1].startswith(f"{left} orders: {left} published")
    assert_exactly_once(lab, sent)
    results_after = sha256_of((lab / "outbox").glob("*.json"))
    assert {k: results_after[k] for k in results_before} == results_before  # a redo writes the same bytes


@pytest.mark.parametrize("step", ["claimed", "published", "audited"])
def test_a_crash_while_rejecting_is_finished_once_at_restart(tmp_path, step):
    lab = make_lab(tmp_path / "lab")
    drop(lab, "a-bad.json", b'{"format": "lens-order/1", "order_id": "BAD-1", "account": NaN}')
    sent = {"b-good.json": order("GOOD-1")}
    drop(lab, "b-good.json", json.dumps(sent["b-good.json"]).encode())
    crashed = run_crashing(lab, step)
    assert crashed.returncode == CRASH_EXIT_CODE
    assert run_once(lab).returncode == 0
    assert names(lab / "rejected") == ["a-bad.json", "a-bad.json.errors.json"]
    rejected = [r for r in iter_records(lab) if r.get("event") == "rejected"]
    assert [r["received"]["file"] for r in rejected] == ["a-bad.json"]
    assert names(lab / "archive") == ["b-good.json"] and names(lab / "work") == [] and temp_leftovers(lab) == []


@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGINT])
def test_a_stop_signal_finishes_the_current_order_and_exits_0(tmp_path, sig):
    lab = make_lab(tmp_path / "lab")
    total = 300
    sent = write_backlog(lab, total)
    watch = Watch(lab, ready=False)
    wait_until(lambda: count(lab / "archive") >= 20, "some of the backlog", every=0.002)
    assert watch.stop(sig) == 0
    assert names(lab / "work") == []
    assert temp_leftovers(lab) == []
    finished = set(names(lab / "archive"))
    waiting = {n for n in names(lab / "inbox") if n.endswith(".json")}
    assert finished | waiting == set(sent) and not finished & waiting
    assert len(names(lab / "outbox")) == len(finished)
    assert watch.events("stopping")[0]["signal"] == signal.Signals(sig).name
    assert run_once(lab).returncode == 0
    assert_exactly_once(lab, sent)


def test_a_second_watch_on_the_same_lab_is_refused_and_kill_9_frees_the_lock(tmp_path):
    lab = make_lab(tmp_path / "lab")
    first = Watch(lab)
    second = Watch(lab, ready=False)
    assert second.wait() == 3
    assert second.events("lab locked")[0]["holder_pid"] == str(first.process.pid)
    refused = run_once(lab)
    assert refused.returncode == 3 and "lab locked" in refused.stderr
    assert first.kill() == -signal.SIGKILL
    drop(lab, "after.json", order_bytes("AFTER-1"))
    done = run_once(lab)
    assert done.returncode == 0, done.stderr
    assert_exactly_once(lab, {"after.json": order("AFTER-1")})
