"""Prism: base directions, resolution of components, the resultant.

References
----------
.. [1] ISO 8429: the standard axis notation (base directions in degrees).
.. [2] The resultant of horizontal and vertical prism, P = √(H² + V²) and base
   angle atan2(V, H), as in any ophthalmic dispensing text (worked example in
   the Durham Technical Community College ophthalmic dispensing prism module).
"""
from __future__ import annotations

import math
from typing import Iterable, NamedTuple

#: Base directions in words, per eye, in the standard 0–360° notation (seen facing the wearer).
BASE_WORDS: dict[str, dict[str, float]] = {
    "right": {"in": 0.0, "out": 180.0, "up": 90.0, "down": 270.0},
    "left": {"in": 180.0, "out": 0.0, "up": 90.0, "down": 270.0},
}


class Prism(NamedTuple):
    """A prism: amount in prism dioptres, base direction in degrees 0 ≤ base < 360."""

    amount: float
    base_deg: float


def base_direction(base: str | float, eye: str) -> float:
    """The base direction in degrees for a word (in/out/up/down) or a number, for one eye.

    Examples
    --------
    >>> base_direction("in", "right"), base_direction("in", "left")
    (0.0, 180.0)
    """
    if isinstance(base, str):
        try:
            return BASE_WORDS[eye][base]
        except KeyError:
            raise ValueError(f"unknown base {base!r} for eye {eye!r}") from None
    return float(base) % 360.0


def prism_vector(amount: float, base_deg: float) -> tuple[float, float]:
    """Horizontal and vertical components (Δ) of a prism, base direction in degrees."""
    angle = math.radians(base_deg)
    return amount * math.cos(angle), amount * math.sin(angle)


def resultant_prism(components: Iterable[tuple[float, str | float]], eye: str) -> Prism:
    """Combine prism components of one eye into a single resultant prism.

    Parameters
    ----------
    components : iterable of (amount, base)
        Amount in Δ; base a word (in/out/up/down) or degrees 0–360.
    eye : {"right", "left"}
        Needed to turn in/out into degrees.

    Returns
    -------
    Prism
        ``P = √(H² + V²)``, base ``atan2(V, H)`` in 0 ≤ base < 360.

    References
    ----------
    Resultant prism by vector addition; worked example (1.5Δ up + 2Δ in →
    2.5Δ at 36.9° right eye) in the Durham Technical Community College
    ophthalmic dispensing prism module.

    Examples
    --------
    >>> p = resultant_prism([(1.5, "up"), (2.0, "in")], "right")
    >>> round(p.amount, 2), round(p.base_deg, 1)
    (2.5, 36.9)
    """
    horizontal = vertical = 0.0
    for amount, base in components:
        h, v = prism_vector(amount, base_direction(base, eye))
        horizontal += h
        vertical += v
    amount = math.hypot(horizontal, vertical)
    if amount < 1e-12:
        return Prism(0.0, 0.0)
    base = math.degrees(math.atan2(vertical, horizontal)) % 360.0
    # A direction a hair below 0° wraps to 360.0 in floating point: that is 0°.
    return Prism(amount, base if base < 360.0 else 0.0)
