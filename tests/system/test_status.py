"""``lenslane status LAB``: what a lab sees at a glance, beside a running engine and after it stopped."""
from __future__ import annotations

import json
import os
import subprocess
import sys
import time

import pytest

from lenslane.audit.log import audit_files, iter_records
from tests.conftest import REPO
from tests.system.driver import Watch, count, drop, make_lab, order_bytes, read_only, wait_until

pytestmark = pytest.mark.slow


def status(lab, *args):
    done = subprocess.run([sys.executable, "-m", "lenslane.cli", "status", str(lab), *args], capture_output=True,
                          text=True, cwd=REPO, check=True)
    return json.loads(done.stdout) if "--json" in args else done.stdout


def test_status_beside_a_running_engine_and_after_it_stopped(tmp_path):
    lab = make_lab(tmp_path / "lab")
    watch = Watch(lab)
    for index in range(3):
        drop(lab, f"o-{index}.json", order_bytes(f"ST-{index}"))
    drop(lab, "bad.json", b"{")
    wait_until(lambda: count(lab / "archive") == 3 and count(lab / "rejected") == 2, "the orders")
    running = status(lab, "--json")
    assert running["engine"]["running"] is True and running["engine"]["pid"] == watch.process.pid
    assert running["engine"]["since"].endswith("Z") and running["engine"]["mode"] == "watch"
    assert running["folders"] == {"inbox": 0, "work": 0, "outbox": 3, "review": 0, "held": 0, "rejected": 1,
                                  "archive": 3, "decisions": 0}
    last = list(iter_records(lab))[-1]
    assert running["audit"]["last_record"]["seq"] == last["seq"]
    assert running["audit"]["last_record"]["file"] == last["received"]["file"]  # the input's name, as it arrived
    assert running["audit"]["bytes"] == sum(p.stat().st_size for p in audit_files(lab))
    assert running["not_taken"] == [] and running["oldest_waiting"] is None
    assert f"engine: running, pid {watch.process.pid}" in status(lab)
    assert watch.stop() == 0

    waiting = lab / "inbox" / "late.json"
    waiting.write_bytes(order_bytes("ST-LATE"))
    two_hours_ago = time.time() - 7200
    os.utime(waiting, (two_hours_ago, two_hours_ago))
    stopped = status(lab, "--json")
    assert stopped["engine"] == {"running": False, "pid": None, "since": None, "mode": None}
    assert stopped["folders"]["inbox"] == 1
    assert stopped["oldest_waiting"]["file"] == "late.json" and stopped["oldest_waiting"]["age_seconds"] >= 7200
    text = status(lab)
    assert "engine: not running" in text and "inbox/late.json, 2.0 h" in text


def test_status_shows_output_blocked_while_it_is_and_not_after(tmp_path):
    # The outbox made unwritable under a running engine: the order waits in work/, and status says the output is
    # blocked, where and why, until the folder is writable again; then the order is published and the line goes.
    lab = make_lab(tmp_path / "lab")
    watch = Watch(lab)
    try:
        with read_only(lab / "outbox"):
            drop(lab, "o-1.json", order_bytes("BL-1"))
            blocked = wait_until(lambda: status(lab, "--json")["output_blocked"], "the blocked output in status")
            assert blocked["step"] == "publish" and blocked["path"].startswith(str(lab / "outbox"))
            assert blocked["since"].endswith("Z") and blocked["error"]
            assert f"output blocked since {blocked['since']}: publish " in status(lab)
            assert count(lab / "outbox") == 0
        wait_until(lambda: (lab / "outbox" / "BL-1.json").exists(), "the order, published once the outbox is back")
        wait_until(lambda: status(lab, "--json")["output_blocked"] is None, "the blocked line gone")
        assert "output blocked" not in status(lab)
    finally:
        assert watch.stop() == 0
