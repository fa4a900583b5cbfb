"""What a record of the audit log is: its canonical bytes, its hash, and how an order's story is packed.

Every record carries ``seq`` (1, 2, 3…), ``ts`` (UTC), ``prev`` (the previous
record's hash) and ``hash`` (sha256 of the record's canonical JSON without its
own ``hash``).

An order's pass through the engine is **one record** (``published``,
``rejected``, ``held`` or ``skipped``) holding what arrived (``received``: its
own time, file, size, sha256, account, wearer ref, placed_at), the outcome, and
the story: every change and flag. What repeats from order to order is written
once into the chain as a ``define`` record and referred to by the first
:data:`REF_LENGTH` hex digits of its sha256:

- a change's or flag's **shape**: its stage, field, method, source, the wording
  of its texts and the keys of its values, with a hole where each number goes.
  The record keeps ``[ref, [numbers…]]``; :func:`fill` puts the numbers back and
  gives the change exactly as the stage made it;
- the **run**: engine version, the chain of stages, the plugins' distributions
  and versions (the host's provenance), and the configuration in force (itself
  a ``define`` of kind ``config``).

A define record holds ``sha256`` (of its body's canonical JSON) and the body, so
a text cannot be swapped without breaking either that hash or the chain.
"""
from __future__ import annotations

import hashlib
import re
from datetime import datetime, timezone
from typing import Any, Callable

import orjson

AUDIT_NAME = "audit.jsonl"
GENESIS = "0" * 64
TORN_EVENT = "torn-line"
DEFINE_EVENT = "define"
#: The events that end one pass of an input through the engine.
OUTCOMES = ("published", "rejected", "held", "skipped")
#: The chain's own fields; an event may not carry them.
CHAIN_FIELDS = frozenset({"seq", "ts", "prev", "hash"})
#: How many hex digits of a define's sha256 name it in the records that refer to it.
REF_LENGTH = 16
#: Fields of a change or flag whose text is the same for every order (kept whole in the shape).
CONSTANT_TEXTS = frozenset({"method", "source"})
#: Fields of an order record packed as shapes.
STORY_FIELDS = ("changes", "flags")

_CANONICAL = orjson.OPT_SORT_KEYS | orjson.OPT_SERIALIZE_NUMPY
_NUMBER_IN_TEXT = re.compile(r"(-?\d+(?:\.\d+)?)")
_DIGIT = re.compile(r"\d")
_HOLE = "\x00"  # a number
_TEXT = "\x01"  # a text with numbers: its pieces, joined by this character
_ESCAPE = "\x02"  # a string of the order's own that starts with one of these three


def canonical(record: Any) -> bytes:
    """The canonical JSON: UTF-8, keys sorted, no spaces (what a record's hash is taken of)."""
    return orjson.dumps(record, option=_CANONICAL)


def record_hash(record: dict[str, Any]) -> str:
    body = {k: v for k, v in record.items() if k != "hash"}
    return hashlib.sha256(canonical(body)).hexdigest()


def utc_now() -> str:
    return datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


# --------------------------------------------------------------------------
# Shapes: what is the same in every order, apart from what is not
# --------------------------------------------------------------------------


def shape_of(item: Any, key: str | None = None, values: list[Any] | None = None) -> tuple[Any, list[Any]]:
    """Split a change or flag into its shape and its numbers (in canonical key order).

    Examples
    --------
    >>> shape_of({"field": "sphere", "after": -4.2, "reason": "from -4.25 to -4.20"})
    ({'after': '\\x00', 'field': 'sphere', 'reason': '\\x01from \\x01 to \\x01'}, [-4.2, -4.25, '-4.20'])
    """
    values = [] if values is None else values
    return _shape(item, key, values), values


def _shape(item: Any, key: str | None, values: list[Any]) -> Any:
    kind = type(item)
    if kind is float or kind is int:
        values.append(item)
        return _HOLE
    if kind is str:
        if key not in CONSTANT_TEXTS and _TEXT not in item and _DIGIT.search(item):
            pieces = _NUMBER_IN_TEXT.split(item)
            values.extend(_as_number(token) for token in pieces[1::2])
            return _TEXT + _TEXT.join(pieces[0::2])
        return _ESCAPE + item if item[:1] in (_HOLE, _TEXT, _ESCAPE) else item
    if kind is dict:
        return {k: _shape(item[k], k, values) for k in sorted(item)}
    if kind is list or kind is tuple:
        return [_shape(part, key, values) for part in item]
    if item is None or kind is bool:
        return item
    if isinstance(item, (int, float)) and not isinstance(item, bool):  # a numpy scalar, say
        values.append(item.item() if hasattr(item, "item") else item)
        return _HOLE
    if hasattr(item, "tolist"):  # a numpy array
        return _shape(item.tolist(), key, values)
    raise TypeError(f"cannot record a {type(item).__name__} in the audit log")


