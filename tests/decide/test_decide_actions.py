"""``lenslane decide`` with no engine running: each action, once, recorded in the audit chain."""
from __future__ import annotations

import hashlib
import json
import os

import pytest

from lenslane.audit.log import verify
from lenslane.cli import main
from lenslane.contract.models import LensOrderResult
from lenslane.decide import DecisionError, decide
from lenslane.decide.model import EXIT_MISMATCH, EXIT_NOT_AWAITING, EXIT_UNKNOWN, EXIT_USAGE
from lenslane.report import order_story, render_text as render
from tests.decide.helpers import load, ready_order, records, review_order


def sha256(path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


@pytest.fixture
def lab(make_lab, drop):
    """A lab with RV-0001 in review/ and a corrected OK-0001 held beside the published one."""
    lab = make_lab()
    drop(lab, review_order("RV-0001"))
    drop(lab, ready_order("OK-0001"))
    lab.drain()
    drop(lab, ready_order("OK-0001", sphere=-1.50), "OK-0001-corrected.json")
    lab.drain()
    return lab


def test_approve_publishes_the_reviewed_result_as_ready_with_who_when_and_why(lab):
    root = lab.root
    reviewed = load(root / "review" / "RV-0001.json")
    reviewed_sha = sha256(root / "review" / "RV-0001.json")
    done = decide(root, "RV-0001", "approve", "tech-07", "frame is deeper than ordered; checked by phone")
    assert not (root / "review" / "RV-0001.json").exists()
    result = load(root / "outbox" / "RV-0001.json")
    LensOrderResult.model_validate(result)
    assert result["status"] == "ready"
    assert result["approved"] == {"by": "tech-07", "at": done.decided_at,
                                  "note": "frame is deeper than ordered; checked by phone",
                                  "flags_acknowledged": ["fitting-height-low"]}
    # Nothing else changed: the approved result is the reviewed one with its status and approval.
    assert {k: v for k, v in result.items() if k not in ("status", "approved")} == \
        {k: v for k, v in reviewed.items() if k != "status"}
    (decided,) = records(root, "decided", "RV-0001")
    assert decided["by"] == "tech-07" and decided["note"].startswith("frame is deeper")
    assert decided["applies_to"] == {"path": "review/RV-0001.json", "sha256": reviewed_sha}
    assert decided["result_sha256"] == sha256(root / "outbox" / "RV-0001.json") and decided["seq"] == done.seq
    assert verify(root).ok


def test_refuse_moves_the_result_to_rejected_with_the_reason(lab):
    root = lab.root
    reviewed_sha = sha256(root / "review" / "RV-0001.json")
    decide(root, "RV-0001", "refuse", "tech-07", "the frame cannot take a progressive; practice informed")
    assert not (root / "review" / "RV-0001.json").exists() and not (root / "outbox" / "RV-0001.json").exists()
    assert sha256(root / "rejected" / "RV-0001.json") == reviewed_sha
    report = load(root / "rejected" / "RV-0001.json.errors.json")
    assert report["problems"] == [{"field": "(decision)", "message": "refused by tech-07: the frame cannot take a "
                                                                      "progressive; practice informed"}]
    report = verify(root)
    assert report.ok and report.other_results_matching == {"rejected": 1}
    # Walked from seq 1, the result's first place (review/) is one it is no longer in, and the summary says so
    # without calling it gone from the outbox.
    report = verify(root, full=True)
    assert report.ok and report.other_results_matching == {"rejected": 1} and report.results_gone == 1
    assert "1 no longer where a record placed them (taken away downstream, or moved on by a decision)" in \
        report.summary()


def test_replace_publishes_the_next_revision_and_keeps_the_superseded_result(lab, drop):
    root = lab.root
    old_sha = sha256(root / "outbox" / "OK-0001.json")
    done = decide(root, "OK-0001", "replace", "tech-07", "the practice corrected the right sphere")
    result = load(root / "outbox" / "OK-0001.json")
    LensOrderResult.model_validate(result)
    assert result["revision"] == 2 and result["supersedes"] == old_sha
    assert result["order"]["rx"]["right"]["sphere"] == -1.50 and result["status"] == "ready"
    assert sha256(root / "archive" / "OK-0001.r1.json") == old_sha
    assert os.listdir(root / "held") == [] and (root / "archive" / "OK-0001-corrected.json").exists()
    assert done.result == "outbox/OK-0001.json" and done.result_sha256 == sha256(root / "outbox" / "OK-0001.json")
    published = records(root, "published", "OK-0001")
    assert [p.get("revision") for p in published] == [None, 2] and published[1]["supersedes"] == old_sha
    report = verify(root)
    assert report.ok and report.other_results_matching == {"archive": 1, "review": 1}
    # A resend of the replacing version is now the published one: recorded and archived, not held again.
    drop(lab, ready_order("OK-0001", sphere=-1.50), "OK-0001-resent.json")
    assert [p.outcome for p in lab.drain()] == ["skipped"]
    story = render(order_story(root, "OK-0001"))
    assert "== Decision: replace by tech-07" in story and "revision 2 (supersedes sha256 " + old_sha in story
    assert "moved to archive/OK-0001.r1.json by the replace decision" in story
    assert ", unchanged there" in story.split("moved to archive/OK-0001.r1.json", 1)[1].splitlines()[0]
    # The superseded result is still checked where the decision put it: an edit there is told.
    (root / "archive" / "OK-0001.r1.json").write_bytes(b"edited\n")
    story = render(order_story(root, "OK-0001"))
    assert "; CHANGED there since" in story.split("moved to archive/OK-0001.r1.json", 1)[1].splitlines()[0]
    assert story.count("Input:    now archive/OK-0001-corrected.json") == 2  # the held pass and revision 2


def test_a_replacing_revision_that_needs_a_person_goes_to_review(make_lab, drop):
    lab = make_lab()
    drop(lab, ready_order("OK-0002"))
    lab.drain()
    drop(lab, review_order("OK-0002"), "OK-0002-progressive.json")
    lab.drain()
    old_sha = sha256(lab.root / "outbox" / "OK-0002.json")
    decide(lab.root, "OK-0002", "replace", "tech-07", "the practice changed the design")
    assert not (lab.root / "outbox" / "OK-0002.json").exists()
    result = load(lab.root / "review" / "OK-0002.json")
    assert result["status"] == "review" and result["revision"] == 2 and result["supersedes"] == old_sha
    decide(lab.root, "OK-0002", "approve", "tech-09", "fitting height confirmed")
    assert load(lab.root / "outbox" / "OK-0002.json")["revision"] == 2
    assert verify(lab.root).ok


def test_discard_archives_the_held_version_and_keeps_the_published_result(lab):
    root = lab.root
    before = sha256(root / "outbox" / "OK-0001.json")
    decide(root, "OK-0001", "discard", "tech-07", "sent twice by mistake")
    assert sha256(root / "outbox" / "OK-0001.json") == before
    assert os.listdir(root / "held") == [] and (root / "archive" / "OK-0001-corrected.json").exists()
    assert verify(root).ok


def test_a_decision_applies_once_and_a_second_names_the_first(lab):
    decide(lab.root, "RV-0001", "approve", "tech-07", "checked")
    with pytest.raises(DecisionError) as second:
        decide(lab.root, "RV-0001", "refuse", "tech-09", "too late")
    assert second.value.exit_code == EXIT_NOT_AWAITING
    assert "already decided — approve by tech-07" in second.value.message and '"checked"' in second.value.message
    assert len(records(lab.root, "decided")) == 1


@pytest.mark.parametrize("order_id, action, code, words", [
    ("NOPE-1", "approve", EXIT_UNKNOWN, "the lab has no order NOPE-1"),
    ("OK-0001", "approve", EXIT_NOT_AWAITING, "it is held: another version of it waits in held/OK-0001-corrected.json"),
    ("RV-0001", "replace", EXIT_NOT_AWAITING, "it is in review (review/RV-0001.json); decide approve or refuse"),
])
def test_what_does_not_await_this_decision_says_so(lab, order_id, action, code, words):
    with pytest.raises(DecisionError) as refused:
        decide(lab.root, order_id, action, "tech-07", "a note")
    assert refused.value.exit_code == code and words in refused.value.message
    assert records(lab.root, "decided") == []


def test_a_result_changed_in_review_is_not_decided(lab):
    path = lab.root / "review" / "RV-0001.json"
    path.write_bytes(path.read_bytes().replace(b'"review"', b'"ready"', 1))
    with pytest.raises(DecisionError) as refused:
        decide(lab.root, "RV-0001", "approve", "tech-07", "ok")
    assert refused.value.exit_code == EXIT_MISMATCH and "was changed after the engine wrote it" in refused.value.message
    assert not (lab.root / "outbox" / "RV-0001.json").exists()


def test_the_command_line_requires_who_and_why_and_gives_the_exit_codes(lab, capsys):
    with pytest.raises(SystemExit) as usage:
        main(["decide", str(lab.root), "RV-0001", "approve", "--note", "ok"])
    assert usage.value.code == 2 and "--by" in capsys.readouterr().err
    assert main(["decide", str(lab.root), "RV-0001", "approve", "--by", "  ", "--note", "ok"]) == EXIT_USAGE
    assert "by: required" in capsys.readouterr().err
    assert main(["decide", str(lab.root), "RV-0001", "approve", "--by", "tech-07", "--note", "ok"]) == 0
    assert "RV-0001: approved: outbox/RV-0001.json published with status ready" in capsys.readouterr().out
    assert main(["decide", str(lab.root), "RV-0001", "approve", "--by", "tech-07", "--note", "ok"]) == EXIT_NOT_AWAITING
    assert main(["decide", str(lab.root), "NOPE-1", "approve", "--by", "tech-07", "--note", "ok"]) == EXIT_UNKNOWN
    assert "the lab has no order NOPE-1" in capsys.readouterr().err


def test_verify_accounts_for_review_and_superseded_results(lab):
    decide(lab.root, "OK-0001", "replace", "tech-07", "corrected")
    assert verify(lab.root).ok
    superseded = lab.root / "archive" / "OK-0001.r1.json"
    superseded.write_bytes(superseded.read_bytes().replace(b"-1.0", b"-1.25", 1))
    report = verify(lab.root, full=True)  # a result moved by a record verified before: --full looks again
    assert not report.ok and report.result_problems[0].where == "archive/OK-0001.r1.json"
    superseded.unlink()
    (lab.root / "review" / "STRAY-1.json").write_bytes(json.dumps({"order_id": "STRAY-1"}).encode())
    report = verify(lab.root)
    assert not report.ok and "review/STRAY-1.json: no published record" in str(report.result_problems[0])


def test_an_approval_never_writes_over_a_file_it_does_not_account_for(lab):
    """A stranger's file where the approved result would go: nothing is decided, nothing is lost."""
    root = lab.root
    stranger = root / "outbox" / "RV-0001.json"
    stranger.write_bytes(b'{"not": "ours"}\n')
    with pytest.raises(DecisionError) as raised:
        decide(root, "RV-0001", "approve", "tech-07", "checked")
    assert raised.value.exit_code == EXIT_MISMATCH
    assert raised.value.message.startswith("outbox/RV-0001.json is already there, a file the audit log does not "
                                           "account for; it is kept as it is and nothing was decided")
    assert stranger.read_bytes() == b'{"not": "ours"}\n' and (root / "review" / "RV-0001.json").exists()
    assert records(root, "decided") == []
    # Answered, not left to be retried: the next decision in the lab is not stuck behind it.
    assert [p.name for p in (root / "decisions").iterdir() if not p.name.endswith(".answer.json")] == []
    decide(root, "OK-0001", "discard", "tech-07", "the practice withdrew the correction")
    assert [d["action"] for d in records(root, "decided")] == ["discard"]


def test_a_replace_onto_a_result_file_the_log_does_not_know_is_refused_and_blocks_nothing(make_lab, drop):
    """An order held because outbox/ already holds a file under its id that the engine did not write: replacing
    it would write over that file, so nothing is decided, and the lab's other decisions go on."""
    lab = make_lab()
    drop(lab, review_order("RV-0001"))
    (lab.root / "outbox" / "ST-0001.json").write_bytes(b"a stranger's result\n")
    drop(lab, ready_order("ST-0001"))
    assert sorted(p.outcome for p in lab.drain()) == ["held", "published"]
    with pytest.raises(DecisionError) as raised:
        decide(lab.root, "ST-0001", "replace", "tech-07", "the practice resent it")
    assert raised.value.exit_code == EXIT_MISMATCH and "outbox/ST-0001.json is already there" in raised.value.message
    assert (lab.root / "outbox" / "ST-0001.json").read_bytes() == b"a stranger's result\n"
    root = lab.root
    assert not [name for name in os.listdir(root / "archive") if name.startswith("ST-0001")]
    assert records(root, "decided") == [] and len(os.listdir(root / "held")) == 2  # the held version and its report
    decide(root, "RV-0001", "approve", "tech-07", "checked")
    assert [d["action"] for d in records(root, "decided")] == ["approve"]


def test_a_folder_named_like_a_request_is_no_request_and_stops_none(lab):
    (lab.root / "decisions" / "00000000000000000000-stray.json").mkdir()
    decide(lab.root, "RV-0001", "approve", "tech-07", "checked")
    assert [d["action"] for d in records(lab.root, "decided")] == ["approve"]


def test_a_move_left_half_done_by_a_crash_finishes_and_a_stranger_at_the_target_is_kept(lab):
    """The moves of a recorded decision: a file under both names (a link made, the old name left) loses its
    old name; a different file already at the target keeps both, for audit verify to report."""
    from lenslane.decide.apply import Applier

    root = lab.root
    source = root / "review" / "RV-0001.json"
    digest = sha256(source)
    os.link(source, root / "rejected" / "RV-0001.json")  # as the link-and-unlink rename leaves a crash
    Applier(lab)._move([{"from": "review/RV-0001.json", "to": "rejected/RV-0001.json", "sha256": digest}])
    assert not source.exists() and sha256(root / "rejected" / "RV-0001.json") == digest

    held = root / "held" / "OK-0001-corrected.json"
    held_digest = sha256(held)
    (root / "archive" / "OK-0001-corrected.json").write_bytes(b"someone else's\n")
    Applier(lab)._move([{"from": "held/OK-0001-corrected.json", "to": "archive/OK-0001-corrected.json",
                         "sha256": held_digest}])
    assert sha256(held) == held_digest
    assert (root / "archive" / "OK-0001-corrected.json").read_bytes() == b"someone else's\n"


def test_a_decision_applied_with_no_engine_leaves_no_file_of_the_lab_open(lab):
    """The web page applies decisions in its own long-running process: each must close what it opened (here the
    audit index: a descriptor of its database file each time it is opened)."""
    database = str(lab.root / "audit.sqlite")

    def opened() -> int:
        count = 0
        for fd in os.listdir("/proc/self/fd"):
            try:
                count += os.readlink(f"/proc/self/fd/{fd}") == database
            except OSError:
                pass  # the listing's own descriptor, closed by now
        return count

    lab.audit.close()  # the fixture's own engine is done: its index is not counted
    assert opened() == 0
    decide(lab.root, "RV-0001", "approve", "tech-07", "checked")
    decide(lab.root, "OK-0001", "discard", "tech-07", "sent twice")
    assert opened() == 0


def test_a_decision_refused_for_a_bad_config_is_not_applied_later(lab, capsys):
    """No engine runs and the lab's config file is not valid: the person is told, and the request is withdrawn, so
    that the next engine started on the mended config does not apply a decision its maker was told had failed."""
    config = lab.root / "lenslane.toml"
    config.write_text("[watch]\nrescan_secnds = 1\n")
    assert main(["decide", str(lab.root), "RV-0001", "approve", "--by", "tech-07", "--note", "ok"]) == 2
    assert "rescan_secnds" in capsys.readouterr().err
    with pytest.raises(DecisionError) as refused:  # the web page's way: an error it shows, nothing recorded
        decide(lab.root, "RV-0001", "approve", "tech-07", "ok")
    assert refused.value.exit_code == EXIT_USAGE and "nothing was decided" in refused.value.message
    assert os.listdir(lab.root / "decisions") == []
    config.unlink()
    assert main(["watch", str(lab.root), "--once"]) == 0
    assert records(lab.root, "decided") == [] and (lab.root / "review" / "RV-0001.json").exists()
