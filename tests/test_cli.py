"""The commands end to end, as a user runs them, on a temporary lab folder."""
from __future__ import annotations

import json
import os
import shutil
import sqlite3
import subprocess
import sys

import pytest

from lenslane.contract.models import LensOrderResult
from tests.conftest import SAMPLES

SAMPLE_FILES = sorted(SAMPLES.glob("*.json"))
REJECTED_SAMPLES = [p for p in SAMPLE_FILES if p.name.startswith("rejected-")]
GOOD_SAMPLES = [p for p in SAMPLE_FILES if not p.name.startswith("rejected-")]


def lenslane(*args, check=True):
    done = subprocess.run([sys.executable, "-m", "lenslane.cli", *map(str, args)],
                          capture_output=True, text=True, timeout=120)
    if check and done.returncode != 0:
        raise AssertionError(f"lenslane {args} exited {done.returncode}:\n{done.stdout}\n{done.stderr}")
    return done


def test_samples_cover_the_required_cases():
    assert len(GOOD_SAMPLES) >= 10 and len(REJECTED_SAMPLES) >= 2
    orders = [json.loads(p.read_text()) for p in GOOD_SAMPLES]
    designs = {o["lens"]["design"] for o in orders}
    assert designs == {"single_vision", "progressive", "bifocal"}
    spheres = [e["sphere"] for o in orders for e in o["rx"].values() if isinstance(e, dict)]
    assert min(spheres) < 0 < max(spheres)
    assert any(e.get("cylinder", 0) > 0 for o in orders for e in o["rx"].values() if isinstance(e, dict))
    assert any(e.get("prism") for o in orders for e in o["rx"].values() if isinstance(e, dict))
    assert any("pantoscopic_deg" in o["fit"] or "face_form_deg" in o["fit"] for o in orders)
    assert any("vertex_mm" in o["fit"] for o in orders)
    assert any("outline_mm" in o["frame"] for o in orders)


def test_init_is_idempotent_and_never_overwrites_a_config(tmp_path):
    lab = tmp_path / "lab"
    out = lenslane("init", lab).stdout
    assert "created" in out
    for folder in ("inbox", "outbox", "rejected", "archive"):
        assert (lab / folder).is_dir()
    assert (lab / "audit.jsonl").read_bytes() == b""
    with sqlite3.connect(lab / "audit.sqlite") as index:  # the log's index, as empty as the log
        assert index.execute("SELECT count(*) FROM records").fetchone() == (0,)
    assert "[engine]" in (lab / "lenslane.toml").read_text()
    (lab / "lenslane.toml").write_text("# the lab's own\n")
    assert "nothing changed" in lenslane("init", lab).stdout
    assert (lab / "lenslane.toml").read_text() == "# the lab's own\n"


def test_watch_once_drains_the_samples(tmp_path):
    lab = tmp_path / "lab"
    lenslane("init", lab)
    for sample in SAMPLE_FILES:
        shutil.copy(sample, lab / "inbox")
    summary = lenslane("watch", lab, "--once").stdout.strip().splitlines()[-1]
    assert f"{len(SAMPLE_FILES)} orders" in summary and f"{len(REJECTED_SAMPLES)} rejected" in summary

    assert sorted(os.listdir(lab / "inbox")) == []
    assert sorted(os.listdir(lab / "archive")) == sorted(p.name for p in GOOD_SAMPLES)
    for sample in GOOD_SAMPLES:
        order = json.loads(sample.read_text())
        published = [lab / folder / f"{order['order_id']}.json" for folder in ("outbox", "review")]
        assert [path.exists() for path in published].count(True) == 1
        result = json.loads(next(path for path in published if path.exists()).read_text())
        # A result that needs a person waits in review/; outbox/ holds only what may be made without one.
        assert (result["status"] == "review") == published[1].exists()
        LensOrderResult.model_validate(result)  # the contract's result shape
        assert result["order"] == order
        assert set(result["lenses"]) == {e for e in ("right", "left") if e in order["rx"]}
        assert "licensed" in result["caution"]
    for sample in REJECTED_SAMPLES:
        assert (lab / "rejected" / sample.name).exists()
        report = json.loads((lab / "rejected" / f"{sample.name}.errors.json").read_text())
        assert report["problems"] and all(p["field"] and p["message"] for p in report["problems"])
    assert not [n for n in os.listdir(lab / "outbox") if n.startswith(".")]


