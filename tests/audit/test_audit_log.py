"""The audit log's chain: hashing, torn lines after a crash, rotation, failed writes."""
from __future__ import annotations

import errno
import hashlib
import json
import os
import tempfile
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from lenslane.audit import records as audit
from lenslane.audit import writer
from lenslane.audit.log import AUDIT_NAME, TORN_EVENT, AuditError, AuditLog, iter_records, verify


def events(count: int, order_id: str = "TST-0001") -> list[dict]:
    return [{"event": "flag", "order_id": order_id, "code": f"c{i}", "level": "info", "message": "m"}
            for i in range(count)]


def lines_of(path: Path) -> list[bytes]:
    return path.read_bytes().split(b"\n")


def test_each_record_is_chained_by_the_sha256_of_its_canonical_json(tmp_path):
    log = AuditLog(tmp_path / AUDIT_NAME)
    written = log.append(events(3))
    on_disk = [json.loads(line) for line in (tmp_path / AUDIT_NAME).read_text(encoding="utf-8").splitlines()]
    assert on_disk == written
    previous = "0" * 64  # the chain starts from 64 zeros
    for seq, record in enumerate(on_disk, start=1):
        body = {k: v for k, v in record.items() if k != "hash"}
        # Source: FIPS 180-4 SHA-256 (hashlib) over JSON with sorted keys and no spaces (RFC 8259 text).
        expected = hashlib.sha256(json.dumps(body, sort_keys=True, separators=(",", ":"),
                                             ensure_ascii=False).encode()).hexdigest()
        assert (record["seq"], record["prev"], record["hash"]) == (seq, previous, expected)
        assert record["ts"].endswith("Z")  # UTC
        previous = record["hash"]


def test_reopening_the_log_continues_the_chain(tmp_path):
    first = AuditLog(tmp_path / AUDIT_NAME).append(events(2))
    again = AuditLog(tmp_path / AUDIT_NAME).append(events(1))
    assert again[0]["seq"] == 3 and again[0]["prev"] == first[-1]["hash"]
    assert [r["seq"] for r in iter_records(tmp_path)] == [1, 2, 3]


def test_a_torn_last_line_is_closed_and_recorded_when_the_log_is_opened(tmp_path):
    path = tmp_path / AUDIT_NAME
    whole = AuditLog(path).append(events(2))
    torn = b'{"code":"c9","event":"flag","hash":"ab'
    with open(path, "ab") as handle:  # a crash in the middle of the next write
        handle.write(torn)

    log = AuditLog(path)
    after = log.append(events(1))

    lines = lines_of(path)
    assert lines[2] == torn  # closed with a newline, kept as it was
    record = json.loads(lines[3])
    assert record["event"] == TORN_EVENT and record["seq"] == 3 and record["prev"] == whole[-1]["hash"]
    assert record["size"] == len(torn) + 1 and record["sha256"] == hashlib.sha256(torn + b"\n").hexdigest()
    assert after[0]["seq"] == 4 and after[0]["prev"] == record["hash"]
    assert [r["seq"] for r in iter_records(tmp_path)] == [1, 2, 3, 4]
    report = verify(tmp_path)
    assert report.ok and len(report.notes) == 1 and "line 3" in report.notes[0]


def test_a_crash_while_closing_a_torn_line_is_closed_again_as_one(tmp_path):
    path = tmp_path / AUDIT_NAME
    AuditLog(path).append(events(1))
    with open(path, "ab") as handle:  # torn, closed, and the torn-line record itself torn
        handle.write(b'{"event":"fl\n{"event":"torn-li')
    AuditLog(path).append(events(1))
    report = verify(tmp_path)
    assert report.ok, report.summary()
    assert [r["event"] for r in iter_records(tmp_path)] == ["flag", TORN_EVENT, "flag"]


def test_a_whole_last_record_without_its_newline_is_kept(tmp_path):
    path = tmp_path / AUDIT_NAME
    AuditLog(path).append(events(2))
    path.write_bytes(path.read_bytes()[:-1])  # the newline never reached the disk
    AuditLog(path).append(events(1))
    assert [r["seq"] for r in iter_records(tmp_path)] == [1, 2, 3]
    assert verify(tmp_path).ok and not verify(tmp_path).notes


