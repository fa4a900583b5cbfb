"""A lab folder written by the first audit format (commit 17702d2) is still read, verified and explained.

``fixtures/old_lab`` was made by that version (``fixtures/make_old_lab.py``): three orders, a line cut
short by a crash and closed by the old engine's ``torn-line`` record (which names ``audit.jsonl``), a
rotation that moved it into ``audit-000000000001.jsonl``, then a resend, a same-id order held and one more.
"""
from __future__ import annotations

import copy
import json
import shutil
from pathlib import Path

import pytest

from lenslane.audit.records import AUDIT_NAME, TORN_EVENT
from lenslane.cli import main
from lenslane.lab.folder import Lab

OLD_LAB = Path(__file__).parent / "fixtures" / "old_lab"


@pytest.fixture
def old_lab(tmp_path, default_host):
    root = tmp_path / "old_lab"
    shutil.copytree(OLD_LAB, root)
    for name in ("inbox", "work"):
        (root / name).mkdir(exist_ok=True)
    return Lab(root, default_host)


def run(capsys, *argv: str) -> tuple[int, str]:
    code = main(list(argv))
    return code, capsys.readouterr().out


def test_the_fixture_is_in_the_first_format():
    records = [json.loads(line) for path in sorted(OLD_LAB.glob("audit*.jsonl")) for line in open(path, "rb")
               if line.startswith(b"{") and line.endswith(b"}\n")]
    events = {r["event"] for r in records}
    assert {"received", "change", "flag", "published", "rejected", "held", "skipped", TORN_EVENT} <= events
    torn = [r for r in records if r["event"] == TORN_EVENT][0]
    assert torn["file"] == AUDIT_NAME and not (OLD_LAB / AUDIT_NAME).read_bytes().count(b"torn-line")


def test_an_old_lab_verifies_with_its_torn_line_in_a_rotated_file(old_lab, capsys):
    code, out = run(capsys, "audit", "verify", str(old_lab.root), "--full")
    assert code == 0, out
    assert out.startswith("audit log intact: 51 records (seq 1–51) in 2 files; 3 published, 1 rejected")
    assert "audit-000000000001.jsonl line 34: a line cut short by a crash" in out


def test_an_old_lab_is_explained_by_order_id_and_by_file_name(old_lab, capsys):
    code, out = run(capsys, "explain", str(old_lab.root), "DP-1000")
    assert code == 0
    assert "Arrived:  progressive-minus-tilt-vertex-prism.json, 876 bytes" in out
    assert "Stage 5 of 7: tilt" in out and "lenses.right.prism: (not set) → 1.12Δ base 26.6°" in out
    assert "Final lens:" in out and "Outcome:  published, status " in out
    code, out = run(capsys, "explain", str(old_lab.root), "rejected-unknown-material.json")
    assert code == 0 and "Outcome:  rejected, not made" in out and "crystal-2.0" in out
    code, out = run(capsys, "explain", str(old_lab.root), "same-id-other")
    assert code == 0 and "held for a person, not processed" in out


def test_new_records_continue_an_old_chain_and_old_publications_count_as_duplicates(old_lab, capsys):
    resent = json.loads((OLD_LAB / "archive" / "sv-minus-mild.json").read_text(encoding="utf-8"))
    (old_lab.inbox / "resent-again.json").write_text(json.dumps(resent), encoding="utf-8")
    other = copy.deepcopy(resent)
    other["order_id"] = "NEW-0001"
    (old_lab.inbox / "new.json").write_text(json.dumps(other), encoding="utf-8")
    done = {p.name: p.outcome for p in old_lab.drain()}
    assert done == {"resent-again.json": "skipped", "new.json": "published"}
    code, out = run(capsys, "audit", "verify", str(old_lab.root), "--full")
    assert code == 0 and "4 published" in out
    code, out = run(capsys, "explain", str(old_lab.root), "NEW-0001")
    assert code == 0 and "Final lens:" in out