def _as_number(token: str) -> int | float | str:
    """A number as written in a text: as a JSON number when that writes it back the same, else as it is."""
    if len(token) <= 15:
        number = int(token) if "." not in token else float(token)
        if str(number) == token:
            return number
    return token


def fill(shape: Any, values: list[Any]) -> Any:
    """The item :func:`shape_of` split, whole again.

    >>> fill(*shape_of({"a": [1, 2.5], "t": "edge 1.7–4.2 mm", "s": "\\x00x"}))
    {'a': [1, 2.5], 's': '\\x00x', 't': 'edge 1.7–4.2 mm'}
    """
    numbers = iter(values)
    item = _fill(shape, numbers)
    if next(numbers, _END) is not _END:
        raise ValueError("more numbers than the shape has holes")
    return item


_END = object()


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


# --------------------------------------------------------------------------
# Define records and packing an order's record
# --------------------------------------------------------------------------


def define(kind: str, body: Any) -> dict[str, Any]:
    """A record that writes ``body`` into the chain once; others refer to it by :func:`ref_of` its sha256."""
    return {"event": DEFINE_EVENT, "kind": kind, "sha256": hashlib.sha256(canonical(body)).hexdigest(), "body": body}


def ref_of(sha256: str) -> str:
    return sha256[:REF_LENGTH]


def run_definition(provenance: dict[str, Any], config: dict[str, Any]) -> dict[str, Any]:
    """What ran an order: the host's provenance (the engine's version, the config's digest, the chain and each
    stage's distribution and version, the plugins taking part through hooks) and the configuration itself."""
    return {**provenance, "config": config}


def pack(event: dict[str, Any], known: Callable[[str], bool]) -> list[dict[str, Any]]:
    """The records to append for one event: the define records it needs that ``known`` does not know, then it.

    An order's ``changes`` and ``flags`` become ``[ref, numbers]`` pairs; a
    ``run`` dict becomes the ref of its define record, and the run's
    ``config`` the ref of its own. ``known(ref)`` says whether the chain (or
    this batch) already holds that define; it is told of each new one.
    """
    out: list[dict[str, Any]] = []

    def refer(kind: str, body: Any) -> str:
        record = define(kind, body)
        ref = ref_of(record["sha256"])
        if not known(ref):
            out.append(record)
        return ref

    packed = dict(event)
    for name in STORY_FIELDS:
        if isinstance(packed.get(name), list):
            pairs = []
            for item in packed[name]:
                shape, values = shape_of(item)
                pairs.append([refer("shape", shape), values])
            packed[name] = pairs
    run = packed.get("run")
    if isinstance(run, dict):
        run = dict(run)
        if isinstance(run.get("config"), dict):
            run["config"] = refer("config", run["config"])
        packed["run"] = refer("run", run)
    out.append(packed)
    return out


def unpack(record: dict[str, Any], body_of: Callable[[str], Any]) -> dict[str, Any]:
    """An order's record with its story filled in from the define records (``body_of(ref)``)."""
    if not any(isinstance(record.get(name), list) for name in STORY_FIELDS) and not isinstance(record.get("run"), str):
        return record
    whole = dict(record)
    for name in STORY_FIELDS:
        if isinstance(whole.get(name), list):
            whole[name] = [fill(body_of(ref), values) for ref, values in whole[name]]
    if isinstance(whole.get("run"), str):
        run = dict(body_of(whole["run"]))
        whole["run"] = run
    return whole


def refs_in(record: dict[str, Any]) -> list[str | None]:
    """The define refs a record refers to (``None`` for a story item that is not a ``[ref, numbers]`` pair)."""
    refs: list[str | None] = []
    for name in STORY_FIELDS:
        items = record.get(name)
        if type(items) is list:
            refs += [pair[0] if type(pair) is list and pair and type(pair[0]) is str else None for pair in items]
    if isinstance(record.get("run"), str):
        refs.append(record["run"])
    if record.get("event") == DEFINE_EVENT and record.get("kind") == "run":
        body = record.get("body")
        if isinstance(body, dict) and isinstance(body.get("config"), str):
            refs.append(body["config"])
    return refs


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
