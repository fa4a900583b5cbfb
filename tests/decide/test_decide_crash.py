"""A decision killed at any step is applied once or not at all: real processes, SIGKILL and abrupt exits."""
from __future__ import annotations

import hashlib
import os
import random
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from lenslane.audit.log import verify
from lenslane.lab.folder import DECISION_STEPS
from tests.conftest import REPO
from tests.system.crashing import CRASH_EXIT_CODE
from tests.decide.helpers import config_text, load, ready_order, records, review_order
from tests.system.driver import WAIT_SECONDS, Watch, environment, make_lab as make_lab_folder, drop


def lenslane(*args: str, env: dict[str, str] | None = None, crash_after: str | None = None
             ) -> subprocess.CompletedProcess:
    """A lenslane command; with ``crash_after`` it ends abruptly right after that step (tests/system/crashing.py)."""
    command = ["-m", "tests.system.crashing", "--command", crash_after] if crash_after else ["-m", "lenslane.cli"]
    return subprocess.run([sys.executable, *command, *args], capture_output=True, text=True, cwd=REPO,
                          env=environment(env), timeout=WAIT_SECONDS)


def start_lenslane(*args: str, env: dict[str, str] | None = None) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-m", "lenslane.cli", *args], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, cwd=REPO, env=environment(env))


def sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def prepared_lab(tmp_path: Path) -> Path:
    """RV-0001 in review/, OK-0001 published with a corrected version held: made by a real engine."""
    lab = make_lab_folder(tmp_path / "lab")
    import json

    drop(lab, "RV-0001.json", json.dumps(review_order("RV-0001")).encode())
    drop(lab, "OK-0001.json", json.dumps(ready_order("OK-0001")).encode())
    assert lenslane("watch", str(lab), "--once").returncode == 0
    drop(lab, "OK-0001-corrected.json", json.dumps(ready_order("OK-0001", sphere=-1.5)).encode())
    assert lenslane("watch", str(lab), "--once").returncode == 0
    assert (lab / "review" / "RV-0001.json").exists() and (lab / "held" / "OK-0001-corrected.json").exists()
    return lab


DECISIONS = {"approve": "RV-0001", "refuse": "RV-0001", "replace": "OK-0001", "discard": "OK-0001"}


def snapshot(lab: Path) -> dict[str, str]:
    return {f"{folder}/{name}": sha256(lab / folder / name) for folder in ("outbox", "review", "rejected", "held")
            for name in sorted(os.listdir(lab / folder))}


def assert_applied_once(lab: Path, action: str, before: dict[str, str]) -> None:
    """The lab is in the state of the decision applied exactly once, and the log accounts for it."""
    order_id = DECISIONS[action]
    (decided,) = records(lab, "decided", order_id)
    assert decided["action"] == action
    if action == "approve":
        assert not (lab / "review" / "RV-0001.json").exists()
        result = load(lab / "outbox" / "RV-0001.json")
        assert result["status"] == "ready" and result["approved"]["by"] == "tech-07"
    elif action == "refuse":
        assert not (lab / "review" / "RV-0001.json").exists() and not (lab / "outbox" / "RV-0001.json").exists()
        assert sha256(lab / "rejected" / "RV-0001.json") == before["review/RV-0001.json"]
    elif action == "replace":
        assert load(lab / "outbox" / "OK-0001.json")["revision"] == 2
        assert sha256(lab / "archive" / "OK-0001.r1.json") == before["outbox/OK-0001.json"]
        assert len(records(lab, "published", "OK-0001")) == 2
    else:
        assert sha256(lab / "outbox" / "OK-0001.json") == before["outbox/OK-0001.json"]
    if action in ("replace", "discard"):
        assert os.listdir(lab / "held") == [] and (lab / "archive" / "OK-0001-corrected.json").exists()
    assert not [n for n in os.listdir(lab / "decisions") if not n.endswith(".answer.json")]
    report = verify(lab)
    assert report.ok, report.summary()


@pytest.mark.parametrize("step", DECISION_STEPS)
@pytest.mark.parametrize("action", list(DECISIONS))
def test_a_decision_cut_short_at_any_step_is_finished_once_by_the_next_engine(tmp_path, action, step):
    lab = prepared_lab(tmp_path)
    before = snapshot(lab)
    crashed = lenslane("decide", str(lab), DECISIONS[action], action, "--by", "tech-07", "--note", "checked",
                       crash_after=step)
    assert crashed.returncode == CRASH_EXIT_CODE, crashed.stderr
    assert len(records(lab, "decided")) == (0 if step == "decision-written" else 1)
    assert lenslane("watch", str(lab), "--once").returncode == 0  # the next holder of the lock finishes it
    assert_applied_once(lab, action, before)
    again = lenslane("decide", str(lab), DECISIONS[action], action, "--by", "tech-09", "--note", "again")
    assert again.returncode == 5 and f"already decided — {action} by tech-07" in again.stderr
    assert len(records(lab, "decided")) == 1


