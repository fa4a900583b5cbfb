"""Claims, names and moves in process: no rename ever replaces a file, and work/ keeps the claim order."""
from __future__ import annotations

import hashlib
import json
import os

import pytest

from lenslane.audit.log import iter_records
from lenslane.chain.host import start_host
from lenslane.config import LabConfig
from lenslane.lab.claim import Claims
from lenslane.lab.files import lock_holder, publish_file, rename_noreplace
from lenslane.lab.folder import Lab
from tests.system.driver import make_lab, order


@pytest.fixture
def lab(tmp_path):
    lab = Lab(make_lab(tmp_path / "lab"), start_host(LabConfig.model_validate({"watch": {"quiet_seconds": 0.0}})))
    lab.recover()
    return lab


def _send(lab, name, order_id, **changes):
    data = json.dumps(order(order_id, **changes)).encode()
    (lab.inbox / name).write_bytes(data)
    return data


def test_a_copy_resent_under_the_same_name_while_the_first_waits_for_the_commit_is_kept(lab):
    first = _send(lab, "same.json", "SAME-1")
    assert lab.consider("same.json", moved=True).outcome == "published"
    second = _send(lab, "same.json", "SAME-2")  # the first is still in work/, waiting for the group commit
    assert lab.consider("same.json", moved=True).outcome == "published"
    third = _send(lab, "same.json", "SAME-1")  # the same bytes as the first: skipped, and kept too
    assert lab.consider("same.json", moved=True).outcome == "skipped"
    assert [p.order_id for p in lab.commit()] == ["SAME-1", "SAME-2", "SAME-1"]
    kept = sorted((lab.archive / name).read_bytes() for name in os.listdir(lab.archive))
    assert kept == sorted([first, second, third]) and os.listdir(lab.work) == []
    for record in iter_records(lab.root):  # each record's input holds the bytes that were received
        if record["event"] in ("published", "skipped"):
            received = record["received"]  # one record per pass: what arrived is in it
            assert hashlib.sha256((lab.root / record["input"]).read_bytes()).hexdigest() == received["sha256"]


def test_a_queued_input_holds_its_destination_until_it_is_moved_or_set_aside(lab):
    for order_id in ("DEST-1", "DEST-2"):
        _send(lab, f"{order_id}.json", order_id)
        lab.consider(f"{order_id}.json", moved=True)
    commits = lab.commits
    assert commits.is_destination("archive/DEST-1.json") and commits.is_destination("archive/DEST-2.json")
    [work_name] = [name for name in os.listdir(lab.work) if name.endswith("DEST-2.json")]
    commits.set_aside(work_name)  # its move is given up: the name is free again
    assert not commits.is_destination("archive/DEST-2.json")
    assert [p.order_id for p in lab.commit()] == ["DEST-1"]
    assert not commits.is_destination("archive/DEST-1.json") and (lab.archive / "DEST-1.json").exists()


def test_work_keeps_the_order_of_the_claims_not_of_the_names(lab):
    claims = Claims(os.fspath(lab.inbox), os.fspath(lab.work))
    for name in ("z.json", "a.json", "m.json"):
        (lab.inbox / name).write_bytes(b"{}")
        claims.claim(name)
    assert [Claims.original_name(n) for n in Claims(os.fspath(lab.inbox), os.fspath(lab.work)).in_order()] == [
        "z.json", "a.json", "m.json"]


def test_a_claim_name_taken_by_hand_is_skipped_not_replaced(lab):
    claims = Claims(os.fspath(lab.inbox), os.fspath(lab.work))
    (lab.work / "000000000001.x.json").write_bytes(b"put here by hand")
    (lab.inbox / "x.json").write_bytes(b"{}")
    (lab.inbox / "y.json").write_bytes(b"{}")
    claims = Claims(os.fspath(lab.inbox), os.fspath(lab.work))
    assert claims.claim("x.json")[0] == "000000000002.x.json"
    assert (lab.work / "000000000001.x.json").read_bytes() == b"put here by hand"


def test_rename_without_replace(tmp_path):
    (tmp_path / "a").write_bytes(b"a")
    (tmp_path / "b").write_bytes(b"b")
    with pytest.raises(FileExistsError):
        rename_noreplace(tmp_path / "a", tmp_path / "b")
    assert (tmp_path / "a").read_bytes() == b"a" and (tmp_path / "b").read_bytes() == b"b"
    (tmp_path / "folder").mkdir()
    with pytest.raises(FileExistsError):
        rename_noreplace(tmp_path / "folder", tmp_path / "b")
    rename_noreplace(tmp_path / "a", tmp_path / "c")
    assert not (tmp_path / "a").exists() and (tmp_path / "c").read_bytes() == b"a"


