"""The daemon's parts one by one, in process: intake's incomplete-or-bad verdict, the time limit, the
observer choice, names, the lock, the log."""
from __future__ import annotations

import errno
import io
import json
import os
import signal
import subprocess
import sys
import time

import pytest
import structlog
from hypothesis import given, settings, strategies as st

from lenslane.chain.host import start_host
from lenslane.config import LabConfig
from lenslane.watch.clock import StageClock
from lenslane.watch.tally import Tally
from lenslane.watch.observer import InboxEvents, start_observer
from lenslane.lab.files import LabLocked, filesystem_type, free_name, is_network_file_system, lock_lab
from lenslane.lab.folder import Interrupted, Lab, OrderTimeLimit, Processed, StageWontStop, Wait
from lenslane.contract.intake import OrderRejected, parse_json, read_order
from lenslane.watch.log import configure_logging, get_logger
from tests.system.driver import claimed, make_lab, order

MATERIALS = {"resin-1.50": {}}
NON_ASCII_ORDER = json.dumps(order("PART-1", account="optique-café-ü"), ensure_ascii=False, indent=1).encode()


# -- intake: could these bytes still become an order? ----------------------------------


@settings(max_examples=200, deadline=None)
@given(cut=st.integers(min_value=0, max_value=NON_ASCII_ORDER.rindex(b"}")))
def test_every_cut_short_order_may_still_be_incomplete(cut):
    """A file caught while being written is retried, never rejected for being cut short."""
    with pytest.raises(OrderRejected) as caught:
        parse_json(NON_ASCII_ORDER[:cut])
    assert caught.value.maybe_incomplete


def test_the_whole_order_parses():
    assert parse_json(NON_ASCII_ORDER)["account"] == "optique-café-ü"


@pytest.mark.parametrize("raw", [
    b'{"a": NaN}', b'{"a": 1, "a": 2}', b"\xef\xbb\xbf{}", b'{"a": ' + b"9" * 40 + b"}", b"[" * 40,
    b'{"a": "\xff"}',
], ids=["nan", "duplicate-key", "bom", "long-integer", "deep", "bad-byte"])
def test_bytes_no_later_write_can_repair_are_plainly_bad(raw):
    with pytest.raises(OrderRejected) as caught:
        parse_json(raw)
    assert not caught.value.maybe_incomplete


def test_a_number_that_overflows_to_infinity_is_named():
    raw = json.dumps(order("PART-3")).replace('"sphere": -1.0', '"sphere": 1e999').encode()
    with pytest.raises(OrderRejected) as caught:
        read_order(raw, MATERIALS)
    assert not caught.value.maybe_incomplete and "1e999" in caught.value.problems[0]["message"]


def test_a_complete_order_with_wrong_fields_is_plainly_bad():
    with pytest.raises(OrderRejected) as caught:
        read_order(json.dumps(order("PART-2", colour="blue")).encode(), MATERIALS)
    assert not caught.value.maybe_incomplete and caught.value.problems[0]["field"] == "colour"


# -- looking at inbox entries ---------------------------------------------------------------


@pytest.fixture
def lab(tmp_path):
    root = make_lab(tmp_path / "lab")
    lab = Lab(root, start_host(LabConfig.model_validate({"watch": {"quiet_seconds": 0.2, "young_seconds": 60.0}})))
    lab.recover()
    return lab


def _process(lab, *order_ids):
    for order_id in order_ids:
        (lab.inbox / f"{order_id}.json").write_bytes(json.dumps(order(order_id)).encode())
        assert lab.consider(f"{order_id}.json", moved=True).outcome == "published"


def test_a_failed_flush_keeps_the_batch_for_the_retry(lab, monkeypatch):
    import lenslane.lab.commit
    import lenslane.lab.folder

    _process(lab, "FLUSH-1")
    failing = OSError(errno.EIO, "Input/output error")
    monkeypatch.setattr(lenslane.lab.commit, "make_durable", lambda folder, paths: (_ for _ in ()).throw(failing))
    with pytest.raises(lenslane.lab.folder.OutputBlocked) as blocked:
        lab.commit()
    assert blocked.value.error is failing and blocked.value.step == "publish"
    assert claimed(lab.root) == ["FLUSH-1.json"] and not (lab.outbox / "FLUSH-1.json").exists()
    monkeypatch.undo()
    assert [p.order_id for p in lab.commit()] == ["FLUSH-1"]
    assert (lab.outbox / "FLUSH-1.json").exists() and os.listdir(lab.work) == []


