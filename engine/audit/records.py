"""What a record of the audit log is: its canonical bytes, its hash, and how an order's story is packed.

Every record carries ``seq`` (1, 2, 3…), ``ts`` (UTC), ``prev`` (the previous
record's hash) and ``hash`` (sha256 of the record's canonical JSON without its
own ``hash``).

An order's pass through the engine is **one record** (``published``,
``rejected``, ``held`` or ``skipped``) holding what arrived (``received``: its
own time, file, size, sha256, account, wearer ref, placed_at), the outcome, and
the story: every change and flag. What repeats from order to order is written
once into the chain as a ``define`` record and referred to by its ``seq``:

- a **change or flag**, whole, the first time one of its *form* occurs. Its form
  is what stays when every number is cut out of its canonical JSON — the
  numbers of its values and the numbers written in its texts alike — so stage,
  field, method, source, the wording of its texts and the keys of its values.
  An order's record writes each item as one text, ``"<seq> <mask> <numbers>"``:
  the seq of the define of its form; ``mask``, hexadecimal, with bit *i* set
  when the item's *i*-th number differs from the define's and is written here;
  and those numbers, comma-separated, each exactly as the canonical JSON writes
  it — or as ``@k`` when the same number came earlier in the story and that is
  shorter, *k* being its place among all the numbers of the record's changes
  and then its flags, from 0. So a number the define holds is not written, and
  one the story already told is written as where it was. :func:`unpack` gives
  the items back exactly as the stages made them;
- the **run**: engine version, the chain of stages, the plugins' distributions
  and versions (the host's provenance), and the configuration in force (itself
  a ``define`` of kind ``config``).

A define record holds ``sha256`` (of its body's canonical JSON) and the body, so
a text cannot be swapped without breaking either that hash or the chain.

The second format referred to a define by the first :data:`REF_LENGTH` hex
digits of its sha256 and wrote a change or flag as ``[ref, [numbers…]]`` of a
``shape`` define (the item with a hole where each number went); :func:`unpack`
reads both.
"""
from __future__ import annotations

import hashlib
import re
from itertools import chain, count
from datetime import datetime, timezone
from typing import Any, Callable

import orjson


AUDIT_NAME = "audit.jsonl"
GENESIS = "0" * 64
TORN_EVENT = "torn-line"
DEFINE_EVENT = "define"
#: The chain's own fields; an event may not carry them.
CHAIN_FIELDS = frozenset({"seq", "ts", "prev", "hash"})
#: How many hex digits of a define's sha256 named it in the second format.
REF_LENGTH = 16
#: Fields of an order record packed as story items, and the kind of define each item refers to.
STORY_FIELDS = {"changes": "change", "flags": "flag"}

_CANONICAL = orjson.OPT_SORT_KEYS | orjson.OPT_SERIALIZE_NUMPY
#: A number as canonical JSON writes it, in or out of a string: a minus (only before a digit) or a digit, more
#: digits, a fraction, an exponent. Written for the regex engine's speed, it cuts exactly as the plain pattern
#: (test_records.py checks it): it starts with one character class, which the engine scans for, and that class
#: also holds the byte \x00, which the lookbehind refuses at once, only so that it is three runs of bytes, which
#: the engine tests with one table lookup per byte (about twice as fast over a story's texts); and what a number
#: matched is never given back (possessive: there is nothing after it that could use it).
_NUMBER = rb"[-0-9\x00](?<!\x00|-(?![0-9]))[0-9]*+(?:\.[0-9]++)?+(?:[eE][-+]?+[0-9]++)?+"
_NUMBERS = re.compile(b"(" + _NUMBER + b")")  # captured: splitting keeps the numbers
_WRITTEN = b"(?:" + _NUMBER + rb"|@[0-9]+)"
_ITEM = re.compile(rb"([0-9]+) ([0-9a-f]+)(?: (" + _WRITTEN + b"(?:," + _WRITTEN + rb")*))?")
_CUT = b"\x00"  # where a number was cut out of a form
_APART = b"\x01"  # between the items of a story cut together
# (Neither is ever in canonical JSON, which escapes control characters.)


def canonical(record: Any) -> bytes:
    """The canonical JSON: UTF-8, keys sorted, no spaces (what a record's hash is taken of)."""
    return orjson.dumps(record, option=_CANONICAL)


