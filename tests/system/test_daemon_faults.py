"""Faults around the daemon: a plugin that raises or hangs, a full or read-only outbox, a lost observer."""
from __future__ import annotations

import contextlib
import json
import os
import shutil
import subprocess

import pytest

from lenslane.audit.log import iter_records
from tests.system.driver import (
    FAST_WATCH, FAULT_CHAIN, Watch, assert_exactly_once, claimed, count, drop, make_lab, names, order, order_bytes,
    run_once, temp_leftovers, wait_until,
)

pytestmark = pytest.mark.slow


def _report(lab, name):
    return json.loads((lab / "rejected" / f"{name}.errors.json").read_bytes())


def test_a_raising_and_a_hanging_stage_fail_only_their_own_order(tmp_path, fault_plugin):
    lab = make_lab(tmp_path / "lab", {**FAST_WATCH, "order_time_limit_seconds": 1.0}, chain=FAULT_CHAIN)
    watch = Watch(lab, env=fault_plugin)
    assert watch.events("chain")[0]["stages"][-1] == "on_request"  # loaded through its entry point
    requests = {"raise.json": "RAISE", "hang.json": "HANG", "swallow.json": "SWALLOW"}
    for name, request in requests.items():
        drop(lab, name, order_bytes(f"FAULT-{request}", wearer={"ref": request}))
    sent = {f"fine-{i}.json": order(f"FINE-{i}") for i in range(3)}
    for name, data in sent.items():
        drop(lab, name, json.dumps(data).encode())
    wait_until(lambda: count(lab / "archive") == 3 and count(lab / "rejected") == 6, "the faulty and the fine orders")
    assert watch.stop() == 0

    [raised] = _report(lab, "raise.json")["problems"]
    assert raised == {"field": "(stage on_request)", "message": "RuntimeError: asked to fail by the test order"}
    [hung] = _report(lab, "hang.json")["problems"]
    assert hung["field"] == "(stage on_request)" and "order time limit of 1 s" in hung["message"]
    [stubborn] = _report(lab, "swallow.json")["problems"]
    assert "caught the time-limit exception" in stubborn["message"]
    assert "lenslane_fault_stages.run" in stubborn["message"]
    assert_exactly_once(lab, sent)


def test_a_stop_during_a_hanging_stage_leaves_the_order_claimed_for_the_next_start(tmp_path, fault_plugin):
    lab = make_lab(tmp_path / "lab", {**FAST_WATCH, "order_time_limit_seconds": 600.0}, chain=FAULT_CHAIN)
    marker = tmp_path / "stage-started"
    watch = Watch(lab, env={**fault_plugin, "LENSLANE_TEST_MARKER": str(marker)})
    drop(lab, "hang.json", order_bytes("HANG-1", wearer={"ref": "HANG"}))
    wait_until(marker.exists, "the stage to start hanging")
    assert watch.stop() == 0  # within the shutdown grace, not the ten-minute limit
    assert watch.events("interrupted")[0]["file"] == "hang.json"
    assert claimed(lab) == ["hang.json"]
    assert [r for r in iter_records(lab) if r.get("event") != "torn-line"] == []

    make_lab(lab, {**FAST_WATCH, "order_time_limit_seconds": 1.0}, chain=FAULT_CHAIN)
    done = run_once(lab, env=fault_plugin)
    assert done.returncode == 0, done.stderr
    assert "time limit" in _report(lab, "hang.json")["problems"][0]["message"]
    assert names(lab / "work") == []


@contextlib.contextmanager
def _small_file_system(folder, size="256k"):
    if os.geteuid() != 0 or shutil.which("mount") is None:
        pytest.skip("needs root to mount a small file system")
    done = subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size}", "tmpfs", str(folder)], capture_output=True)
    if done.returncode != 0:
        pytest.skip(f"cannot mount a tmpfs here: {done.stderr.decode().strip()}")
    try:
        yield folder
    finally:
        subprocess.run(["umount", "-l", str(folder)], check=False)


def _fill(folder):
    """Fill a file system to the last byte; returns the filler file."""
    filler = folder / "filler"
    with open(filler, "wb", buffering=0) as handle:
        with contextlib.suppress(OSError):
            while True:
                handle.write(b"\0" * 4096)
    return filler


