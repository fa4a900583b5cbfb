"""Lab folders written by earlier audit formats are still read, verified and explained, and their chains go on.

The first format (commit 17702d2) wrote a record per event; the second (commit 0e2601a) one record per pass
with its story as ``[ref, [numbers…]]`` pairs of ``shape`` defines named by hash.

``fixtures/old_lab`` was made by that version (``fixtures/make_old_lab.py``): three orders, a line cut
short by a crash and closed by the old engine's ``torn-line`` record (which names ``audit.jsonl``), a
rotation that moved it into ``audit-000000000001.jsonl``, then a resend, a same-id order held and one more.
``fixtures/shapes_lab`` was made by the second (``fixtures/make_shapes_lab.py``): the same, a review and a
person's approval, and that version's index (schema 1) beside the log.
"""
from __future__ import annotations

import contextlib
import copy
import json
import shutil
import sqlite3
from pathlib import Path

import pytest

from lenslane.audit.index import INDEX_NAME, SCHEMA, Index
from lenslane.audit.records import AUDIT_NAME, TORN_EVENT
from lenslane.cli import main
from lenslane.lab.folder import Lab
from lenslane.report import order_story

OLD_LAB = Path(__file__).parent / "fixtures" / "old_lab"


def copied_lab(fixture: Path, tmp_path: Path, host, folders: tuple[str, ...]) -> Lab:
    """A copy of a fixture lab folder to work in, with the empty folders git does not keep."""
    root = tmp_path / fixture.name
    shutil.copytree(fixture, root)
    for name in folders:
        (root / name).mkdir(exist_ok=True)
    return Lab(root, host)


def fixture_records(fixture: Path) -> list[dict]:
    """The whole records of a fixture lab's audit files (a torn line left out)."""
    return [json.loads(line) for path in sorted(fixture.glob("audit*.jsonl")) for line in open(path, "rb")
            if line.startswith(b"{") and line.endswith(b"}\n")]


@pytest.fixture
def old_lab(tmp_path, default_host):
    return copied_lab(OLD_LAB, tmp_path, default_host, ("inbox", "work"))


def run(capsys, *argv: str) -> tuple[int, str]:
    code = main(list(argv))
    return code, capsys.readouterr().out


def test_the_fixture_is_in_the_first_format():
    records = fixture_records(OLD_LAB)
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


# --------------------------------------------------------------------------
# The second format: one record per pass, story items as [ref, [numbers…]] of shape defines named by hash
# --------------------------------------------------------------------------

SHAPES_LAB = Path(__file__).parent / "fixtures" / "shapes_lab"


@pytest.fixture
def shapes_lab(tmp_path, default_host):
    """``fixtures/shapes_lab``, written by the second format (``fixtures/make_shapes_lab.py``), index included."""
    return copied_lab(SHAPES_LAB, tmp_path, default_host, ("inbox", "work", "review", "decisions"))


def test_the_fixture_is_in_the_second_format():
    records = fixture_records(SHAPES_LAB)
    published = [r for r in records if r["event"] == "published"]
    assert published and all(isinstance(r["run"], str) and all(isinstance(c[0], str) and isinstance(c[1], list)
                                                                for c in r["changes"]) for r in published)
    assert {r["kind"] for r in records if r["event"] == "define"} == {"shape", "run", "config"}
    with sqlite3.connect(SHAPES_LAB / INDEX_NAME) as db:  # its index, as that version wrote it
        assert db.execute("SELECT value FROM meta WHERE key='schema'").fetchone() == (1,)


def test_a_second_format_lab_verifies_and_its_index_is_rebuilt_in_this_schema(shapes_lab, capsys):
    code, out = run(capsys, "audit", "verify", str(shapes_lab.root), "--full")
    assert code == 0, out
    assert out.startswith("audit log intact: 53 records (seq 1–53) in 2 files; 4 published, 1 rejected")
    assert "a line cut short by a crash" in out
    with contextlib.closing(Index(shapes_lab.root)) as index:
        assert index.meta("schema") == SCHEMA and index.tail().seq == 53
        live = index.snapshot()
        index.rebuild()
        assert index.snapshot() == live


def test_a_second_format_lab_tells_the_stories_its_results_were_published_with(shapes_lab, capsys):
    # Each story from the log alone equals the result file the engine published with it (outbox/, checked
    # against the sha256 the log recorded by verify above): lenses, every change and every flag.
    for path in sorted((shapes_lab.root / "outbox").glob("*.json")):
        result = json.loads(path.read_text(encoding="utf-8"))
        story = [p for p in order_story(shapes_lab.root, path.stem)["processings"] if p["lenses"]][-1]
        assert story["lenses"] == result["lenses"], path.name
        changes = [c for stage in story["stages"] for c in stage["changes"]]
        assert [(c["field"], c["before"], c["after"], c["reason"], c["method"], c["source"], c["inputs"])
                for c in changes] == [(c["field"], c["before"], c["after"], c["reason"], c["method"], c["source"],
                                       c["inputs"]) for c in result["changes"]], path.name
        assert [(f["code"], f["message"], f["values"]) for f in story["flags"]] == [
            (f["code"], f["message"], f.get("values") or {}) for f in result["flags"]], path.name
    code, out = run(capsys, "explain", str(shapes_lab.root), "rejected-unknown-material")
    assert code == 0 and "Outcome:  rejected, not made" in out and "crystal-2.0" in out
    code, out = run(capsys, "explain", str(shapes_lab.root), "DP-1011", "--config")
    assert code == 0 and "approve" in out and "QA-7" in out
    assert "Configuration in force (sha256 " in out and '"rotate_bytes"' in out


@pytest.mark.parametrize("which, published", [("old_lab", 4), ("shapes_lab", 5)])
def test_new_records_continue_an_older_chain_and_its_publications_count_as_duplicates(which, published, request,
                                                                                       capsys):
    lab = request.getfixturevalue(which)
    resent = json.loads((lab.root / "archive" / "sv-minus-mild.json").read_text(encoding="utf-8"))
    (lab.inbox / "resent-again.json").write_text(json.dumps(resent), encoding="utf-8")
    other = copy.deepcopy(resent)
    other["order_id"] = "NEW-0001"
    (lab.inbox / "new.json").write_text(json.dumps(other), encoding="utf-8")
    done = {p.name: p.outcome for p in lab.drain()}
    assert done == {"resent-again.json": "skipped", "new.json": "published"}
    code, out = run(capsys, "audit", "verify", str(lab.root), "--full")
    assert code == 0 and f"{published} published" in out, out
    new = [json.loads(line) for line in open(lab.root / AUDIT_NAME, "rb") if b'"NEW-0001"' in line]
    assert isinstance(new[-1]["run"], int) and all(isinstance(item, str) for item in new[-1]["changes"])  # this format
    result = json.loads((lab.root / "outbox" / "NEW-0001.json").read_text(encoding="utf-8"))
    assert order_story(lab.root, "NEW-0001")["processings"][-1]["lenses"] == result["lenses"]
    code, out = run(capsys, "explain", str(lab.root), "NEW-0001")
    assert code == 0 and "Final lens:" in out
