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


def _round_key(key: str, value: float) -> Any:
    if key == "axis":
        axis = round(value) % 180
        return 180 if axis == 0 else axis
    if key in _DECIMALS:
        decimals = _DECIMALS[key]
    elif key.endswith(("_mm", "_g")):
        decimals = 1
    else:
        return value
    rounded = round(value, decimals)
    if key == "base_deg" and rounded >= 360.0:
        rounded = 0.0
    return rounded + 0.0  # no negative zero


def present(value: Any, key: str = "") -> Any:
    """Round every number in ``value`` by the name of the field that holds it."""
    if isinstance(value, dict):
        return {k: present(v, k) for k, v in value.items()}
    if isinstance(value, list):
        return [present(v, key) for v in value]
    if isinstance(value, float) and key:
        return _round_key(key, value)
    return value