def test_orders_made_final_before_a_failure_are_returned_by_the_next_commit(lab, monkeypatch):
    import lenslane.lab.commit
    import lenslane.lab.folder

    _process(lab, "FINAL-1", "FINAL-2")
    real_rename = lenslane.lab.commit.rename_noreplace

    def archive_fails_for_the_second(source, target):
        if source.endswith("FINAL-2.json"):
            raise OSError(errno.EIO, "Input/output error")
        return real_rename(source, target)

    monkeypatch.setattr(lenslane.lab.commit, "rename_noreplace", archive_fails_for_the_second)
    with pytest.raises(lenslane.lab.folder.OutputBlocked):
        lab.commit()  # FINAL-1 is finished (archived); FINAL-2's move fails
    assert (lab.outbox / "FINAL-1.json").exists() and claimed(lab.root) == ["FINAL-2.json"]
    monkeypatch.undo()
    assert [p.order_id for p in lab.commit()] == ["FINAL-1", "FINAL-2"]  # neither is lost to the log


def test_an_audit_index_that_cannot_grow_blocks_the_commit_and_the_retry_finishes_it(lab):
    # SQLite's own page limit gives the index the error a full disk gives (SQLITE_FULL): the batch's records and
    # input wait, the commit says it is blocked (the engine retries it), and nothing is lost or written twice.
    import lenslane.lab.folder
    from lenslane.audit.log import iter_records, verify

    _process(lab, "FULL-1")
    assert [p.order_id for p in lab.commit()] == ["FULL-1"]
    index = lab.audit.index.db
    pages = index.execute("PRAGMA page_count").fetchone()[0]
    index.execute(f"PRAGMA max_page_count = {pages}")
    _process(lab, *(f"FULL-{n}" for n in range(2, 121)))
    assert len(lab.commit()) == 119  # on disk in the log; the index could not follow
    assert lab.audit.index.tail().seq < lab.audit.seq
    _process(lab, *(f"FULL-{n}" for n in range(121, 140)))
    for _ in range(2):  # the next commit must bring the index level first, and cannot: blocked, and again
        with pytest.raises(lenslane.lab.folder.OutputBlocked) as blocked:
            lab.commit()
        assert blocked.value.step == "audit" and "full" in str(blocked.value.error)
    assert len(claimed(lab.root)) == 19
    lab.audit.index.db.execute("PRAGMA max_page_count = 1073741823")  # room again
    assert len(lab.commit()) == 19
    assert claimed(lab.root) == [] and len(os.listdir(lab.outbox)) == 139
    published = [r["order_id"] for r in iter_records(lab.root) if r.get("event") == "published"]
    assert sorted(published) == sorted(f"FULL-{n}" for n in range(1, 140))
    assert verify(lab.root, full=True).ok


def test_a_fresh_file_written_in_place_waits_for_its_quiet_time(lab):
    (lab.inbox / "fresh.json").write_bytes(NON_ASCII_ORDER)
    outcome = lab.consider("fresh.json")
    assert isinstance(outcome, Wait) and outcome.reason == "settling"
    assert outcome.until - time.time() <= lab.config.watch.quiet_seconds
    assert isinstance(lab.consider("fresh.json", moved=True), Processed)  # renamed in: complete at once


def test_a_young_file_that_does_not_parse_is_retried_and_an_old_one_rejected(lab):
    path = lab.inbox / "partial.json"
    path.write_bytes(NON_ASCII_ORDER[:100])
    assert lab.consider("partial.json", closed=True).reason == "incomplete"
    assert path.exists()
    old = time.time() - 2 * lab.config.watch.young_seconds
    os.utime(path, (old, old))
    done = lab.consider("partial.json")
    assert done.outcome == "rejected" and "invalid JSON" in done.reasons[0]["message"]


def test_a_file_moved_in_that_does_not_parse_is_rejected_at_once(lab):
    (lab.inbox / "broken.json").write_bytes(b'{"format": ')
    assert lab.consider("broken.json", moved=True).outcome == "rejected"


# -- the time limit ------------------------------------------------------------------------------


@pytest.fixture
def clock():
    clock = StageClock(0.2)
    previous = signal.signal(signal.SIGALRM, clock.on_alarm)
    yield clock
    signal.setitimer(signal.ITIMER_REAL, 0)
    signal.signal(signal.SIGALRM, previous)


def test_the_time_limit_interrupts_a_sleeping_stage(clock):
    with pytest.raises(OrderTimeLimit, match="0.2 s"):
        with clock():
            time.sleep(30)


def test_a_stage_that_swallows_the_time_limit_is_stopped_anyway(clock):
    def stubborn():
        while True:
            try:
                time.sleep(30)
            except Exception:
                pass

    with pytest.raises(StageWontStop, match="stubborn"):
        with clock():
            stubborn()


def test_a_shutdown_interrupts_a_stage_after_the_grace_time(clock):
    clock.limit_seconds = 60.0
    with pytest.raises(Interrupted):
        with clock():
            clock.shutdown(0.1)
            time.sleep(30)


# -- which observer -------------------------------------------------------------------------------

# Source: proc(5), /proc/[pid]/mountinfo — the example line of the manual page, and the same layout for
# an NFS mount and a mount point whose name has a space (written \040).
MOUNTINFO = """\
36 35 98:0 /mnt1 /mnt2 rw,noatime master:1 - ext3 /dev/root rw,errors=continue
40 36 0:45 / /srv/share rw,relatime shared:7 - nfs4 server:/export rw,vers=4.2
41 36 0:46 / /srv/lab\\040two rw - cifs //server/lab rw
"""


