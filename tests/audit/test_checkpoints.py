"""Checkpoints catch what the chain alone cannot: a consistent rewrite, a log cut short, a forged checkpoint."""
from __future__ import annotations

import copy
import json
import subprocess
import sys

from lenslane.audit.records import AUDIT_NAME, canonical, record_hash
from lenslane.cli import main


def run(capsys, *argv: str) -> tuple[int, list[str]]:
    code = main(list(argv))
    return code, capsys.readouterr().out.splitlines()


def checkpoint(lab, capsys, path, *flags):
    code, out = run(capsys, "audit", "checkpoint", str(lab.root), *flags)
    assert code == 0 and len(out) == 1
    path.write_text(out[0] + "\n", encoding="utf-8")
    return json.loads(out[0])


def rewrite_consistently(path, seq):
    """Change one published record's status and recompute every hash from it on, as a forger would."""
    lines = path.read_bytes().splitlines()
    prev = None
    for number, line in enumerate(lines):
        record = json.loads(line)
        if record["seq"] == seq:
            assert record["event"] == "published"
            record["status"] = "review" if record["status"] == "ready" else "ready"
        if prev is not None:
            record["prev"] = prev
        if record["seq"] >= seq:
            record["hash"] = record_hash(record)
            lines[number] = canonical(record)
        prev = record["hash"]
    path.write_bytes(b"\n".join(lines) + b"\n")


def test_a_consistent_rewrite_verifies_alone_but_not_against_a_checkpoint(busy_lab, capsys, tmp_path):
    kept = checkpoint(busy_lab, capsys, tmp_path / "kept.txt")
    first_published = [json.loads(line)["seq"] for line in (busy_lab.root / AUDIT_NAME).read_bytes().splitlines()
                       if json.loads(line)["event"] == "published"][0]
    rewrite_consistently(busy_lab.root / AUDIT_NAME, first_published)

    code, out = run(capsys, "audit", "verify", str(busy_lab.root), "--full")
    assert code == 0 and out[0].startswith("audit log intact")  # every hash recomputed: the chain alone is fooled

    code, out = run(capsys, "audit", "verify", str(busy_lab.root), "--checkpoints", str(tmp_path / "kept.txt"))
    assert code == 1
    assert out[-1].startswith(f"checkpoints BROKEN at checkpoint on line 1 of {kept['at']} (seq {kept['seq']}): "
                              f"record seq {kept['seq']} now has hash ")
    assert "the log was rewritten" in out[-1]


def test_a_log_cut_short_is_caught_by_a_checkpoint(busy_lab, capsys, tmp_path):
    kept = checkpoint(busy_lab, capsys, tmp_path / "kept.txt")
    path = busy_lab.root / AUDIT_NAME
    path.write_bytes(b"".join(path.read_bytes().splitlines(keepends=True)[:-2]))
    code, out = run(capsys, "audit", "verify", str(busy_lab.root), "--checkpoints", str(tmp_path / "kept.txt"))
    assert code == 1
    assert any(line.startswith(f"checkpoints BROKEN at checkpoint on line 1 of {kept['at']} (seq {kept['seq']})") and
               f"the log ends at seq {kept['seq'] - 2}" in line and "cut off the end" in line for line in out)


def test_checkpoints_hold_on_an_untouched_log_and_a_log_that_grew(busy_lab, capsys, tmp_path, drop, order_dict):
    checkpoint(busy_lab, capsys, tmp_path / "kept.txt")
    order = copy.deepcopy(order_dict)
    order["order_id"] = "TST-0042"
    drop(busy_lab, order)
    busy_lab.drain()
    code, out = run(capsys, "audit", "verify", str(busy_lab.root), "--checkpoints", str(tmp_path / "kept.txt"))
    assert code == 0 and out[-1].startswith("checkpoints hold: 1 checkpoint(s)")