def record_hash(record: dict[str, Any]) -> str:
    body = {k: v for k, v in record.items() if k != "hash"}
    return hashlib.sha256(canonical(body)).hexdigest()


def utc_now() -> str:
    return datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


# --------------------------------------------------------------------------
# Forms: a change or flag with its numbers cut out
# --------------------------------------------------------------------------


def cut(items: list[Any]) -> list[tuple[bytes, list[bytes]]]:
    """Cut the numbers out of story items: for each, its form (its canonical JSON with ``\\x00`` where each number
    was) and its numbers (as the JSON writes them).

    The items are serialised once each and cut together, in one pass of one regular expression.

    >>> [numbers for _, numbers in cut([{"after": -4.2, "reason": "from -4.25 to -4.20"}, [7]])]
    [[b'-4.2', b'-4.25', b'-4.20'], [b'7']]
    """
    parts = _NUMBERS.split(_APART.join(map(canonical, items)))
    numbers = parts[1::2]
    out, start = [], 0
    for form in _CUT.join(parts[0::2]).split(_APART)[:len(items)]:
        end = start + form.count(_CUT)
        out.append((form, numbers[start:end]))
        start = end
    return out


def form_key(form: bytes) -> str:
    """What the define of a change's or flag's form is found by: the sha256 of the form."""
    return hashlib.sha256(form).hexdigest()


def define_key(record: dict[str, Any]) -> tuple[str, bytes | None]:
    """What a define record is found by when a record refers to it again, and the numbers it holds.

    A change or flag is found by its form's key (:func:`form_key`) and holds the
    numbers of the order that first had it; a run or configuration by its sha256.
    """
    if record.get("kind") in STORY_FIELDS.values():
        [(form, numbers)] = cut([record.get("body")])
        return form_key(form), b",".join(numbers)
    return str(record.get("sha256")), None


#: ``defines_of([(kind, key), …])`` → for each of them the chain holds a define of: that define's seq and the
#: numbers it holds, comma-separated (``None`` for a run or configuration).
DefinesOf = Callable[[list[tuple[str, str]]], "dict[tuple[str, str], tuple[int, bytes | None]]"]


class Packer:
    """Packs the events of one batch into the records to write: each story as items referring to the defines
    of their forms, each run as the seq of its define, and before each event the define records it needs that
    the chain does not hold yet.

    The batch's stories are cut first, so that the defines of all their forms
    are asked for in one question (``defines_of``); the run and configuration
    are asked for once each, and a run shared by the batch's events is
    serialised once. ``start`` is the seq the batch's first record will have.
    """

    def __init__(self, start: int, defines_of: DefinesOf):
        self.start = start
        self.defines_of = defines_of
        self.records: list[dict[str, Any]] = []
        self.forms: dict[tuple[str, bytes], tuple[int, list[bytes]]] = {}  # (kind, form) → its define's seq, numbers
        self.wholes: dict[tuple[str, str], int] = {}  # (kind, sha256) → the seq of a run's or configuration's define
        self.runs: dict[int, int] = {}  # the seq of the run define, by the identity of the run dict

    def pack(self, events: list[dict[str, Any]]) -> list[dict[str, Any]]:
        """The batch's records: each event packed, after the define records it needs."""
        stories = [self._story(event) for event in events]
        self._look_up({(kind, form) for _, items in stories for kind, _, form, _ in items})
        for event, (names, items) in zip(events, stories):
            packed = dict(event)
            defines = [self._form_define(kind, item, form, numbers) for kind, item, form, numbers in items]
            texts = iter(_item_texts(defines, [numbers for *_, numbers in items]))
            for name in names:
                packed[name] = [next(texts) for _ in event[name]]
            if isinstance(event.get("run"), dict):
                packed["run"] = self._run(event["run"])
            self.records.append(packed)
        return self.records

    @staticmethod
    def _story(event: dict[str, Any]) -> tuple[list[str], list[tuple[str, Any, bytes, list[bytes]]]]:
        """An event's story fields, and each of their items with its kind, form and numbers."""
        names = [name for name in STORY_FIELDS if isinstance(event.get(name), list)]
        items = [(STORY_FIELDS[name], item) for name in names for item in event[name]]
        forms = cut([item for _, item in items])
        return names, [(kind, item, form, numbers) for (kind, item), (form, numbers) in zip(items, forms)]

    def _look_up(self, forms: set[tuple[str, bytes]]) -> None:
        """Ask the chain for the defines of these forms, all at once."""
        by_key = {(kind, form_key(form)): (kind, form) for kind, form in forms}
        for found, (seq, numbers) in self.defines_of(list(by_key)).items():
            self.forms[by_key[found]] = (seq, numbers.split(b",") if numbers else [])

    def _form_define(self, kind: str, item: Any, form: bytes, numbers: list[bytes]) -> tuple[int, list[bytes]]:
        """The define of an item's form: one the chain holds, one written earlier in the batch, or one written
        now, holding this item's numbers."""
        found = self.forms.get((kind, form))
        if found is None:
            found = self.forms[kind, form] = (self._define(kind, item), numbers)
        return found

    def _run(self, run: dict[str, Any]) -> int:
        if id(run) not in self.runs:
            whole = dict(run)
            if isinstance(whole.get("config"), dict):
                whole["config"] = self._whole("config", whole["config"])
            self.runs[id(run)] = self._whole("run", whole)
        return self.runs[id(run)]

    def _whole(self, kind: str, body: Any) -> int:
        """The seq of the define of a run or configuration, found by its sha256."""
        key = (kind, hashlib.sha256(canonical(body)).hexdigest())
        if key not in self.wholes:
            found = self.defines_of([key]).get(key)
            self.wholes[key] = found[0] if found else self._define(kind, body)
        return self.wholes[key]

    def _define(self, kind: str, body: Any) -> int:
        """Write a define record before the records still to come; returns its seq."""
        self.records.append(define(kind, body))
        return self.start + len(self.records) - 1