def test_the_file_system_of_a_path_comes_from_its_longest_mount_point():
    assert filesystem_type("/mnt2/lab/inbox", MOUNTINFO) == "ext3"
    assert filesystem_type("/srv/share/lab/inbox", MOUNTINFO) == "nfs4"
    assert filesystem_type("/srv/lab two/inbox", MOUNTINFO) == "cifs"
    assert is_network_file_system("nfs4") and is_network_file_system("cifs")
    assert not is_network_file_system("ext3") and not is_network_file_system(None)


def _refused(code):
    def native():
        raise OSError(code, os.strerror(code))
    return native


def test_auto_falls_back_to_polling_when_the_inotify_limit_is_reached(tmp_path):
    observer, kind, why = start_observer("auto", str(tmp_path), InboxEvents(str(tmp_path), None),
                                         native=_refused(errno.ENOSPC))
    try:
        assert kind == "polling" and "limit" in why and observer.is_alive()
    finally:
        observer.stop()
        observer.join()


@pytest.mark.parametrize("setting, code", [("native", errno.ENOSPC), ("auto", errno.EACCES)])
def test_other_inotify_failures_are_not_hidden(tmp_path, setting, code):
    with pytest.raises(OSError):
        start_observer(setting, str(tmp_path), InboxEvents(str(tmp_path), None), native=_refused(code))


# -- names, the lock, the log --------------------------------------------------------------------


def test_free_names_are_kept_and_taken_ones_get_the_same_tag_every_time(tmp_path):
    assert free_name(tmp_path, "a.json", "tag1") == "a.json"
    (tmp_path / "a.json").touch()
    assert free_name(tmp_path, "a.json", "tag1") == free_name(tmp_path, "a.json", "tag1") == "a.json.tag1"
    assert free_name(tmp_path, "x.errors.json", "tag2", ".errors.json") == "x.errors.json.tag2"
    long_name = "é" * 120 + ".json"  # 245 bytes in UTF-8
    assert len(os.fsencode(free_name(tmp_path, long_name, "tag3") + ".errors.json")) <= 255


def test_a_second_lock_on_the_lab_is_refused_until_the_first_is_released(tmp_path):
    first = lock_lab(tmp_path)
    with pytest.raises(LabLocked) as refused:
        lock_lab(tmp_path)
    assert refused.value.holder == str(os.getpid())
    os.close(first)
    os.close(lock_lab(tmp_path))


def test_a_lock_whose_state_cannot_be_written_is_released(tmp_path):
    """Taking a new lock file on a full disk (here a file size limit of 0 bytes) fails, and lets the lock go: a web
    page that applies decisions would otherwise hold the lab's lock for as long as it runs."""
    script = ("import errno, fcntl, os, resource, signal, sys\n"
              "from lenslane.lab.files import lock_lab\n"
              "signal.signal(signal.SIGXFSZ, signal.SIG_IGN)\n"
              "resource.setrlimit(resource.RLIMIT_FSIZE, (0, 0))\n"
              "try:\n"
              "    lock_lab(sys.argv[1])\n"
              "except OSError as exc:\n"
              "    print(errno.errorcode[exc.errno])\n"
              "fd = os.open(os.path.join(sys.argv[1], '.lock'), os.O_RDWR)\n"
              "fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)\n"
              "print('free')\n")
    done = subprocess.run([sys.executable, "-c", script, str(tmp_path)], capture_output=True, text=True, timeout=60)
    assert (done.returncode, done.stdout) == (0, "EFBIG\nfree\n"), done.stderr


def test_log_lines_are_json_off_a_terminal_and_readable_on_one():
    stream = io.StringIO()
    configure_logging(stream).info("order", order_id="LOG-1", outcome="published", ms=1.5)
    line = json.loads(stream.getvalue())
    assert line["event"] == "order" and line["order_id"] == "LOG-1" and line["level"] == "info"
    stream = io.StringIO()
    configure_logging(stream, console=True).info("order", order_id="LOG-1")
    assert "order" in stream.getvalue() and "LOG-1" in stream.getvalue()
    with pytest.raises(ValueError):
        json.loads(stream.getvalue())


def test_one_line_per_order_with_its_id_outcome_and_time(lab):
    tally = Tally(get_logger())
    with structlog.testing.capture_logs() as logs:
        tally.final(Processed("x.json", "rejected", None, reasons=[{"field": "(file)", "message": "empty"}]),
                    time.perf_counter())
        tally.final(Processed("y.json", "published", "LOG-2", "ready"), time.perf_counter())
    assert [(e["event"], e["log_level"], e["outcome"]) for e in logs] == [
        ("order", "warning", "rejected"), ("order", "info", "published")]
    assert logs[0]["reason"] == "(file): empty" and logs[1]["order_id"] == "LOG-2" and logs[1]["ms"] >= 0