def test_rejected_reports_name_the_field(tmp_path):
    lab = tmp_path / "lab"
    lenslane("init", lab)
    shutil.copy(SAMPLES / "rejected-cylinder-without-axis.json", lab / "inbox")
    lenslane("watch", lab, "--once")
    report = json.loads((lab / "rejected" / "rejected-cylinder-without-axis.json.errors.json").read_text())
    assert report["problems"] == [{"field": "rx.right.axis", "message": "required when cylinder is not zero"}]


def test_preview_prints_the_result_and_writes_nothing(tmp_path):
    sample = SAMPLES / "sv-plus-cylinder-form.json"
    before = {p: p.stat().st_mtime_ns for p in SAMPLES.iterdir()}
    result = json.loads(lenslane("preview", sample).stdout)
    assert result["format"] == "lens-order-result/1"
    assert result["lenses"]["right"]["rx"]["cylinder"] < 0
    assert {p: p.stat().st_mtime_ns for p in SAMPLES.iterdir()} == before


def test_preview_of_a_bad_order_lists_its_problems():
    done = lenslane("preview", SAMPLES / "rejected-sphere-out-of-range.json", check=False)
    assert done.returncode == 1
    fields = {p["field"] for p in json.loads(done.stdout)["problems"]}
    assert fields == {"rx.right.sphere", "rx.left.sphere"}


def test_plugins_lists_the_chain_with_origin_and_version():
    out = lenslane("plugins").stdout
    for stage in ("validate", "normalize", "prism"):
        assert any(line.startswith(stage) and "built-in" in line for line in out.splitlines())
    [prism] = [line for line in out.splitlines() if line.startswith("prism ")]
    assert prism.endswith("  resultant prescribed prism per eye")  # the stage's own one line


def test_schema_prints_the_input_and_the_result_schema():
    assert json.loads(lenslane("schema").stdout)["title"] == "lens-order/1"
    assert json.loads(lenslane("schema", "--result").stdout)["title"] == "lens-order-result/1"


def test_a_bad_config_stops_watch_with_the_key_path(tmp_path):
    lab = tmp_path / "lab"
    lenslane("init", lab)
    (lab / "lenslane.toml").write_text('[engine]\nchain = ["validate", "nosuch"]\n')
    done = lenslane("watch", lab, "--once", check=False)
    assert done.returncode == 2
    assert "engine.chain[1]" in done.stderr and "nosuch" in done.stderr


@pytest.mark.parametrize("command", [[], ["init"], ["watch"], ["preview"], ["plugins"], ["schema"]])
def test_every_command_has_help(command):
    out = lenslane(*command, "--help").stdout
    assert "usage: lenslane" in out


@pytest.mark.parametrize("command", [["schema"], ["schema", "--result"], ["plugins"]])
def test_a_reader_that_went_away_gets_no_traceback(command):
    # `lenslane schema | head -1` with head gone before the command writes: the write fails, the command ends quietly.
    read, write = os.pipe()
    os.close(read)  # closed before the child has started, so its first write meets a pipe without a reader
    child = subprocess.Popen([sys.executable, "-m", "lenslane.cli", *command], stdout=write, stderr=subprocess.PIPE)
    os.close(write)
    _, errors = child.communicate(timeout=60)
    assert errors == b""
    assert child.returncode == 1


@pytest.mark.parametrize("command", [
    ["watch", "{lab}", "--once"], ["status", "{lab}"], ["explain", "{lab}", "DP-1000"], ["queue", "{lab}"],
    ["audit", "verify", "{lab}"], ["audit", "checkpoint", "{lab}"], ["audit", "reindex", "{lab}"],
    ["decide", "{lab}", "DP-1000", "approve", "--by", "tech-01", "--note", "checked"], ["serve", "{lab}"],
    ["plugins", "--lab", "{lab}"],
])
def test_a_folder_that_is_not_a_lab_is_refused_and_left_as_it_was(tmp_path, command):
    # A mistyped path is said to be one: never "audit log intact", an empty queue, or a new lab made in it.
    folder = tmp_path / "not-a-lab"
    folder.mkdir()
    (folder / "notes.txt").write_text("the lab's own\n")
    done = lenslane(*[part.format(lab=folder) for part in command], check=False)
    assert done.returncode == 2, done.stdout + done.stderr
    assert done.stderr.strip() == f"lenslane: {folder} is not a lab folder (make one with `lenslane init {folder}`)"
    assert sorted(p.name for p in folder.iterdir()) == ["notes.txt"]
