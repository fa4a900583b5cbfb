"""From the bytes of an order file to a validated ``LensOrder`` — or a list of problems.

Hostile input is expected: invalid JSON, NaN and infinities, duplicate keys,
integers of thousands of digits, nesting deep enough to exhaust the stack, a
byte-order mark or bytes that are not UTF-8. Each becomes an
:class:`OrderRejected` with a field path and a plain message, never a crash.
"""
from __future__ import annotations

import json
from typing import Any, Mapping

from pydantic import ValidationError

from engine.models import error_list, validate_order

MAX_INTEGER_DIGITS = 30
MAX_DEPTH = 32


class OrderRejected(Exception):
    """The order cannot be accepted; ``problems`` lists ``{"field", "message"}``."""

    def __init__(self, problems: list[dict[str, str]]):
        super().__init__("; ".join(f"{p['field']}: {p['message']}" for p in problems))
        self.problems = problems


class _Refused(ValueError):
    pass


def _no_duplicate_keys(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    obj = dict(pairs)
    if len(obj) != len(pairs):
        seen: set[str] = set()
        for key, _ in pairs:
            if key in seen:
                raise _Refused(f"duplicate key {key!r}")
            seen.add(key)
    return obj


def _no_constants(name: str) -> Any:
    raise _Refused(f"{name} is not a number JSON allows")


def _bounded_int(text: str) -> int:
    if len(text.lstrip("-")) > MAX_INTEGER_DIGITS:
        raise _Refused(f"an integer of {len(text)} digits is not a plausible value")
    return int(text)


def _depth_ok(raw: bytes) -> bool:
    """A cheap bound on nesting, before the parser recurses (brackets inside strings over-count, safely)."""
    depth = 0
    for byte in raw:
        if byte in (0x5B, 0x7B):
            depth += 1
            if depth > MAX_DEPTH:
                return False
        elif byte in (0x5D, 0x7D):
            depth -= 1
    return True


def parse_json(raw: bytes) -> Any:
    """Parse the bytes of one order file as strict JSON."""
    if raw.startswith(b"\xef\xbb\xbf"):
        raise OrderRejected([{"field": "(file)", "message": "starts with a UTF-8 byte-order mark; send plain UTF-8"}])
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise OrderRejected([{"field": "(file)", "message": f"not UTF-8: byte {exc.start} is {raw[exc.start]:#04x}"}]) from None
    if not text.strip():
        raise OrderRejected([{"field": "(file)", "message": "the file is empty"}])
    if not _depth_ok(raw):
        raise OrderRejected([{"field": "(file)", "message": f"nested deeper than {MAX_DEPTH} levels"}])
    try:
        return json.loads(text, object_pairs_hook=_no_duplicate_keys,
                          parse_constant=_no_constants, parse_int=_bounded_int)
    except json.JSONDecodeError as exc:
        raise OrderRejected([{"field": "(file)", "message": f"invalid JSON at line {exc.lineno}, column {exc.colno}: {exc.msg}"}]) from None
    except _Refused as exc:
        raise OrderRejected([{"field": "(file)", "message": str(exc)}]) from None
    except (RecursionError, ValueError) as exc:  # RecursionError is not a ValueError
        raise OrderRejected([{"field": "(file)", "message": f"cannot be parsed: {type(exc).__name__}"}]) from None


def read_order(raw: bytes, materials: Mapping[str, Any]):
    """Parse and validate an order; returns ``(order, parsed)`` or raises :class:`OrderRejected`."""
    data = parse_json(raw)
    if not isinstance(data, dict):
        kind = "null" if data is None else type(data).__name__
        raise OrderRejected([{"field": "(order)", "message": f"the top level must be a JSON object, not {kind}"}])
    try:
        return validate_order(data, materials), data
    except ValidationError as exc:
        raise OrderRejected(error_list(exc)) from None
