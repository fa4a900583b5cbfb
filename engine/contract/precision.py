"""What a result value may be — plain JSON — and its rounding to the contract's precision.

Stages carry full precision; values are rounded only where they are recorded or
published, by the name of the field that holds them: powers to 0.01 D, axes to
a whole degree 1–180, prism base to 0.1°, lengths to 0.1 mm, weights to 0.1 g.
Any other number is kept as it is.

A result value is plain JSON: strings, booleans, finite numbers, ``None``,
lists (a tuple counts as one) and objects with string keys. :func:`plain_copy`
and :func:`present` copy such a value in one walk and check it on the way:
anything else raises :class:`NotPlain`.
"""
from __future__ import annotations

from typing import Any

#: Decimals by field name; ``*_mm`` and ``*_g`` fields take one decimal.
DECIMALS = {"sphere": 2, "cylinder": 2, "add": 2, "amount": 2, "front_curve_d": 2}


class NotPlain(ValueError):
    """A value is not plain JSON: a NaN or an infinity, a key that is not a string, or an object of another kind."""


def round_number(key: str, value: float) -> float | int:
    """One number of the field ``key`` at the contract's precision (no negative zero)."""
    if key == "axis":
        axis = round(value) % 180
        return 180 if axis == 0 else axis
    if key == "base_deg":
        rounded = round(value, 1)
        return 0.0 if rounded >= 360.0 else rounded + 0.0
    if key in DECIMALS:
        return round(value, DECIMALS[key]) + 0.0
    if key.endswith(("_mm", "_g")):
        return round(value, 1) + 0.0
    return value


def present(value: Any, key: str = "") -> Any:
    """A copy of a plain JSON value with every number rounded by the name of the field that holds it.

    Dicts round each value by its own key; list items take the key of the list.
    Booleans and integers are kept as they are. Raises :class:`NotPlain` for
    anything that is not plain JSON.

    Examples
    --------
    >>> present({"sphere": -1.254, "axis": 179.6, "edge_mm": [2.04, 3.96], "weight_g": 12.349, "index": 1.586})
    {'sphere': -1.25, 'axis': 180, 'edge_mm': [2.0, 4.0], 'weight_g': 12.3, 'index': 1.586}
    >>> present({"sphere": float("nan")})
    Traceback (most recent call last):
    ...
    lenslane.contract.precision.NotPlain: nan
    """
    return _walk(value, key, True)


def plain_copy(value: Any) -> Any:
    """A copy of a plain JSON value, at full precision: no part of it is shared with ``value`` but the atoms.

    Raises :class:`NotPlain` for anything that is not plain JSON.

    Examples
    --------
    >>> value = {"edge_mm": (2.04, 3.96), "note": None}
    >>> plain_copy(value)
    {'edge_mm': [2.04, 3.96], 'note': None}
    >>> plain_copy({1: "a"})
    Traceback (most recent call last):
    ...
    lenslane.contract.precision.NotPlain: 1
    """
    return _walk(value, "", False)


_ATOMS = frozenset((str, int, bool, type(None)))


def _walk(value: Any, key: str, rounding: bool) -> Any:
    # One walk checks and copies (and rounds). The built-in types, by far the usual ones, are taken by their
    # exact type, a dict's or a list's atoms without a call; subclasses of them (an IntEnum, numpy's float64) by isinstance.
    # A float is finite exactly when value - value is 0.0 (it is NaN for a NaN or an infinity).
    kind = type(value)
    if kind is dict:
        copy = {}
        for name, item in value.items():
            if type(name) is not str and not isinstance(name, str):
                raise NotPlain(name)
            item_kind = type(item)
            if item_kind is float:
                if item - item:
                    raise NotPlain(item)
                copy[name] = round_number(name, item) if rounding else item
            elif item_kind in _ATOMS:
                copy[name] = item
            else:
                copy[name] = _walk(item, name, rounding)
        return copy
    if kind is list or kind is tuple:
        items = []
        for item in value:
            item_kind = type(item)
            if item_kind is float:
                if item - item:
                    raise NotPlain(item)
                items.append(round_number(key, item) if rounding and key else item)
            elif item_kind in _ATOMS:
                items.append(item)
            else:
                items.append(_walk(item, key, rounding))
        return items
    if kind is float or (kind not in _ATOMS and isinstance(value, float)):
        if value - value:
            raise NotPlain(value)
        return round_number(key, value) if rounding and key else value
    if kind in _ATOMS or isinstance(value, (str, int)):
        return value
    if isinstance(value, dict):
        return _walk(dict(value), key, rounding)
    if isinstance(value, (list, tuple)):
        return _walk(list(value), key, rounding)
    raise NotPlain(value)