def _item_texts(defines: list[tuple[int, list[bytes]]], numbers: list[list[bytes]]) -> list[str]:
    """Each story item as ``"<seq> <mask> <numbers>"``, from its define (seq and numbers) and its own numbers:
    which differ from the define's, and how each of those is written (itself, or ``@k`` where shorter)."""
    told = list(chain.from_iterable(numbers))  # the story's numbers, in order
    first = dict(zip(reversed(told), range(len(told) - 1, -1, -1)))  # each one's first place among them
    texts, place = [], 0
    for (seq, defined), own in zip(defines, numbers):
        mask, written = 0, []
        if own != defined:
            for bit, number, held in zip(count(), own, defined):
                if number != held:  # bit i: the item's i-th number differs from its define's
                    mask |= 1 << bit
                    earlier = first[number]
                    written.append(number if earlier == place + bit else _shorter(number, earlier))
        texts.append("%d %x %s" % (seq, mask, b",".join(written).decode()) if mask else f"{seq} 0")
        place += len(own)
    return texts


def _shorter(number: bytes, earlier: int) -> bytes:
    """A number told before, as written again: ``@k`` (its first place) when that is shorter."""
    ref = b"@%d" % earlier
    return ref if len(ref) < len(number) else number


def define(kind: str, body: Any) -> dict[str, Any]:
    """A record that writes a body into the chain once; records refer to it by its seq."""
    body = orjson.loads(canonical(body))  # as the log holds it
    return {"event": DEFINE_EVENT, "kind": kind, "sha256": hashlib.sha256(canonical(body)).hexdigest(), "body": body}


def ref_of(sha256: str) -> str:
    """How the second format named a define: the first :data:`REF_LENGTH` hex digits of its sha256."""
    return sha256[:REF_LENGTH]


def run_definition(provenance: dict[str, Any], config: dict[str, Any]) -> dict[str, Any]:
    """What ran an order: the host's provenance (the engine's version, the config's digest, the chain and each
    stage's distribution and version, the plugins taking part through hooks) and the configuration itself."""
    return {**provenance, "config": config}


# --------------------------------------------------------------------------
# Reading a story back
# --------------------------------------------------------------------------


def _is_ref(value: Any) -> bool:
    return type(value) is int or isinstance(value, str)


def unpack(record: dict[str, Any], body_of: Callable[[int | str], Any]) -> dict[str, Any]:
    """An order's record with its story and run filled in from the define records (``body_of(ref)``).

    Raises ``ValueError`` for a story item that does not fit its define.
    """
    if not any(isinstance(record.get(name), list) for name in STORY_FIELDS) and not _is_ref(record.get("run")):
        return record
    whole = dict(record)
    told: list[bytes] = []  # the story's numbers so far, for @k
    for name in STORY_FIELDS:
        items = whole.get(name)
        if isinstance(items, list):
            whole[name] = [_fill_item(item, body_of, told) if isinstance(item, str) else fill(body_of(item[0]), item[1])
                           for item in items]
    if _is_ref(whole.get("run")):
        whole["run"] = dict(body_of(whole["run"]))
    return whole