def _blocked_then_published(lab, watch, unblock):
    drop(lab, "blocked.json", order_bytes("BLOCKED-1"))
    watch.wait_for("output blocked")
    assert claimed(lab) == ["blocked.json"] and names(lab / "archive") == []
    unblock()
    wait_until(lambda: count(lab / "archive") == 1, "the retry to succeed")
    assert watch.stop() == 0
    assert names(lab / "outbox") == ["BLOCKED-1.json"]
    assert temp_leftovers(lab) == []
    assert len([r for r in iter_records(lab) if r.get("event") == "published"]) == 1


def test_a_full_outbox_keeps_the_input_and_retries_until_there_is_room(tmp_path):
    lab = make_lab(tmp_path / "lab")
    with _small_file_system(lab / "outbox"):
        filler = _fill(lab / "outbox")
        watch = Watch(lab)
        _blocked_then_published(lab, watch, filler.unlink)
        blocked = watch.events("output blocked")[0]
        assert blocked["errno"] == "ENOSPC" and blocked["step"] == "publish"


def test_an_outbox_that_refuses_writes_keeps_the_input_and_retries(tmp_path):
    lab = make_lab(tmp_path / "lab")
    if os.geteuid() != 0 or shutil.which("chattr") is None:
        pytest.skip("needs root and chattr to make a folder refuse writes even to root")
    if subprocess.run(["chattr", "+i", str(lab / "outbox")], capture_output=True).returncode != 0:
        pytest.skip("this file system has no immutable attribute")
    try:
        watch = Watch(lab)
        _blocked_then_published(lab, watch, lambda: subprocess.run(["chattr", "-i", str(lab / "outbox")], check=True))
        assert watch.events("output blocked")[0]["errno"] == "EPERM"
    finally:
        subprocess.run(["chattr", "-i", str(lab / "outbox")], check=False)


def test_the_observer_is_rebuilt_when_the_inbox_is_replaced(tmp_path):
    lab = make_lab(tmp_path / "lab")
    watch = Watch(lab)
    os.rmdir(lab / "inbox")  # the watched folder goes away: its observer stops
    watch.wait_for("observer stopped")
    os.mkdir(lab / "inbox")
    watch.wait_for("observer rebuilt")
    drop(lab, "after.json", order_bytes("AFTER-1"))
    wait_until(lambda: count(lab / "archive") == 1, "an order in the new inbox")
    assert watch.stop() == 0
    assert_exactly_once(lab, {"after.json": order("AFTER-1")})


def test_the_daemon_exits_non_zero_when_the_observer_cannot_be_rebuilt(tmp_path):
    lab = make_lab(tmp_path / "lab")
    watch = Watch(lab)
    os.rmdir(lab / "inbox")
    assert watch.wait() == 1
    assert watch.events("observer cannot be rebuilt")


@pytest.mark.parametrize("file_size_limit, what", [(0, "lock file"), (4096, "audit log or work/")])
def test_a_lab_that_cannot_be_written_at_start_is_said_and_nothing_is_taken(tmp_path, file_size_limit, what):
    # A full disk, as the kernel's file-size limit makes one (EFBIG for every write past it): with no room for
    # the lock file's state, or for closing the audit log's torn last line, the engine says it cannot start,
    # exit 1 (the service manager starts it again), with no traceback, and the inbox is as it was.
    import resource
    import sys

    lab = make_lab(tmp_path / "lab")
    drop(lab, "first.json", order_bytes("FS-1"))
    assert run_once(lab).returncode == 0
    with open(lab / "audit.jsonl", "ab") as log:
        log.write(b'{"seq": 99, "torn')  # a crash cut the last line short: closing it needs a write
    drop(lab, "second.json", order_bytes("FS-2"))
    assert (lab / "audit.jsonl").stat().st_size > 4096
    done = subprocess.run([sys.executable, "-m", "lenslane.cli", "watch", str(lab), "--once"], capture_output=True,
                          text=True, timeout=60, preexec_fn=lambda: resource.setrlimit(
                              resource.RLIMIT_FSIZE, (file_size_limit, file_size_limit)))
    assert done.returncode == 1 and "Traceback" not in done.stderr
    [line] = [json.loads(text) for text in done.stderr.splitlines() if '"cannot start"' in text]
    assert line["message"].startswith(f"the lab's {what} cannot be written") and "File too large" in line["error"]
    assert os.listdir(lab / "inbox") == ["second.json"] and os.listdir(lab / "work") == []
