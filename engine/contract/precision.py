"""Rounding to the contract's precision, done once, when a value leaves the engine.

Stages carry full precision; values are rounded only where they are recorded or
published: powers to 0.01 D, axes to a whole degree 1–180, prism base to 0.1°,
lengths to 0.1 mm, weights to 0.1 g.
"""
from __future__ import annotations

from typing import Any

_DECIMALS = {
    "sphere": 2, "cylinder": 2, "add": 2, "amount": 2, "front_curve_d": 2,
    "base_deg": 1,
}

# How a key's numbers are rounded: a number of decimals, or one of these.
_AXIS, _BASE, _KEEP = "axis", "base", "keep"


def _rule_for(key: str) -> Any:
    if key == "axis":
        return _AXIS
    if key == "base_deg":
        return _BASE
    if key in _DECIMALS:
        return _DECIMALS[key]
    if key.endswith(("_mm", "_g")):
        return 1
    return _KEEP


def _rounded(rule: Any, value: float) -> Any:
    if rule is _AXIS:
        axis = round(value) % 180
        return 180 if axis == 0 else axis
    if rule is _BASE:
        rounded = round(value, 1)
        return 0.0 if rounded >= 360.0 else rounded + 0.0
    return round(value, rule) + 0.0  # no negative zero


# Rounding is a pure function of the rule and the value, and the same values come back order after order
# (prescribed powers in quarter dioptres, indices, lengths...): each rule keeps a bounded table of the values
# it has rounded. Each key name is learnt once (the names are the contract's and the stages' own, a small
# set) as its rule's table, or None for a key whose numbers are kept as they are.
_MEMO_LIMIT = 8192
_TABLES: dict[Any, dict[float, Any]] = {}
_BY_KEY: dict[str, dict[float, Any] | None] = {}
_KEYS_LIMIT = 4096  # a plugin inventing keys per order must not grow the table without end
_UNKNOWN = object()
_ATOMS = frozenset((str, int, bool, type(None)))


def _table(key: str) -> dict[float, Any] | None:
    """The rounding table of a key name (None: its numbers are kept), learnt on first sight."""
    table = _BY_KEY.get(key, _UNKNOWN)
    return _table_for(key) if table is _UNKNOWN else table


def _table_for(key: str) -> dict[float, Any] | None:
    rule = _rule_for(key)
    table = None if rule is _KEEP else _TABLES.setdefault(rule, {})
    if len(_BY_KEY) < _KEYS_LIMIT:
        _BY_KEY[key] = table
    return table


def _round_into(table: dict[float, Any], key: str, value: float) -> Any:
    shown = _rounded(_rule_for(key), value)
    if len(table) >= _MEMO_LIMIT:
        table.clear()
    table[value] = shown
    return shown


def _round_key(key: str, value: float) -> Any:
    table = _table(key)
    if table is None:
        return value
    shown = table.get(value)
    return shown if shown is not None else _round_into(table, key, value)


def present(value: Any, key: str = "") -> Any:
    """Round every number in ``value`` by the name of the field that holds it."""
    # Exact types first: result values are plain JSON (dicts, lists, str, int, float, bool, None).
    kind = type(value)
    if kind is float:
        return _round_key(key, value) if key else value
    if kind is dict:
        return _present_dict(value)
    if kind is list:
        return _present_list(value, key)
    if kind in _ATOMS:
        return value
    # Subclasses (and anything else) by the general rules.
    if isinstance(value, dict):
        return {k: present(v, k) for k, v in value.items()}
    if isinstance(value, list):
        return [present(v, key) for v in value]
    if isinstance(value, float) and key:
        return _round_key(key, value)
    return value


def _present_dict(value: dict) -> dict:
    shown = {}
    by_key = _BY_KEY
    for k, v in value.items():
        kind = type(v)
        if kind is float:
            # Inline _round_key (the key "" keeps its value, as present(v, "") does).
            table = by_key.get(k, _UNKNOWN)
            if table is _UNKNOWN:
                table = _table_for(k)
            if table is None:
                shown[k] = v
            else:
                rounded = table.get(v)
                shown[k] = rounded if rounded is not None else _round_into(table, k, v)
        elif kind in _ATOMS:
            shown[k] = v
        elif kind is dict:
            shown[k] = _present_dict(v)
        else:
            shown[k] = present(v, k)
    return shown


def _present_list(value: list, key: str) -> list:
    table = _table(key)
    if table is None:
        return [v if type(v) is float or type(v) is str else present(v, key) for v in value]
    return [_round_key(key, v) if type(v) is float else present(v, key) for v in value]
