"""Rounding to the contract's precision, done once, when a value leaves the engine.

Stages carry full precision; values are rounded only where they are recorded or
published, by the name of the field that holds them: powers to 0.01 D, axes to
a whole degree 1–180, prism base to 0.1°, lengths to 0.1 mm, weights to 0.1 g.
Any other number is kept as it is.
"""
from __future__ import annotations

from typing import Any

#: Decimals by field name; ``*_mm`` and ``*_g`` fields take one decimal.
DECIMALS = {"sphere": 2, "cylinder": 2, "add": 2, "amount": 2, "front_curve_d": 2}


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
    """Round every number in ``value`` by the name of the field that holds it.

    Dicts round each value by its own key; list items take the key of the list.
    Booleans and integers other than an axis are kept as they are.
    """
    if isinstance(value, dict):
        return {k: present(v, k) for k, v in value.items()}
    if isinstance(value, list):
        return [present(v, key) for v in value]
    if isinstance(value, float) and key:
        return round_number(key, value)
    return value
