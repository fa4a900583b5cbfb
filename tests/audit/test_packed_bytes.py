"""The third format's bytes stay as they are: the same batches of events write the same log, byte for byte.

``fixtures/packed_batches`` was made by ``fixtures/make_packed_batches.py`` with the code of commit db5d741
installed: the events the engine handed to the audit log while draining the sample orders and some of the
benchmark's generated orders, and a person's approval, cut into batches; and the log that version wrote for
them with its clock stopped. The expected bytes are that older code's own output, kept on purpose as a
regression check for changes made for speed (they check no computation against an outside source: the
format's own tests in test_records.py do that).
"""
from __future__ import annotations

import gzip
import json
from pathlib import Path

import pytest

from lenslane.audit import writer
from lenslane.audit.index import Index
from lenslane.audit.reader import iter_records
from lenslane.audit.records import AUDIT_NAME, STORY_FIELDS, canonical, unpack
from lenslane.cli import main

FIXTURE = Path(__file__).parent / "fixtures" / "packed_batches"


def batches() -> list[list[dict]]:
    """The fixture's batches, the events of each sharing one run (one dict, as the engine's do)."""
    recorded = json.loads(gzip.decompress((FIXTURE / "events.json.gz").read_bytes()))
    out = []
    for batch in recorded["batches"]:
        runs = [dict(run) for run in recorded["runs"]]  # a fresh run per batch, shared by its events
        out.append([dict(event, run=runs[event["run"]]) if "run" in event else event for event in batch])
    return out


@pytest.fixture(scope="module")
def expected() -> list[bytes]:
    return gzip.decompress((FIXTURE / f"{AUDIT_NAME}.gz").read_bytes()).splitlines(keepends=True)


@pytest.fixture
def stopped_clock(monkeypatch, expected):
    monkeypatch.setattr(writer, "utc_now", lambda: json.loads(expected[0])["ts"])


def assert_same_lines(written: list[bytes], expected: list[bytes]) -> None:
    for number, (line, old) in enumerate(zip(written, expected), 1):
        assert line == old, f"line {number} differs:\n{line[:400]!r}\nexpected\n{old[:400]!r}"
    assert len(written) == len(expected)


def test_the_fixture_holds_the_story_forms_and_the_index_lookups_it_is_meant_to():
    recorded = batches()
    events = [event for batch in recorded for event in batch]
    assert {"published", "rejected", "decided"} <= {event["event"] for event in events}
    assert len(recorded) > 3 and sum(len(event.get("changes", [])) for event in events) > 200


def test_the_same_batches_write_the_same_log(tmp_path, stopped_clock, expected, capsys):
    log = writer.AuditLog(tmp_path / AUDIT_NAME)
    for batch in batches():
        log.append(batch)
    log.close()
    assert_same_lines((tmp_path / AUDIT_NAME).read_bytes().splitlines(keepends=True), expected)
    assert main(["audit", "verify", str(tmp_path), "--full"]) == 0, capsys.readouterr().out
    # The index kept level while appending holds what one rebuilt from the log holds.
    live = Index(tmp_path).snapshot()
    rebuilt = Index(tmp_path)
    rebuilt.rebuild()
    assert rebuilt.snapshot() == live


def test_one_event_at_a_time_writes_the_same_log_and_each_story_reads_back_as_handed_over(tmp_path, stopped_clock,
                                                                                          expected):
    log = writer.AuditLog(tmp_path / AUDIT_NAME)
    events = [event for batch in batches() for event in batch]
    for event in events:
        log.append([event])  # a define the batch wrote is found in the index instead
    log.close()
    assert_same_lines((tmp_path / AUDIT_NAME).read_bytes().splitlines(keepends=True), expected)
    index = Index(tmp_path)
    told = [unpack(record, index.body) for record in iter_records(tmp_path) if record["event"] != "define"]
    for event, record in zip(events, told, strict=True):
        for name in STORY_FIELDS:
            assert canonical(record.get(name)) == canonical(event.get(name))


def test_a_log_whose_index_was_rebuilt_between_batches_goes_on_with_the_same_bytes(tmp_path, stopped_clock,
                                                                                    expected):
    recorded = batches()
    for part in (recorded[:2], recorded[2:]):
        log = writer.AuditLog(tmp_path / AUDIT_NAME)
        for batch in part:
            log.append(batch)
        log.close()
        Index(tmp_path).rebuild()  # the defines are found again by what a rebuild derives from the log
    assert_same_lines((tmp_path / AUDIT_NAME).read_bytes().splitlines(keepends=True), expected)