def test_a_failed_write_does_not_advance_the_chain(tmp_path, monkeypatch):
    path = tmp_path / AUDIT_NAME
    log = AuditLog(path)
    log.append(events(1))
    real_write = os.write

    def part_then_disk_full(fd, data):
        real_write(fd, bytes(data[: len(data) // 3]))  # less than the batch's first record
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(writer.os, "write", part_then_disk_full)
    with pytest.raises(OSError):
        log.append(events(2))
    monkeypatch.setattr(writer.os, "write", real_write)
    assert log.seq == 1

    later = log.append(events(1))  # the part-written batch is found and closed first

    assert [r["event"] for r in iter_records(tmp_path)] == ["flag", TORN_EVENT, "flag"]
    assert later[0]["seq"] == 3
    assert verify(tmp_path).ok


def test_rotation_by_size_keeps_the_chain_across_files(tmp_path):
    path = tmp_path / AUDIT_NAME
    log = AuditLog(path, rotate_bytes=600)
    for _ in range(5):
        log.append(events(2))
    names = sorted(p.name for p in tmp_path.iterdir() if p.suffix == ".jsonl")
    assert len(names) > 2 and names[-1] == AUDIT_NAME
    for name in names[:-1]:  # each rotated file is named after its first record
        first = json.loads(lines_of(tmp_path / name)[0])
        assert name == f"audit-{first['seq']:012d}.jsonl"
    assert [r["seq"] for r in iter_records(tmp_path)] == list(range(1, 11))
    report = verify(tmp_path)
    assert report.ok and report.records == 10 and len(report.files) == len(names)


def test_rotation_by_day_starts_a_new_file_when_the_utc_day_changes(tmp_path, monkeypatch):
    clock = iter(["2026-11-30T23:59:59.000000Z", "2026-11-30T23:59:59.500000Z", "2026-12-01T00:00:00.100000Z"])
    monkeypatch.setattr(writer, "utc_now", lambda: next(clock))
    log = AuditLog(tmp_path / AUDIT_NAME, rotate_period="day")
    log.append(events(1))
    log.append(events(1))
    log.append(events(1))
    assert sorted(p.name for p in tmp_path.glob("*.jsonl")) == ["audit-000000000001.jsonl", AUDIT_NAME]
    assert json.loads(lines_of(tmp_path / AUDIT_NAME)[0])["seq"] == 3
    assert verify(tmp_path).ok


def test_a_log_reopened_between_rotation_and_the_next_record_continues_from_the_rotated_file(tmp_path):
    log = AuditLog(tmp_path / AUDIT_NAME, rotate_bytes=1)
    last = log.append(events(2))[-1]
    os.rename(tmp_path / AUDIT_NAME, tmp_path / "audit-000000000001.jsonl")  # as a rotation leaves it
    again = AuditLog(tmp_path / AUDIT_NAME, rotate_bytes=1).append(events(1))
    assert again[0]["seq"] == 3 and again[0]["prev"] == last["hash"]
    assert verify(tmp_path).ok


def test_rotation_never_overwrites_an_existing_file(tmp_path):
    log = AuditLog(tmp_path / AUDIT_NAME, rotate_bytes=1)
    log.append(events(1))
    (tmp_path / "audit-000000000001.jsonl").write_bytes(b"kept\n")
    with pytest.raises(AuditError, match="already exists"):
        log.append(events(1))
    assert (tmp_path / "audit-000000000001.jsonl").read_bytes() == b"kept\n"


def test_an_empty_log_is_intact():
    with tempfile.TemporaryDirectory() as folder:
        (Path(folder) / AUDIT_NAME).touch()
        report = verify(Path(folder))
        assert report.ok and report.summary() == "audit log intact: no records yet"


# --------------------------------------------------------------------------
# Properties: any batches chain; any removal, swap or edit before the end breaks it
# --------------------------------------------------------------------------

batches = st.lists(st.integers(min_value=1, max_value=4), min_size=2, max_size=6)


def _written(folder: Path, sizes: list[int]) -> list[bytes]:
    log = AuditLog(folder / AUDIT_NAME)
    for size in sizes:
        log.append(events(size))
    return lines_of(folder / AUDIT_NAME)[:-1]


@settings(max_examples=40, deadline=None)
@given(batches)
def test_any_sequence_of_batches_verifies(sizes):
    with tempfile.TemporaryDirectory() as folder:
        _written(Path(folder), sizes)
        report = verify(Path(folder))
        assert report.ok and report.records == sum(sizes)


@settings(max_examples=60, deadline=None)
@given(batches, st.data())
def test_removing_swapping_or_editing_a_record_before_the_last_is_caught(sizes, data):
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / AUDIT_NAME
        lines = _written(Path(folder), sizes)
        index = data.draw(st.integers(min_value=0, max_value=len(lines) - 2))
        tamper = data.draw(st.sampled_from(["remove", "swap", "edit", "edit-and-rehash"]))
        if tamper == "remove":
            del lines[index]
        elif tamper == "swap":
            lines[index], lines[index + 1] = lines[index + 1], lines[index]
        else:
            record = json.loads(lines[index])
            record["message"] = "changed"
            if tamper == "edit-and-rehash":
                record["hash"] = audit.record_hash(record)
            lines[index] = audit.canonical(record)
        path.write_bytes(b"\n".join(lines) + b"\n")
        report = verify(Path(folder))
        assert not report.ok
        kind = report.breaks[0].kind
        expected = {"remove": {"removed", "truncated-start"}, "swap": {"reordered", "truncated-start"},
                    "edit": {"edited"}, "edit-and-rehash": {"edited"}}[tamper]
        assert kind in expected, report.summary()
