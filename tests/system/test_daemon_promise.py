"""The drop folder's promise under resends, crashes, stuck entries and a replaced inbox, with real daemons.

Each input that enters the inbox is kept exactly once (in ``archive/``,
``rejected/`` or ``held/``), whatever the sender does and whenever the engine
is killed; a result already in ``outbox/`` never changes; one entry that cannot
be taken never stops the others.
"""
from __future__ import annotations

import hashlib
import json
import os
import random
import subprocess
import threading
import time
from pathlib import Path

import pytest

from lenslane.audit.log import iter_records, verify
from tests.system.crashing import CRASH_EXIT_CODE
from tests.system.driver import (
    FAST_WATCH, Watch, count, drop, make_lab, names, order_bytes, run_crashing, run_once, sha256_of,
    temp_leftovers, wait_until, write_backlog,
)

pytestmark = pytest.mark.slow

#: A defect that would make the engine wait for ever shows as a wait that gives up; still never a timed check.
GIVE_UP_SECONDS = 30.0
REPORT_SUFFIXES = (".errors.json", ".held.json")


def _digest(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def kept_inputs(lab: Path) -> list[str]:
    """The sha256 of every input the lab kept (archive/, rejected/ and held/, reports left out)."""
    kept = []
    for folder in ("archive", "rejected", "held"):
        for name in names(lab / folder):
            path = lab / folder / name
            if name.endswith(REPORT_SUFFIXES) or not path.is_file():
                continue
            kept.append(_digest(path.read_bytes()))
    return kept


def final_records(lab: Path) -> int:
    return sum(1 for r in iter_records(lab) if r.get("event") in ("published", "rejected", "held", "skipped"))


def assert_every_input_kept_once(lab: Path, sent: list[bytes]) -> None:
    """Every input sent is kept exactly once; each final record's ``input`` holds the bytes it received."""
    assert [n for n in names(lab / "inbox") if n.endswith(".json")] == []
    assert names(lab / "work") == []
    assert temp_leftovers(lab) == []
    assert sorted(kept_inputs(lab)) == sorted(_digest(data) for data in sent)
    for record in iter_records(lab):  # one record per pass: what arrived is in its final record
        if record.get("event") in ("published", "rejected", "held", "skipped"):
            assert _digest((lab / record["input"]).read_bytes()) == record["received"]["sha256"], record
    for name in names(lab / "outbox"):
        assert json.loads((lab / "outbox" / name).read_bytes())["order_id"] == name[:-len(".json")]
    report = verify(lab)
    assert report.ok, report.summary()


class Sender(threading.Thread):
    """A practice sending orders by rename, in rounds: a few new names, and one name it sends again and again.

    The name used again is sent as soon as the engine has taken the last copy
    (within ``patience`` seconds; else that round uses a new name): the copy
    before may still wait in ``work/`` for its group commit. Now and then a
    resent copy has the same order id with another account (held) or the very
    same bytes (skipped).
    """

    def __init__(self, lab: Path, rounds: int, seed: int, burst: int = 3, patience: float = 5.0, pause: float = 0.0):
        super().__init__(daemon=True)
        self.lab, self.rounds, self.rng, self.burst = lab, rounds, random.Random(seed), burst
        self.patience, self.pause = patience, pause
        self.sent: list[bytes] = []
        self.error: BaseException | None = None

    def run(self) -> None:
        try:
            for round_ in range(self.rounds):
                for index in range(self.burst):
                    self._send(f"s-{round_:04d}-{index}.json", order_bytes(f"S-{round_:04d}-{index}"))
                data = order_bytes(f"AGAIN-{round_ // 3:04d}", account=f"practice-{self.rng.randrange(2)}")
                deadline = time.monotonic() + self.patience
                while (self.lab / "inbox" / "again.json").exists() and time.monotonic() < deadline:
                    time.sleep(0.0005)
                taken = not (self.lab / "inbox" / "again.json").exists()
                self._send("again.json" if taken else f"again-{round_:04d}.json", data)
                time.sleep(self.rng.uniform(0, self.pause))
        except BaseException as exc:  # noqa: BLE001 - reported by the test
            self.error = exc

    def _send(self, name: str, data: bytes) -> None:
        drop(self.lab, name, data)
        self.sent.append(data)


def test_same_name_resends_while_batches_are_pending_keep_every_input(tmp_path):
    lab = make_lab(tmp_path / "lab")
    watch = Watch(lab)
    sender = Sender(lab, 60, seed=12)
    sender.start()
    sender.join()
    assert sender.error is None
    wait_until(lambda: final_records(lab) == len(sender.sent), "a final record for every input")
    assert watch.stop() == 0
    assert_every_input_kept_once(lab, sender.sent)


@pytest.mark.parametrize("seed", [1, 2])
def test_kill_9_of_the_engine_and_its_group_at_random_instants_while_a_sender_feeds_it(tmp_path, seed):
    lab = make_lab(tmp_path / "lab")
    rng = random.Random(seed)
    backlog = write_backlog(lab, 200)
    sender = Sender(lab, 80, seed=seed, patience=0.2, pause=0.1)
    sender.start()
    for round_ in range(10):
        watch = Watch(lab, ready=False, new_session=True)
        time.sleep(rng.uniform(0.3, 1.5))
        assert (watch.kill_group() if round_ % 2 else watch.kill()) == -9
    sender.join()
    assert sender.error is None
    done = run_once(lab)
    assert done.returncode == 0, done.stderr
    assert_every_input_kept_once(lab, [json.dumps(o).encode() for o in backlog.values()] + sender.sent)


def test_a_crash_redo_never_changes_a_result_already_in_the_outbox(tmp_path):
    lab = make_lab(tmp_path / "lab")
    first = order_bytes("TWICE-1", account="practice-b")
    other = order_bytes("TWICE-1", account="practice-a")  # the same id, another account's order
    drop(lab, "b.json", first)
    drop(lab, "a.json", other)
    # b.json is taken first (it came first). Step "published" is reached first by a.json's held report, then
    # by b.json's result renamed into the outbox: the crash comes there, before the batch's audit records.
    crashed = run_crashing(lab, "published:2", take=["b.json", "a.json"])
    assert crashed.returncode == CRASH_EXIT_CODE, crashed.stderr
    visible = sha256_of([lab / "outbox" / "TWICE-1.json"])
    assert json.loads((lab / "outbox" / "TWICE-1.json").read_bytes())["order"]["account"] == "practice-b"

    done = run_once(lab)
    assert done.returncode == 0, done.stderr
    assert sha256_of([lab / "outbox" / "TWICE-1.json"]) == visible  # the redo took them in the same order
    [published] = [r for r in iter_records(lab) if r.get("event") == "published"]
    [held] = [r for r in iter_records(lab) if r.get("event") == "held"]
    assert (lab / published["input"]).read_bytes() == first and (lab / held["input"]).read_bytes() == other
    reports = [n for n in names(lab / "held") if n.endswith(".held.json")]
    assert reports == [f"{held['input'].split('/', 1)[1]}.held.json"]  # no report without its input
    assert_every_input_kept_once(lab, [first, other])


@pytest.fixture
def unmovable(tmp_path):
    """An inbox entry the engine cannot claim: a folder named ``d.json`` that even root cannot rename."""
    lab = make_lab(tmp_path / "lab")
    stuck = lab / "inbox" / "d.json"
    stuck.mkdir()
    if subprocess.run(["chattr", "+i", str(stuck)], capture_output=True).returncode != 0:
        pytest.skip("this file system has no immutable attribute (chattr +i)")
    yield lab, stuck
    subprocess.run(["chattr", "-i", str(stuck)], check=False)


def test_an_entry_that_cannot_be_claimed_is_left_in_place_and_blocks_nothing(unmovable):
    lab, stuck = unmovable
    watch = Watch(lab)
    for index in range(3):
        drop(lab, f"later-{index}.json", order_bytes(f"LATER-{index}"))
    wait_until(lambda: count(lab / "archive") == 3, "the later orders", timeout=GIVE_UP_SECONDS)
    not_taken = watch.wait_for("not taken", timeout=GIVE_UP_SECONDS)
    assert not_taken["file"] == "d.json" and not_taken["step"] == "claim" and not_taken["tries"] >= 2
    assert stuck.is_dir()  # left in place
    assert [e["file"] for e in watch.wait_for("health")["entries"]] == ["d.json"]
    status = json.loads(subprocess.run([*_lenslane(), "status", str(lab), "--json"], capture_output=True,
                                       text=True, check=True).stdout)
    assert [(e["file"], e["step"]) for e in status["not_taken"]] == [("d.json", "claim")]
    assert "Operation not permitted" in status["not_taken"][0]["reason"]
    drop(lab, "last.json", order_bytes("LAST-1"))
    wait_until(lambda: count(lab / "archive") == 4, "an order after the stuck one was set aside")
    assert watch.stop() == 0
    assert len(watch.events("not taken")) == 1  # logged once


def test_the_observer_is_rebuilt_when_the_inbox_folder_is_replaced(tmp_path):
    lab = make_lab(tmp_path / "lab", {**FAST_WATCH, "rescan_seconds": 600.0})  # no rescan to fall back on
    watch = Watch(lab)
    os.rename(lab / "inbox", lab / "inbox.old")
    os.mkdir(lab / "inbox")
    rebuilt = watch.wait_for("observer rebuilt", timeout=GIVE_UP_SECONDS)
    assert "replaced" in rebuilt["why"]
    drop(lab, "after.json", order_bytes("AFTER-1"))
    wait_until(lambda: count(lab / "archive") == 1, "an order in the new inbox", timeout=GIVE_UP_SECONDS)
    assert watch.stop() == 0
    assert names(lab / "outbox") == ["AFTER-1.json"]


def _lenslane() -> list[str]:
    import sys

    return [sys.executable, "-m", "lenslane.cli"]