def test_a_link_and_unlink_cut_short_by_a_crash_is_finished_by_the_next_rename(tmp_path):
    (tmp_path / "a").write_bytes(b"a")
    os.link(tmp_path / "a", tmp_path / "b")  # the link was made, the crash came before the unlink
    rename_noreplace(tmp_path / "a", tmp_path / "b")
    assert not (tmp_path / "a").exists() and (tmp_path / "b").read_bytes() == b"a"


def test_a_result_already_there_is_kept_when_the_same_and_never_replaced_when_not(tmp_path):
    (tmp_path / "r.json").write_bytes(b"same")
    (tmp_path / ".r.json.tmp").write_bytes(b"same")
    publish_file(tmp_path / ".r.json.tmp", tmp_path / "r.json")
    assert os.listdir(tmp_path) == ["r.json"]
    (tmp_path / ".r.json.tmp").write_bytes(b"other")
    with pytest.raises(FileExistsError):
        publish_file(tmp_path / ".r.json.tmp", tmp_path / "r.json")
    assert (tmp_path / "r.json").read_bytes() == b"same"


def test_a_foreign_result_in_the_outbox_is_kept_and_the_order_held(lab):
    (lab.outbox / "FOREIGN-1.json").write_bytes(b'{"not": "ours"}\n')
    _send(lab, "f.json", "FOREIGN-1")
    done = lab.consider("f.json", moved=True)
    assert done.outcome == "held" and "already there" in done.reasons[0]["message"]
    lab.commit()
    assert (lab.outbox / "FOREIGN-1.json").read_bytes() == b'{"not": "ours"}\n'
    assert sorted(os.listdir(lab.held)) == ["f.json", "f.json.held.json"]


# Source: proc(5), /proc/locks — "1: FLOCK  ADVISORY  WRITE 12345 08:02:131085 0 EOF": number, type, mode,
# access, pid, major:minor:inode of the file, start, end; a "->" marks a process waiting for the lock.
LOCKS = """\
1: POSIX  ADVISORY  WRITE 100 08:02:777 0 EOF
2: FLOCK  ADVISORY  WRITE 4242 08:02:131085 0 EOF
2: -> FLOCK  ADVISORY  WRITE 5151 08:02:131085 0 EOF
"""


def test_the_lock_holder_is_read_from_proc_locks(tmp_path):
    info = os.stat_result((0o100644, 131085, 0, 1, 0, 0, 0, 0, 0, 0))
    assert lock_holder(info, None, LOCKS) == 4242
    other = os.stat_result((0o100644, 131086, 0, 1, 0, 0, 0, 0, 0, 0))
    assert lock_holder(other, 4242, LOCKS) is None


def test_an_input_that_cannot_be_moved_is_set_aside_after_its_tries_and_the_batch_goes_on(lab, monkeypatch):
    import errno

    import structlog

    import lenslane.lab.commit
    from lenslane.watch.health import ENTRY_TRIES, Health

    for order_id in ("MOVE-1", "MOVE-2", "MOVE-3"):
        _send(lab, f"{order_id}.json", order_id)
        lab.consider(f"{order_id}.json", moved=True)
    real_rename, tries = lenslane.lab.commit.rename_noreplace, []

    def move_fails_for_the_second(source, target):
        if source.endswith("MOVE-2.json"):
            tries.append(source)
            raise OSError(errno.EIO, "Input/output error")
        return real_rename(source, target)

    monkeypatch.setattr(lenslane.lab.commit, "rename_noreplace", move_fails_for_the_second)
    health, waits = Health(lab, structlog.get_logger(), "watch"), []
    with structlog.testing.capture_logs() as logs:
        done = health.retrying(lambda seconds: waits.append(seconds) or False, lab.commit, lambda exc, delay: None,
                               goes_on=True)
    assert [p.order_id for p in done] == ["MOVE-1", "MOVE-3"] and lab.uncommitted == 0
    assert len(tries) == ENTRY_TRIES and waits == [0.5, 1.0, 2.0, 4.0]  # doubling from 0.5 s, as the README says
    assert [Claims.original_name(n) for n in os.listdir(lab.work)] == ["MOVE-2.json"]  # left in place
    [entry] = lab.aside.listed()
    assert (entry["folder"], entry["step"], entry["tries"]) == ("work", "archive", ENTRY_TRIES)
    assert [line["event"] for line in logs] == ["not taken", "health"]
