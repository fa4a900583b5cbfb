"""``lenslane audit verify LAB`` on real lab folders: intact, tampered, torn by a crash, rotated."""
from __future__ import annotations

import copy
import hashlib
import json
import os

from lenslane.audit.log import AUDIT_NAME, canonical, record_hash
from lenslane.cli import main
from lenslane.lab.folder import Lab


def verify_cli(lab: Lab, capsys, *flags: str) -> tuple[int, list[str]]:
    code = main(["audit", "verify", str(lab.root), *flags])
    return code, capsys.readouterr().out.splitlines()


def log_lines(lab: Lab) -> list[bytes]:
    return (lab.root / AUDIT_NAME).read_bytes().split(b"\n")[:-1]


def rewrite(lab: Lab, lines: list[bytes]) -> None:
    (lab.root / AUDIT_NAME).write_bytes(b"\n".join(lines) + b"\n")


def middle_order_line(lines: list[bytes]) -> int:
    """The index of an order's record (with its changes) in the middle of the log."""
    changes = [i for i, line in enumerate(lines) if json.loads(line)["event"] == "published"]
    return changes[len(changes) // 2]


def test_an_intact_log_exits_0_with_a_one_line_summary(busy_lab, capsys):
    code, out = verify_cli(busy_lab, capsys)
    records = len(log_lines(busy_lab))
    assert code == 0 and len(out) == 1
    assert out[0].startswith(f"audit log intact: {records} records (seq 1–{records}) in 1 file")
    assert "5 published, 1 rejected; 5 outbox results match the log" in out[0]
    code, out = verify_cli(busy_lab, capsys)  # again: only what is new since the last check
    assert code == 0 and out[0].startswith(f"audit log intact: nothing new since seq {records}, verified before")


def test_an_edited_line_in_the_middle_is_named(busy_lab, capsys):
    lines = log_lines(busy_lab)
    index = middle_order_line(lines)
    lines[index] = lines[index].replace(b'"status":"ready"', b'"status":"review"', 1)
    assert lines[index] != log_lines(busy_lab)[index]
    rewrite(busy_lab, lines)
    code, out = verify_cli(busy_lab, capsys)
    assert code == 1
    assert out[0] == (f"audit log BROKEN at audit.jsonl line {index + 1} (seq {index + 1}): its content does not "
                      "match its hash: the record was edited")


def test_an_edit_with_a_recomputed_hash_breaks_the_link_to_the_next_record(busy_lab, capsys):
    lines = log_lines(busy_lab)
    index = middle_order_line(lines)
    record = json.loads(lines[index])
    record["changes"].reverse()  # the story told in another order
    record["hash"] = record_hash(record)
    lines[index] = canonical(record)
    rewrite(busy_lab, lines)
    code, out = verify_cli(busy_lab, capsys)
    assert code == 1
    assert f"audit.jsonl line {index + 1} (seq {index + 1}): its hash is not the prev of the next record" in out[0]


def test_a_removed_record_is_named(busy_lab, capsys):
    lines = log_lines(busy_lab)
    index = middle_order_line(lines)
    del lines[index]
    rewrite(busy_lab, lines)
    code, out = verify_cli(busy_lab, capsys)
    assert code == 1
    assert (f"line {index + 1} (seq {index + 2}): seq jumps from {index} to {index + 2}: record {index + 1} is "
            "missing (removed)") in out[0]


def test_reordered_records_are_named(busy_lab, capsys):
    lines = log_lines(busy_lab)
    index = middle_order_line(lines)
    lines[index], lines[index + 1] = lines[index + 1], lines[index]
    rewrite(busy_lab, lines)
    code, out = verify_cli(busy_lab, capsys)
    assert code == 1
    assert f"line {index + 1} (seq {index + 2}): it comes where seq {index + 1} was expected" in out[0]
    assert "records were reordered" in out[0]


def test_an_inserted_record_is_named_even_when_it_is_chained(busy_lab, capsys):
    lines = log_lines(busy_lab)
    index = middle_order_line(lines)
    before = json.loads(lines[index])
    forged = {**before, "status": "ready", "seq": before["seq"] + 1, "prev": before["hash"]}
    forged["hash"] = record_hash(forged)
    lines.insert(index + 1, canonical(forged))
    rewrite(busy_lab, lines)
    code, out = verify_cli(busy_lab, capsys)
    assert code == 1
    assert out[0].startswith(f"audit log BROKEN at audit.jsonl line {index + 2} (seq {index + 2}): "
                             "this record was inserted")


def test_a_copied_record_is_named(busy_lab, capsys):
    lines = log_lines(busy_lab)
    index = middle_order_line(lines)
    lines.insert(index + 1, lines[index])
    rewrite(busy_lab, lines)
    code, out = verify_cli(busy_lab, capsys)
    assert code == 1 and f"line {index + 2} (seq {index + 1}): a copy of the record on" in out[0]


def test_a_line_cut_short_in_the_middle_is_a_failure(busy_lab, capsys):
    lines = log_lines(busy_lab)
    index = middle_order_line(lines)
    lines[index] = lines[index][:60]
    rewrite(busy_lab, lines)
    code, out = verify_cli(busy_lab, capsys)
    assert code == 1
    assert out[0].startswith(f"audit log BROKEN at audit.jsonl line {index + 1}: not a whole record")


def test_a_torn_tail_from_a_crash_is_tolerated_reported_and_closed_at_restart(busy_lab, drop, order_dict, capsys):
    # Crash after the result was published, while its records were being written.
    order = copy.deepcopy(order_dict)
    order["order_id"] = "TST-0009"
    drop(busy_lab, order)
    busy_lab.drain()
    path = busy_lab.root / AUDIT_NAME
    path.write_bytes(path.read_bytes()[:-50])
    os.rename(busy_lab.archive / "TST-0009.json", busy_lab.work / "TST-0009.json")  # not archived yet

    code, out = verify_cli(busy_lab, capsys)
    assert code == 0 and out[0].startswith("audit log intact")
    assert any("the log ends with a line cut short by a crash" in line for line in out[1:])
    assert any("outbox/TST-0009.json: its order is still in work/" in line for line in out[1:])

    restarted = Lab(busy_lab.root, busy_lab.host)  # opening the log closes the torn line
    [redone] = restarted.drain()
    assert redone.order_id == "TST-0009" and redone.outcome == "published"

    code, out = verify_cli(busy_lab, capsys)
    assert code == 0 and "1 tolerated crash artefact" in out[0]
    assert "closed by the engine's torn-line record" in out[1]


def test_a_fake_torn_line_cannot_hide_an_edit(busy_lab, capsys):
    # Replace a record by garbage and add a torn-line record that accounts for it exactly.
    lines = log_lines(busy_lab)
    index = middle_order_line(lines)
    previous = json.loads(lines[index - 1])
    garbage = b'{"changes":[["0123456789abcdef",[1.0'
    torn = {"event": "torn-line", "after_seq": previous["seq"], "size": len(garbage) + 1,
            "sha256": hashlib.sha256(garbage + b"\n").hexdigest(), "note": "",
            "seq": previous["seq"] + 1, "ts": previous["ts"], "prev": previous["hash"]}
    torn["hash"] = record_hash(torn)
    lines[index:index + 1] = [garbage, canonical(torn)]
    rewrite(busy_lab, lines)
    code, out = verify_cli(busy_lab, capsys)
    assert code == 1
    assert f"line {index + 2} (seq {index + 1}): its hash is not the prev of the next record" in out[0]


def test_a_changed_result_file_is_named(busy_lab, capsys):
    result = busy_lab.outbox / "TST-0003.json"
    result.write_bytes(result.read_bytes().replace(b'"ready"', b'"review"'))
    code, out = verify_cli(busy_lab, capsys)
    assert code == 1
    assert out[0].startswith("audit log BROKEN at outbox/TST-0003.json (seq ")
    assert "the result was changed after it was published" in out[0]


def test_results_taken_from_the_outbox_are_counted_not_failed(busy_lab, capsys):
    (busy_lab.outbox / "TST-0002.json").unlink()
    code, out = verify_cli(busy_lab, capsys)
    assert code == 0 and "4 outbox results match the log, 1 no longer where a record placed them" in out[0]


def test_a_result_no_record_accounts_for_is_a_failure(busy_lab, capsys):
    (busy_lab.outbox / "TST-0077.json").write_text("{}", encoding="utf-8")
    code, out = verify_cli(busy_lab, capsys)
    assert code == 1 and "outbox/TST-0077.json: no published record in the audit log" in out[0]


def test_a_rotated_log_verifies_across_files_and_a_removed_file_is_caught(make_lab, drop, order_dict, capsys):
    lab = make_lab({"audit": {"rotate_bytes": 1500}})
    for number in range(1, 7):
        order = copy.deepcopy(order_dict)
        order["order_id"] = f"ROT-{number:04d}"
        drop(lab, order)
    lab.drain()
    rotated = sorted(p.name for p in lab.root.glob("audit-*.jsonl"))
    assert len(rotated) >= 2

    code, out = verify_cli(lab, capsys)
    assert code == 0 and f"in {len(rotated) + 1} files" in out[0]

    (lab.root / rotated[1]).unlink()
    code, out = verify_cli(lab, capsys)  # from the point verified before: the files before it are looked at
    assert code == 1 and f"{rotated[1]}" in out[0] and "verified before, is gone" in out[0]
    code, out = verify_cli(lab, capsys, "--full")
    assert code == 1 and "missing (removed)" in out[0]

    (lab.root / rotated[0]).unlink()
    code, out = verify_cli(lab, capsys, "--full")
    assert code == 1 and "the chain starts with seq" in out[0] and "oldest audit files" in out[0]


def test_a_reference_must_name_a_define_of_its_kind_written_before_it(busy_lab, capsys):
    lines = log_lines(busy_lab)
    records = [json.loads(line) for line in lines]
    published = [r for r in records if r["event"] == "published"][-1]
    flag_define = next(r["seq"] for r in records if r["event"] == "define" and r["kind"] == "flag")
    for item, problem in ((f"{flag_define} 0", f"refers to {flag_define} as a change, but that define record holds "
                                               "a flag"),
                          (f"{len(records) + 5} 0", f"refers to {len(records) + 5}, which no define record before it")):
        forged = {k: v for k, v in published.items() if k != "hash"}
        forged.update(seq=len(records) + 1, prev=records[-1]["hash"], changes=[item, *published["changes"][1:]])
        forged["hash"] = record_hash(forged)
        rewrite(busy_lab, [*lines, canonical(forged)])
        code, out = verify_cli(busy_lab, capsys, "--full")
        assert code == 1 and problem in out[0], out
