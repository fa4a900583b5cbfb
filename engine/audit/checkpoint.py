"""Checkpoints: one line that pins the chain's head, to keep somewhere the log's writer cannot reach.

A checkpoint says: at this time the log's record ``seq`` had this ``hash``, and
this many records and outcomes came before it. The engine writes one to its own
log (journald) at start, every few minutes and at stop; ``lenslane audit
checkpoint LAB`` prints one. ``lenslane audit verify LAB --checkpoints FILE``
then fails, naming the checkpoint, when the log no longer has that record with
that hash (it was rewritten, even with every hash recomputed) or ends before it
(it was cut short). With an Ed25519 key (``[audit] signing_key``) each
checkpoint is signed, and ``--public-key`` checks the signatures, so a
checkpoint line cannot be forged without the lab's private key.
"""
from __future__ import annotations

import base64
import json
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from lenslane.audit.index import Index
from lenslane.audit.records import GENESIS, canonical, utc_now
from lenslane.audit.verify import Finding
from lenslane.vocabulary import OUTCOMES

CHECKPOINT_EVENT = "checkpoint"
#: The fields a signature covers (a log line may add its own: level, timestamp…).
SIGNED_FIELDS = ("seq", "hash", "at", "records", *OUTCOMES)


def make_checkpoint(index: Index, key: Any = None) -> dict[str, Any]:
    """The checkpoint of the log as the index sees it (call :meth:`Index.catch_up` first), signed if ``key``."""
    tail = index.tail()
    counts = index.counts()
    checkpoint: dict[str, Any] = {"seq": tail.seq if tail else 0, "hash": index.meta("tail_hash") or GENESIS,
                                  "at": utc_now(), "records": sum(counts.values())}
    checkpoint.update({event: counts.get(event, 0) for event in OUTCOMES})
    if key is not None:
        checkpoint["signature"] = base64.b64encode(key.sign(_signed_bytes(checkpoint))).decode()
    return checkpoint


def checkpoint_line(checkpoint: dict[str, Any]) -> str:
    return json.dumps({"event": CHECKPOINT_EVENT, **checkpoint}, ensure_ascii=False, separators=(",", ":"))


def _signed_bytes(checkpoint: dict[str, Any]) -> bytes:
    return canonical({k: checkpoint.get(k) for k in SIGNED_FIELDS})


def load_private_key(path: Path):
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
    from cryptography.hazmat.primitives.serialization import load_pem_private_key

    key = load_pem_private_key(Path(path).read_bytes(), password=None)
    if not isinstance(key, Ed25519PrivateKey):
        raise ValueError(f"{path}: not an Ed25519 private key")
    return key


def load_signing_key(lab_root: Path, setting: str | None):
    """The lab's checkpoint signing key (``[audit] signing_key``), or ``None`` when it signs nothing."""
    from lenslane.config import ConfigError

    if not setting:
        return None
    try:
        return load_private_key(Path(lab_root) / setting)
    except (OSError, ValueError, TypeError) as exc:
        raise ConfigError(f"audit.signing_key: {exc}") from None


def load_public_key(path: Path):
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PublicKey
    from cryptography.hazmat.primitives.serialization import load_pem_public_key

    try:
        key = load_pem_public_key(Path(path).read_bytes())
    except ValueError:  # not PEM, or PEM of no key
        key = None
    if not isinstance(key, Ed25519PublicKey):
        raise ValueError(f"{path}: not an Ed25519 public key")
    return key


def make_key_pair(private_path: Path) -> Path:
    """Write a new Ed25519 private key (mode 0600) and its public key beside it (``.pub``); returns the latter."""
    import os

    from cryptography.hazmat.primitives import serialization
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey

    key = Ed25519PrivateKey.generate()
    private = key.private_bytes(serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8,
                                serialization.NoEncryption())
    fd = os.open(private_path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    with os.fdopen(fd, "wb") as handle:
        handle.write(private)
    public_path = Path(f"{private_path}.pub")
    public_path.write_bytes(key.public_key().public_bytes(serialization.Encoding.PEM,
                                                          serialization.PublicFormat.SubjectPublicKeyInfo))
    return public_path


@dataclass(frozen=True)
class Checkpoint:
    line: int
    fields: dict[str, Any]

    @property
    def name(self) -> str:
        return f"checkpoint on line {self.line} of {self.fields.get('at')}"  # a finding adds its seq


def read_checkpoints(path: Path) -> list[Checkpoint]:
    """Every checkpoint line in a file: as printed, or inside a log line (journald's prefix before the JSON is skipped)."""
    found = []
    with open(path, "rb") as handle:
        for number, raw in enumerate(handle, start=1):
            text = raw.decode("utf-8", "replace")
            start = text.find("{")
            if start < 0:
                continue
            try:
                fields = json.loads(text[start:])
            except ValueError:
                continue
            if (isinstance(fields, dict) and fields.get("event") == CHECKPOINT_EVENT
                    and isinstance(fields.get("seq"), int) and isinstance(fields.get("hash"), str)):
                found.append(Checkpoint(number, fields))
    return found


def check_checkpoints(index: Index, checkpoints: list[Checkpoint], public_key: Any = None) -> list[Finding]:
    """What is wrong with the log (or the checkpoints) against each checkpoint; empty when all hold."""
    from cryptography.exceptions import InvalidSignature

    findings = []
    tail = index.tail()
    last_seq = tail.seq if tail else 0
    for checkpoint in checkpoints:
        fields, name = checkpoint.fields, checkpoint.name
        if public_key is not None:
            signature = fields.get("signature")
            try:
                if not isinstance(signature, str):
                    raise InvalidSignature
                public_key.verify(base64.b64decode(signature), _signed_bytes(fields))
            except (InvalidSignature, ValueError):
                findings.append(Finding(name, fields["seq"], "signature", "not signed" if signature is None else
                                        "its signature does not verify with the public key: the checkpoint was not "
                                        "made by the key's holder, or was altered"))
                continue
        seq = fields["seq"]
        if seq == 0:
            continue
        if seq > last_seq:
            findings.append(Finding(name, seq, "cut-short",
                                    f"the log ends at seq {last_seq}, before the record this checkpoint saw: "
                                    "records were cut off the end of the log"))
            continue
        place = index.place(seq)
        record = index.read(place) if place is not None else None
        if record is None or record.get("seq") != seq:
            findings.append(Finding(name, seq, "rewritten", f"the log holds no record seq {seq} any more"))
        elif record.get("hash") != fields["hash"]:
            findings.append(Finding(name, seq, "rewritten",
                                    f"record seq {seq} now has hash {record.get('hash')}, the checkpoint saw "
                                    f"{fields['hash']}: the log was rewritten up to there (even if every hash in it "
                                    "was recomputed)"))
    return findings