def _fill_item(text: str, body_of: Callable[[int], Any], told: list[bytes]) -> Any:
    match = _ITEM.fullmatch(text.encode("ascii", "replace"))
    if match is None:
        raise ValueError(f"not a story item: {text!r}")
    mask = int(match.group(2), 16)
    written = match.group(3).split(b",") if match.group(3) else []
    parts = _NUMBERS.split(canonical(body_of(int(match.group(1)))))
    holes = len(parts) // 2
    if mask >> holes or mask.bit_count() != len(written):
        raise ValueError(f"the story item {text!r} does not fit its define")
    numbers = iter(written)
    for place in range(holes):
        if mask >> place & 1:
            number = next(numbers)
            if number[:1] == b"@":
                if int(number[1:]) >= len(told):
                    raise ValueError(f"the story item {text!r} refers to a number not told before it")
                number = told[int(number[1:])]
            parts[2 * place + 1] = number
        told.append(parts[2 * place + 1])
    return orjson.loads(b"".join(parts))


def fill(shape: Any, values: list[Any]) -> Any:
    """A second-format item whole again: its ``shape`` define with its numbers put back into the holes."""
    numbers = iter(values)
    item = _fill(shape, numbers)
    if next(numbers, _END) is not _END:
        raise ValueError("more numbers than the shape has holes")
    return item


_END = object()
_HOLE = "\x00"  # second format: a number
_TEXT = "\x01"  # second format: a text with numbers, its pieces joined by this character
_ESCAPE = "\x02"  # second format: a string of the order's own that started with one of these three


def _fill(shape: Any, numbers) -> Any:
    if isinstance(shape, str):
        if shape == _HOLE:
            return next(numbers)
        if shape[:1] == _TEXT:
            pieces = shape[1:].split(_TEXT)
            out = [pieces[0]]
            for piece in pieces[1:]:
                out.append(str(next(numbers)))
                out.append(piece)
            return "".join(out)
        return shape[1:] if shape[:1] == _ESCAPE else shape
    if isinstance(shape, list):
        return [_fill(part, numbers) for part in shape]
    if isinstance(shape, dict):
        return {k: _fill(shape[k], numbers) for k in sorted(shape)}
    return shape


def refs_in(record: dict[str, Any]) -> list[tuple[int | str | None, str]]:
    """The defines a record refers to, each with the kind it must be (``None`` for a story item that names none)."""
    refs: list[tuple[int | str | None, str]] = []
    for name, kind in STORY_FIELDS.items():
        items = record.get(name)
        if type(items) is list:
            refs += [_item_ref(item, kind) for item in items]
    if _is_ref(record.get("run")):
        refs.append((record["run"], "run"))
    if record.get("event") == DEFINE_EVENT and record.get("kind") == "run":
        body = record.get("body")
        if isinstance(body, dict) and _is_ref(body.get("config")):
            refs.append((body["config"], "config"))
    return refs


def _item_ref(item: Any, kind: str) -> tuple[int | str | None, str]:
    if isinstance(item, str):
        head = item.partition(" ")[0]
        return (int(head) if head.isdigit() and head.isascii() else None), kind
    if type(item) is list and item and isinstance(item[0], str):  # the second format: [ref, numbers]
        return item[0], "shape"
    return None, kind


# --------------------------------------------------------------------------
# What arrived
# --------------------------------------------------------------------------


def received(name: str, size: int | None, sha256: str | None, at: str, claim: str | None,
             order: dict[str, Any] | None = None, kind: str | None = None) -> dict[str, Any]:
    """The ``received`` part of an order's record: the input's own time, file and bytes, and who it came from.

    ``claim``: the inbox's claim key (``None`` for a version a person's decision sent through the chain).
    """
    part: dict[str, Any] = {"at": at, "file": name, "size": size, "sha256": sha256}
    if claim is not None:
        part["claim"] = claim
    if kind:
        part["kind"] = kind
    if isinstance(order, dict):
        wearer = order.get("wearer")
        for key, value in (("account", order.get("account")), ("placed_at", order.get("placed_at")),
                           ("wearer_ref", wearer.get("ref") if isinstance(wearer, dict) else None)):
            if isinstance(value, str):
                part[key] = value
    return part