def test_a_signature_made_with_another_key_fails(busy_lab, capsys, tmp_path):
    for name in ("lab.key", "other.key"):
        assert main(["audit", "keygen", str(tmp_path / name)]) == 0
    capsys.readouterr()
    signed = checkpoint(busy_lab, capsys, tmp_path / "signed.txt", "--key", str(tmp_path / "lab.key"))
    assert signed["signature"]

    code, out = run(capsys, "audit", "verify", str(busy_lab.root), "--checkpoints", str(tmp_path / "signed.txt"),
                    "--public-key", str(tmp_path / "lab.key.pub"))
    assert code == 0 and out[-1].endswith("(signatures verified)")

    code, out = run(capsys, "audit", "verify", str(busy_lab.root), "--checkpoints", str(tmp_path / "signed.txt"),
                    "--public-key", str(tmp_path / "other.key.pub"))
    assert code == 1 and "its signature does not verify with the public key" in out[-1]

    forged = dict(signed, seq=signed["seq"] - 1)  # an altered checkpoint keeps a signature that no longer fits
    (tmp_path / "forged.txt").write_text(json.dumps({"event": "checkpoint", **forged}) + "\n", encoding="utf-8")
    code, out = run(capsys, "audit", "verify", str(busy_lab.root), "--checkpoints", str(tmp_path / "forged.txt"),
                    "--public-key", str(tmp_path / "lab.key.pub"))
    assert code == 1 and "its signature does not verify" in out[-1]

    unsigned = checkpoint(busy_lab, capsys, tmp_path / "unsigned.txt")
    assert "signature" not in unsigned
    code, out = run(capsys, "audit", "verify", str(busy_lab.root), "--checkpoints", str(tmp_path / "unsigned.txt"),
                    "--public-key", str(tmp_path / "lab.key.pub"))
    assert code == 1 and out[-1].endswith("not signed")


def test_a_checkpoint_file_or_key_that_cannot_be_read_is_refused_before_the_log_is_read(busy_lab, capsys, tmp_path):
    checkpoint(busy_lab, capsys, tmp_path / "kept.txt")
    (tmp_path / "garbage.pub").write_text("not a key\n", encoding="utf-8")
    for flags, said in (
        (["--checkpoints", str(tmp_path / "missing.txt")], f"cannot read {tmp_path / 'missing.txt'}: No such file"),
        (["--checkpoints", str(tmp_path / "kept.txt"), "--public-key", str(tmp_path / "missing.pub")],
         f"cannot read {tmp_path / 'missing.pub'}: No such file"),
        (["--checkpoints", str(tmp_path / "kept.txt"), "--public-key", str(tmp_path / "garbage.pub")],
         f"{tmp_path / 'garbage.pub'}: not an Ed25519 public key"),
    ):
        code = main(["audit", "verify", str(busy_lab.root), *flags])
        captured = capsys.readouterr()
        assert code == 2 and captured.out == ""
        assert captured.err.startswith(f"lenslane: {said}")


def test_the_engine_logs_signed_checkpoints_that_verify(make_lab, drop, order_dict, tmp_path, capsys):
    lab = make_lab()
    assert main(["audit", "keygen", str(lab.root / "checkpoint.key")]) == 0
    config = lab.root / "lenslane.toml"
    text = config.read_text(encoding="utf-8")
    config.write_text(text.replace("[audit]\n", '[audit]\nsigning_key = "checkpoint.key"\n', 1), encoding="utf-8")
    drop(lab, order_dict)
    done = subprocess.run([sys.executable, "-m", "lenslane.cli", "watch", str(lab.root), "--once"],
                          capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    (tmp_path / "journal.txt").write_text(done.stderr, encoding="utf-8")
    lines = [json.loads(line) for line in done.stderr.splitlines() if '"checkpoint"' in line]
    assert [line["seq"] for line in lines][0] == 0 and lines[-1]["seq"] > 0  # at start and at stop
    assert all(line["signature"] for line in lines)
    code, out = run(capsys, "audit", "verify", str(lab.root), "--checkpoints", str(tmp_path / "journal.txt"),
                    "--public-key", str(lab.root / "checkpoint.key.pub"))
    assert code == 0 and out[-1].startswith(f"checkpoints hold: {len(lines)} checkpoint(s)")
