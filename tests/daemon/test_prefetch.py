"""Computing ahead on the second core changes nothing in what is published, and dies with the engine."""
from __future__ import annotations

import json
import os
import signal
from pathlib import Path

import pytest

from engine.config import load_config
from engine.host import start_host
from engine.inbox import Lab
from tests.daemon.driver import (
    Watch, assert_exactly_once, count, drop, make_lab, order_bytes, run_once, sha256_of, wait_until, write_backlog,
)

pytestmark = pytest.mark.slow


def test_results_computed_ahead_are_the_bytes_the_engine_computes_itself(tmp_path):
    ahead, alone = make_lab(tmp_path / "ahead"), make_lab(tmp_path / "alone")
    for lab in (ahead, alone):
        write_backlog(lab, 300)
        drop(lab, "zz-bad.json", b'{"format": "lens-order/1"}')
        drop(lab, "zz-again.json", order_bytes("BK-00007", account="another-practice"))
    done = run_once(ahead, extra_args=["--stats"])
    assert done.returncode == 0, done.stderr
    stats = json.loads(done.stdout.strip().splitlines()[-2])
    assert stats["computed_ahead"] > 0  # the helper did compute some of the backlog

    Lab(alone, start_host(load_config(alone))).drain()  # one process, no helper
    published = sha256_of(ahead.glob("outbox/*.json"))
    assert published == sha256_of(alone.glob("outbox/*.json")) and len(published) == 300
    assert sorted(os.listdir(ahead / "rejected")) == sorted(os.listdir(alone / "rejected"))
    assert sorted(os.listdir(ahead / "held")) == sorted(os.listdir(alone / "held"))


def _processes_watching(lab: Path) -> list[int]:
    found = []
    for entry in os.listdir("/proc"):
        if entry.isdigit():
            try:
                command = Path(f"/proc/{entry}/cmdline").read_bytes()
            except OSError:
                continue
            if str(lab).encode() in command and b"watch" in command:
                found.append(int(entry))
    return found


def test_the_helper_does_not_outlive_a_killed_engine(tmp_path):
    lab = make_lab(tmp_path / "lab")
    sent = write_backlog(lab, 400)
    watch = Watch(lab, ready=False)
    wait_until(lambda: count(lab / "archive") >= 40, "some of the backlog", every=0.002)
    assert watch.kill() == -signal.SIGKILL
    wait_until(lambda: not _processes_watching(lab), "the helper process to end after its engine", timeout=10)
    done = run_once(lab)  # the lab's lock is free: the helper never held it
    assert done.returncode == 0, done.stderr
    assert_exactly_once(lab, sent)
