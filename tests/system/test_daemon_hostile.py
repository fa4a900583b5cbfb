"""Hostile and broken input, dropped into a running daemon: each is rejected with its reason, and the daemon goes on.

One daemon process takes every case (that is also the point: one bad file
must not stop the next); the tests then read what it left.
"""
from __future__ import annotations

import errno
import json
import os
import socket
import stat

import pytest

from lenslane.audit.log import iter_records
from tests.system.driver import Watch, drop, make_lab, names, order, order_bytes, wait_until

pytestmark = pytest.mark.slow

VALID = json.dumps(order("H-BASE"))


def _replace_once(text: str, old: str, new: str) -> str:
    assert old in text
    return text.replace(old, new, 1)


LATIN1 = json.dumps(order("H-LATIN1", account="café-optics"), ensure_ascii=False).encode("latin-1")

#: name → (bytes renamed into the inbox, expected problem field, words the message must contain)
RENAMED_IN = {
    # Source: RFC 8259 §2 — a name separator must be followed by a value; counted by hand: the "}" that
    # stands where the value should be is the 15th character of line 2.
    "invalid-json.json": (b'{"format": "lens-order/1",\n  "order_id": }\n', "(file)",
                          ["invalid JSON", "line 2, column 15"]),
    # Source: RFC 8259 §6 — "Numeric values that cannot be represented ... (such as Infinity and NaN) are not
    # permitted."
    "nan.json": (_replace_once(VALID, '"sphere": -1.0', '"sphere": NaN').encode(), "(file)", ["NaN"]),
    "infinity.json": (_replace_once(VALID, '"sphere": -1.0', '"sphere": -Infinity').encode(), "(file)",
                      ["-Infinity"]),
    # Source: IEEE 754 binary64 — the largest finite double is about 1.8e308, so 1e999 reads as infinity.
    "huge-exponent.json": (_replace_once(VALID, '"sphere": -1.0', '"sphere": 1e999').encode(), "(file)",
                           ["1e999", "infinite"]),
    "long-integer.json": (json.dumps(order("H-LONG", wearer={"ref": "W-1", "birth_year": 1984}))
                          .replace("1984", "7" * 5000).encode(), "(file)", ["5000 digits"]),
    "deep-nesting.json": (b"[" * 100_000 + b"]" * 100_000, "(file)", ["nested deeper"]),
    # Source: RFC 8259 §4 — "The names within an object SHOULD be unique"; with duplicates "the behavior of
    # software ... is unpredictable", so the engine refuses them.
    "duplicate-keys.json": (('{"account": "another-practice", ' + VALID[1:]).encode(), "(file)",
                            ["duplicate key 'account'"]),
    # Source: RFC 8259 §8.1 — "Implementations MUST NOT add a byte order mark (U+FEFF) to the beginning of a
    # networked-transmitted JSON text."
    "bom.json": (b"\xef\xbb\xbf" + VALID.encode(), "(file)", ["byte-order mark"]),
    # Source: RFC 8259 §8.1 — JSON text exchanged between systems "MUST be encoded using UTF-8"; é in
    # ISO-8859-1 is the single byte 0xE9.
    "latin1.json": (LATIN1, "(file)", ["not UTF-8", f"byte {LATIN1.index(bytes([0xE9]))} is 0xe9"]),
    "empty.json": (b"", "(file)", ["empty"]),
    "top-level-array.json": (b"[]", "(order)", ["JSON object, not list"]),
    "top-level-null.json": (b"null", "(order)", ["JSON object, not null"]),
    "wrong-type.json": (json.dumps(order("H-TYPE", rx={"right": {"sphere": "-1.00"}})).encode(), "rx.right.sphere",
                        ["number"]),
    "unknown-field.json": (json.dumps(order("H-FIELD", colour="blue")).encode(), "colour", ["not permitted"]),
    "path-traversal.json": (order_bytes("../../../escape"), "order_id", ["pattern"]),
    "hidden-order-id.json": (order_bytes(".hidden"), "order_id", ["pattern"]),
    # Source: RFC 8259 §8.2 — an escape of a lone surrogate is legal JSON text but encodes no Unicode
    # character; it cannot be stored as UTF-8.
    "lone-surrogate.json": (_replace_once(VALID, '"test-practice"', '"\\ud800"').encode(), "(file)",
                            ["surrogate"]),
}

BIG_BYTES = 1 << 30  # a sparse file of 1 GiB: if it were read, the daemon's memory would show it
IGNORED = ("notes.txt", ".hidden.json", "draft.json.tmp", "upload.json.part")
CONTROL = "zz-control.json"  # a good order after every bad one: the daemon went on