def test_a_decision_killed_at_random_instants_is_applied_once_or_not_at_all(tmp_path):
    lab = prepared_lab(tmp_path)
    before = snapshot(lab)
    rng = random.Random(14)
    applied = 0
    # One instant in each tenth of a second over the command's life: before the request is written (python
    # starting), while it is applied, after it is answered.
    instants = [rng.uniform(tenth / 10, (tenth + 1) / 10) for tenth in range(9)]
    for attempt, instant in enumerate(instants):
        lab_copy = tmp_path / f"copy-{attempt}"
        subprocess.run(["cp", "-a", str(lab), str(lab_copy)], check=True)
        action = rng.choice(list(DECISIONS))
        process = start_lenslane("decide", str(lab_copy), DECISIONS[action], action, "--by", "tech-07", "--note", "ok")
        time.sleep(instant)
        process.send_signal(signal.SIGKILL)
        process.wait()
        assert lenslane("watch", str(lab_copy), "--once").returncode == 0
        if records(lab_copy, "decided"):
            applied += 1
            assert_applied_once(lab_copy, action, before)
        else:  # not at all: every file as it was, nothing waiting
            assert snapshot(lab_copy) == before
            assert not [n for n in os.listdir(lab_copy / "decisions") if not n.startswith(".")]
            assert verify(lab_copy).ok
    print(f"{applied} of {len(instants)} killed decisions were applied, the others not at all")


def test_a_decision_goes_through_the_running_engine(tmp_path):
    lab = prepared_lab(tmp_path)
    before = snapshot(lab)
    watch = Watch(lab)
    try:
        done = lenslane("decide", str(lab), "RV-0001", "approve", "--by", "tech-07", "--note", "checked")
        assert done.returncode == 0, done.stderr
        line = watch.wait_for("decision")
        assert line["order_id"] == "RV-0001" and line["by"] == "tech-07"  # the engine applied it, the one writer
        assert_applied_once(lab, "approve", before)
        refused = lenslane("decide", str(lab), "RV-0001", "approve", "--by", "tech-09", "--note", "again")
        assert refused.returncode == 5 and "already decided" in refused.stderr
    finally:
        assert watch.stop() == 0


def test_the_running_engine_is_woken_for_a_decision_between_its_rescans(tmp_path):
    """The engine looks at decisions/ at every rescan; here rescans are an hour apart, so only the wake-up
    (SIGUSR1) that lenslane decide sends can bring the decision to it within the command's wait."""
    lab = prepared_lab(tmp_path)
    (lab / "lenslane.toml").write_text(config_text(rescan_seconds=3600.0))
    watch = Watch(lab)
    try:
        done = lenslane("decide", str(lab), "RV-0001", "approve", "--by", "tech-07", "--note", "checked", "--wait",
                        "20")
        assert done.returncode == 0, done.stderr
        assert watch.wait_for("decision")["order_id"] == "RV-0001"
    finally:
        assert watch.stop() == 0


def test_an_engine_killed_while_applying_a_decision_leaves_it_to_the_waiting_command(tmp_path):
    lab = prepared_lab(tmp_path)
    before = snapshot(lab)
    watch = Watch(lab, crash_after="decision-recorded")  # the engine dies right after the record is on disk
    done = lenslane("decide", str(lab), "OK-0001", "replace", "--by", "tech-07", "--note", "corrected")
    assert watch.wait() == CRASH_EXIT_CODE
    assert done.returncode == 0, done.stderr
    assert "already recorded" in done.stdout  # finished by the command itself once the lock was free
    assert_applied_once(lab, "replace", before)


def test_a_request_no_engine_takes_is_withdrawn(tmp_path):
    lab = prepared_lab(tmp_path)
    before = snapshot(lab)
    stopped = Watch(lab)
    stopped.process.send_signal(signal.SIGSTOP)  # holds the lock, takes nothing
    try:
        done = lenslane("decide", str(lab), "RV-0001", "approve", "--by", "tech-07", "--note", "ok", "--wait", "1")
        assert done.returncode == 7 and "withdrawn and nothing was decided" in done.stderr
    finally:
        stopped.process.send_signal(signal.SIGCONT)
        assert stopped.stop() == 0
    assert snapshot(lab) == before and records(lab, "decided") == []


