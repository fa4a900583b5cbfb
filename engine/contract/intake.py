"""From the bytes of an order file to a validated ``LensOrder`` — or a list of problems.

Hostile input is expected: invalid JSON, NaN and infinities (also a number
like 1e999 that only becomes infinite when read), duplicate keys, integers of
thousands of digits, nesting deep enough to exhaust the stack, a byte-order
mark, bytes that are not UTF-8, escapes of lone surrogates. Each becomes an
:class:`OrderRejected` with a field path and a plain message, never a crash.
The size limit is the drop folder's job: it checks the size on disk before
anything is read.
"""
from __future__ import annotations

import json
import math
import re
from typing import Any, Mapping

from pydantic import ValidationError

from lenslane.contract.models import error_list, validate_order

MAX_INTEGER_DIGITS = 30
MAX_DEPTH = 32


#: A \uD800–\uDFFF escape: legal JSON text, but alone it is no character and cannot be stored as UTF-8.
_SURROGATE_ESCAPE = re.compile(r"\\u[dD][89a-fA-F]")


class OrderRejected(Exception):
    """The order cannot be accepted; ``problems`` lists ``{"field", "message"}``.

    ``maybe_incomplete`` is true when the bytes could be the first part of a
    valid order (the JSON ends too early, the last UTF-8 character is cut, the
    file is empty): a file still being written looks like this, so the drop
    folder retries such a file while it is young instead of rejecting it.
    """

    def __init__(self, problems: list[dict[str, str]], maybe_incomplete: bool = False):
        super().__init__("; ".join(f"{p['field']}: {p['message']}" for p in problems))
        self.problems = problems
        self.maybe_incomplete = maybe_incomplete


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
        raise _Refused(f"an integer of {len(text.lstrip('-'))} digits is not a plausible value")
    return int(text)


def _finite_float(text: str) -> float:
    value = float(text)
    if math.isinf(value):
        shown = text if len(text) <= 24 else text[:20] + "…"
        raise _Refused(f"the number {shown} is too large to be a value (it would be infinite)")
    return value


def _depth_ok(raw: bytes) -> bool:
    """A cheap bound on nesting, before the parser recurses (brackets inside strings over-count, safely)."""
    if raw.count(b"[") + raw.count(b"{") <= MAX_DEPTH:
        return True  # an order has a handful of brackets: no need to walk the bytes
    depth = 0
    for byte in raw:
        if byte in (0x5B, 0x7B):
            depth += 1
            if depth > MAX_DEPTH:
                return False
        elif byte in (0x5D, 0x7D):
            depth -= 1
    return True


def parse_json(raw: bytes, check_floats: bool = False) -> Any:
    """Parse the bytes of one order file as strict JSON.

    A number too large for a double (``1e999``) reads as infinity; the order's
    model refuses infinities, and only then is the file parsed again with
    ``check_floats``, to name the number — checking every number as it is read
    would cost time on every good order.
    """
    if raw.startswith(b"\xef\xbb\xbf"):
        raise OrderRejected([{"field": "(file)", "message": "starts with a UTF-8 byte-order mark; send plain UTF-8"}])
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        cut_short = exc.end == len(raw) and exc.reason == "unexpected end of data"
        raise OrderRejected([{"field": "(file)", "message": f"not UTF-8: byte {exc.start} is {raw[exc.start]:#04x}"}],
                            maybe_incomplete=cut_short) from None
    if not text.strip():
        raise OrderRejected([{"field": "(file)", "message": "the file is empty"}], maybe_incomplete=True)
    # Counting brackets is cheap; the exact nesting is measured only when there are many.
    if raw.count(b"[") + raw.count(b"{") > MAX_DEPTH and not _depth_ok(raw):
        raise OrderRejected([{"field": "(file)", "message": f"nested deeper than {MAX_DEPTH} levels"}])
    try:
        data = json.loads(text, object_pairs_hook=_no_duplicate_keys, parse_constant=_no_constants,
                          parse_int=_bounded_int, parse_float=_finite_float if check_floats else None)
    except json.JSONDecodeError as exc:
        raise OrderRejected([{"field": "(file)", "message": f"invalid JSON at line {exc.lineno}, column {exc.colno}: {exc.msg}"}],
                            maybe_incomplete=True) from None
    except _Refused as exc:
        raise OrderRejected([{"field": "(file)", "message": str(exc)}]) from None
    except (RecursionError, ValueError) as exc:  # RecursionError is not a ValueError
        raise OrderRejected([{"field": "(file)", "message": f"cannot be parsed: {type(exc).__name__}"}]) from None
    if "\\u" in text and _SURROGATE_ESCAPE.search(text):
        try:
            json.dumps(data, ensure_ascii=False).encode("utf-8")
        except UnicodeEncodeError:
            raise OrderRejected([{"field": "(file)", "message": "contains a \\u escape of a lone UTF-16 surrogate, "
                                  "which is no character"}]) from None
    return data


def read_order(raw: bytes, materials: Mapping[str, Any]):
    """Parse and validate an order; returns ``(order, parsed)`` or raises :class:`OrderRejected`."""
    data = parse_json(raw)
    if not isinstance(data, dict):
        kind = "null" if data is None else type(data).__name__
        raise OrderRejected([{"field": "(order)", "message": f"the top level must be a JSON object, not {kind}"}])
    try:
        return validate_order(data, materials), data
    except ValidationError as exc:
        if any(err["type"] == "finite_number" for err in exc.errors(include_url=False)):
            parse_json(raw, check_floats=True)  # raises, naming a number that overflowed to infinity
        raise OrderRejected(error_list(exc)) from None