@pytest.fixture(scope="module")
def hostile_lab(tmp_path_factory):
    root = tmp_path_factory.mktemp("hostile")
    lab = make_lab(root / "lab")
    outside = root / "outside-order.json"
    outside.write_bytes(order_bytes("SECRET-1"))
    watch = Watch(lab)
    for name, (data, _, _) in RENAMED_IN.items():
        drop(lab, name, data)
    with open(lab / "staging" / "too-big.json", "wb") as handle:
        handle.truncate(BIG_BYTES)
    os.rename(lab / "staging" / "too-big.json", lab / "inbox" / "too-big.json")
    (lab / "inbox" / "empty-in-place.json").touch()
    (lab / "inbox" / "truncated-in-place.json").write_bytes(order_bytes("H-TRUNC")[:150])
    specials = {"symlink.json": "symbolic link", "dangling-symlink.json": "symbolic link",
                "fifo.json": "named pipe", "folder.json": "folder"}
    os.symlink(outside, lab / "inbox" / "symlink.json")
    os.symlink(root / "nothing-here.json", lab / "inbox" / "dangling-symlink.json")
    os.mkfifo(lab / "inbox" / "fifo.json")
    (lab / "inbox" / "folder.json").mkdir()
    (lab / "inbox" / "folder.json" / "inside.json").write_bytes(order_bytes("H-INSIDE"))
    try:
        os.mknod(lab / "inbox" / "device.json", stat.S_IFCHR | 0o600, os.makedev(1, 3))
        specials["device.json"] = "character device"
    except PermissionError:
        pass  # not root: no device node to test with
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    try:
        sock.bind(str(lab / "inbox" / "socket.json"))
        specials["socket.json"] = "socket"
    except OSError as exc:
        if exc.errno not in (errno.ENAMETOOLONG, errno.EINVAL):
            raise
    for name in IGNORED:
        (lab / "inbox" / name).write_bytes(order_bytes("H-IGNORED"))
    drop(lab, CONTROL, order_bytes("H-CONTROL"))

    rejected = [*RENAMED_IN, "too-big.json", "empty-in-place.json", "truncated-in-place.json", *specials]
    wait_until(lambda: all(os.path.lexists(lab / "rejected" / n) for n in rejected)
               and (lab / "outbox" / "H-CONTROL.json").exists(), "every hostile file to be rejected")
    peak_kib = watch.peak_memory_kib()
    code = watch.stop()
    sock.close()
    return {"lab": lab, "root": root, "specials": specials, "exit": code, "peak_kib": peak_kib,
            "records": list(iter_records(lab))}


def _report(lab, name):
    return json.loads((lab / "rejected" / f"{name}.errors.json").read_bytes())


@pytest.mark.parametrize("name", sorted(RENAMED_IN))
def test_each_hostile_file_is_rejected_with_its_reason(hostile_lab, name):
    lab = hostile_lab["lab"]
    data, field, words = RENAMED_IN[name]
    report = _report(lab, name)
    assert report["rejected"] is True and report["file"] == name
    messages = [p["message"] for p in report["problems"] if p["field"] == field]
    assert messages, report["problems"]
    assert any(all(word in message for word in words) for message in messages), messages
    assert (lab / "rejected" / name).read_bytes() == data  # the input itself, untouched, beside its report
    records = [r for r in hostile_lab["records"] if r.get("event") == "rejected" and r["received"]["file"] == name]
    assert len(records) == 1 and records[0]["reasons"] == report["problems"]


def test_the_daemon_went_on_and_stopped_cleanly(hostile_lab):
    lab = hostile_lab["lab"]
    assert hostile_lab["exit"] == 0
    assert names(lab / "outbox") == ["H-CONTROL.json"]
    assert names(lab / "work") == []


def test_a_path_traversal_order_id_writes_nothing_outside_the_lab(hostile_lab):
    root = hostile_lab["root"]
    written = [p for p in root.rglob("*escape*") if "rejected" not in p.parts and "staging" not in p.parts]
    assert written == []


def test_an_oversized_file_is_rejected_without_being_read(hostile_lab):
    lab = hostile_lab["lab"]
    [problem] = _report(lab, "too-big.json")["problems"]
    assert f"{BIG_BYTES} bytes" in problem["message"] and "not read" in problem["message"]
    assert (lab / "rejected" / "too-big.json").stat().st_size == BIG_BYTES
    assert hostile_lab["peak_kib"] < 400 * 1024  # far below the 1 GiB it would take to read it


def test_in_place_files_that_never_complete_are_rejected(hostile_lab):
    lab = hostile_lab["lab"]
    assert "empty" in _report(lab, "empty-in-place.json")["problems"][0]["message"]
    assert "invalid JSON" in _report(lab, "truncated-in-place.json")["problems"][0]["message"]


def test_links_pipes_devices_and_folders_are_moved_aside_not_followed(hostile_lab):
    lab = hostile_lab["lab"]
    checks = {"symbolic link": os.path.islink, "named pipe": lambda p: stat.S_ISFIFO(os.lstat(p).st_mode),
              "folder": lambda p: os.path.isdir(p) and not os.path.islink(p),
              "character device": lambda p: stat.S_ISCHR(os.lstat(p).st_mode),
              "socket": lambda p: stat.S_ISSOCK(os.lstat(p).st_mode)}
    for name, kind in hostile_lab["specials"].items():
        entry = lab / "rejected" / name
        assert checks[kind](entry), f"{name} should still be the {kind} itself"
        [problem] = _report(lab, name)["problems"]
        assert kind in problem["message"] and "without being followed or opened" in problem["message"]
    assert not (lab / "outbox" / "SECRET-1.json").exists()  # the link's target was never read as an order
    assert not (lab / "outbox" / "H-INSIDE.json").exists()
    assert (lab / "rejected" / "folder.json" / "inside.json").exists()


def test_names_that_are_not_orders_are_left_alone(hostile_lab):
    lab = hostile_lab["lab"]
    assert names(lab / "inbox") == sorted(IGNORED)
