"""The trade's notation: how a lens value is written for a person.

``−4.25 −1.25 × 170 add +2.25``, ``1.12Δ base 26.6°``, ``centre thickness 6.8 mm``:
powers with the typographic minus and a sign, axes in whole degrees, each
length with its unit. Pure functions of plain values, used by the text and HTML
renderers of an order's story and by stages that quote a power in a flag.
"""
from __future__ import annotations

from typing import Any

MINUS = "\u2212"  # the minus sign the trade prints, not a hyphen

_LABELS = {"front_curve_d": "front curve", "center_thickness_mm": "centre thickness",
           "blank_min_diameter_mm": "minimum blank diameter", "base_deg": "base"}
_UNITS = (("_mm", " mm"), ("_deg", "°"), ("_d", " D"), ("_g", " g"), ("_m", " m"))
_GEOMETRY_ORDER = ("front_curve_d", "center_thickness_mm", "edge_min_mm", "edge_max_mm",
                   "blank_min_diameter_mm", "weight_g")



def number(value: float, decimals: int = 2, sign: bool = False) -> str:
    """A number with the typographic minus; ``sign`` also writes ``+`` (powers always carry a sign)."""
    text = f"{abs(value):.{decimals}f}"
    if float(text) == 0:
        return text
    if value < 0:
        return MINUS + text
    return "+" + text if sign else text


def power_text(power: dict[str, Any], add: bool = True) -> str:
    """A sphero-cylinder as written on a prescription: ``−4.25 −1.25 × 170 add +2.25``.

    Full-precision values are written as the result publishes them: 0.01 D and
    a whole degree 1–180. ``add=False`` leaves out the add.

    Examples
    --------
    >>> power_text({"sphere": -4.2, "cylinder": -1.12, "axis": 173})
    '−4.20 −1.12 × 173'
    >>> power_text({"sphere": 0.0, "cylinder": -0.5, "axis": 90, "add": 2.0})
    'plano −0.50 × 90 add +2.00'
    >>> power_text({"sphere": -4.2013, "cylinder": -1.1249, "axis": 179.6, "add": 2.0}, add=False)
    '−4.20 −1.12 × 180'
    """
    sphere = power.get("sphere", 0.0)
    cylinder = power.get("cylinder") or 0.0
    text = "plano" if round(sphere, 2) == 0 else number(sphere, sign=True)
    if round(cylinder, 2) != 0:
        axis = round(power.get("axis") or 180) % 180 or 180
        text += f" {number(cylinder, sign=True)} × {axis}"
    elif text != "plano":
        text += " DS"
    if add and power.get("add") is not None:
        text += f" add {number(power['add'], sign=True)}"
    return text


def prism_text(prism: dict[str, Any]) -> str:
    """A resultant prism: ``1.12Δ base 26.6°``, or ``no prism``.

    Examples
    --------
    >>> prism_text({"amount": 1.12, "base_deg": 26.6})
    '1.12Δ base 26.6°'
    """
    amount = prism.get("amount") or 0.0
    if round(amount, 2) == 0:
        return "no prism"
    return f"{number(amount)}Δ base {number(prism.get('base_deg', 0.0), 1)}°"


def geometry_text(geometry: dict[str, Any]) -> str:
    """Lens geometry with units: ``front curve 4.00 D, centre thickness 1.0 mm, edge 3.9–6.8 mm, …``."""
    parts = []
    keys = [k for k in _GEOMETRY_ORDER if k in geometry] + sorted(k for k in geometry if k not in _GEOMETRY_ORDER)
    for key in keys:
        if key == "edge_max_mm" and "edge_min_mm" in geometry:
            continue
        if key == "edge_min_mm" and "edge_max_mm" in geometry:
            parts.append(f"edge {number(geometry['edge_min_mm'], 1)}–{number(geometry['edge_max_mm'], 1)} mm")
            continue
        parts.append(_item_text(key, geometry[key]))
    return ", ".join(parts)


def value_text(field: str, value: Any) -> str:
    """A result field's value in the notation its field calls for."""
    if value is None:
        return "(not set)"
    last = field.rsplit(".", 1)[-1]
    if isinstance(value, dict):
        if last in ("rx", "surfacing") or "sphere" in value:
            return power_text(value)
        if last == "prism" or "base_deg" in value:
            return prism_text(value)
        if last == "geometry":
            return geometry_text(value)
        return ", ".join(_item_text(k, v) for k, v in value.items())
    return _scalar_text(last, value)


def inputs_text(inputs: dict[str, Any]) -> str:
    """The inputs a method used, each with its unit: ``refraction vertex 12.0 mm, index 1.586``."""
    return ", ".join(_item_text(k, v) for k, v in inputs.items()) or "none recorded"


def _label(key: str) -> str:
    if key in _LABELS:
        return _LABELS[key]
    for suffix, _ in _UNITS:
        if key.endswith(suffix) and len(key) > len(suffix):
            return key[: -len(suffix)].replace("_", " ")
    return key.replace("_", " ")


def _item_text(key: str, value: Any) -> str:
    if isinstance(value, dict) and not {"sphere", "amount"} & value.keys():
        return f"{_label(key)} ({inputs_text(value)})"  # the inputs of one of several methods
    if isinstance(value, dict):
        return f"{_label(key)} {value_text(key, value)}"
    if isinstance(value, list):
        return f"{_label(key)} " + ("[" + "; ".join(_list_item_text(key, v) for v in value) + "]" if value else "none")
    return f"{_label(key)} {_scalar_text(key, value)}"


def _list_item_text(key: str, value: Any) -> str:
    if isinstance(value, dict) and "amount" in value and "base" in value:
        base = value["base"]
        base = f"{number(base, 1)}°" if isinstance(base, (int, float)) else base
        return f"{number(value['amount'])}Δ base {base}"
    if isinstance(value, dict):
        return ", ".join(_item_text(k, v) for k, v in value.items())
    return _scalar_text(key, value)


def _scalar_text(key: str, value: Any) -> str:
    if isinstance(value, bool):
        return "yes" if value else "no"
    if value is None:
        return "none"
    if not isinstance(value, (int, float)):
        return str(value)
    if key in ("sphere", "cylinder", "add"):
        return f"{number(value, sign=True)} D"
    if key == "axis":
        return f"{value}°"
    if key == "amount":
        return f"{number(value)}Δ"
    if key == "base_deg":
        return f"{number(value, 1)}°"
    for suffix, unit in _UNITS:
        if key.endswith(suffix):
            decimals = {"_d": 2, "_m": 4}.get(suffix, 1)
            return number(value, decimals, sign=suffix == "_d") + unit
    if isinstance(value, int):
        return number(value, 0)
    return number(value, 4).rstrip("0").rstrip(".")