def test_a_replacing_version_the_chain_refuses_leaves_the_published_result(tmp_path, fault_plugin):
    """The replace runs the chain under the order time limit, even with no engine running."""
    import json

    from tests.system.driver import FAST_WATCH, FAULT_CHAIN

    lab = make_lab_folder(tmp_path / "lab", {**FAST_WATCH, "order_time_limit_seconds": 1.0}, chain=FAULT_CHAIN)
    drop(lab, "OK-0001.json", json.dumps(ready_order("OK-0001")).encode())
    assert lenslane("watch", str(lab), "--once", env=fault_plugin).returncode == 0
    hanging = {**ready_order("OK-0001"), "wearer": {"ref": "HANG"}}
    drop(lab, "OK-0001-hang.json", json.dumps(hanging).encode())
    assert lenslane("watch", str(lab), "--once", env=fault_plugin).returncode == 0
    before = sha256(lab / "outbox" / "OK-0001.json")
    done = lenslane("decide", str(lab), "OK-0001", "replace", "--by", "tech-07", "--note", "new wearer ref",
                    env=fault_plugin)
    assert done.returncode == 0, done.stderr
    assert "refused by the chain" in done.stdout and "order time limit" in done.stdout
    assert sha256(lab / "outbox" / "OK-0001.json") == before
    assert (lab / "rejected" / "OK-0001-hang.json").exists() and os.listdir(lab / "held") == []
    (rejected,) = records(lab, "rejected", "OK-0001")
    assert rejected["revision"] == 2 and "order time limit" in rejected["reasons"][0]["message"]
    assert verify(lab).ok


def test_a_decide_that_holds_the_lock_is_not_woken_like_an_engine(tmp_path, fault_plugin):
    """With no engine running, a second `lenslane decide` waits for the first, which holds the lab's lock while a
    replace runs the chain: it must not send it the engine's wake-up (SIGUSR1 ends a process that has no handler
    for it). Both decisions are applied, each by a process that ends normally."""
    import json

    from tests.system.driver import FAST_WATCH, FAULT_CHAIN, wait_until

    lab = make_lab_folder(tmp_path / "lab", {**FAST_WATCH, "order_time_limit_seconds": 2.0}, chain=FAULT_CHAIN)
    drop(lab, "RV-0001.json", json.dumps(review_order("RV-0001")).encode())
    drop(lab, "OK-0001.json", json.dumps(ready_order("OK-0001")).encode())
    assert lenslane("watch", str(lab), "--once", env=fault_plugin).returncode == 0
    drop(lab, "OK-0001-hang.json", json.dumps({**ready_order("OK-0001"), "wearer": {"ref": "HANG"}}).encode())
    assert lenslane("watch", str(lab), "--once", env=fault_plugin).returncode == 0
    marker = tmp_path / "chain-running"
    first = start_lenslane("decide", str(lab), "OK-0001", "replace", "--by", "tech-07", "--note", "new wearer ref",
                           env={**fault_plugin, "LENSLANE_TEST_MARKER": str(marker)})
    try:
        wait_until(marker.exists, "the first decide to run the chain, holding the lab's lock")
        second = lenslane("decide", str(lab), "RV-0001", "approve", "--by", "tech-09", "--note", "ok",
                          env=fault_plugin)
    finally:
        out, err = first.communicate(timeout=WAIT_SECONDS)
    assert first.returncode == 0, err
    assert "refused by the chain" in out
    assert second.returncode == 0, second.stderr
    assert sorted(d["action"] for d in records(lab, "decided")) == ["approve", "replace"]
    assert verify(lab).ok


def test_a_lab_that_cannot_be_written_is_told_plainly(tmp_path):
    """A full disk (here: a file size limit of 0 bytes, which fails every write the same way): the request cannot
    even be written; the person is told so, with the folder, and nothing is decided."""
    import resource

    lab = prepared_lab(tmp_path)
    before = snapshot(lab)

    def no_room() -> None:
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)  # the write fails with EFBIG instead of ending the process
        resource.setrlimit(resource.RLIMIT_FSIZE, (0, 0))

    done = subprocess.run([sys.executable, "-m", "lenslane.cli", "decide", str(lab), "RV-0001", "approve", "--by",
                           "tech-07", "--note", "ok"], capture_output=True, text=True, cwd=REPO, env=environment(),
                          timeout=WAIT_SECONDS, preexec_fn=no_room)
    assert done.returncode == 1, done.stderr
    assert "Traceback" not in done.stderr
    assert f"cannot write the request in {lab / 'decisions'}" in done.stderr and "nothing was decided" in done.stderr
    assert snapshot(lab) == before and os.listdir(lab / "decisions") == [] and records(lab, "decided") == []
