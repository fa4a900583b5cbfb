"""ANSI Z80.1-2015 power tolerances, and how far a compensation moves each principal meridian.

The engine uses the tolerances to say whether a compensation is clinically
significant: a change larger than the tolerance is one a lensmeter would see,
so the practice should hear of it.

References
----------
.. [1] ANSI Z80.1-2015, Ophthalmics — Prescription Ophthalmic Lenses —
   Recommendations (quick-reference table of power tolerances).
"""
from __future__ import annotations

from typing import NamedTuple

from lenslane.plugins.optics.power import PowerMatrix, meridian_power, principal_powers


def _nominal(power: float) -> float:
    # The table is written for labelled powers, to 0.01 D; compare the magnitude
    # so written, so that 2.0000001 D falls in the "≤ 2.00" row.
    return round(abs(power), 2)


def meridian_tolerance(power: float) -> float:
    """The tolerance on the power of a meridian (the sphere-meridian row), ± D.

    Parameters
    ----------
    power : float
        The nominal power of the meridian, D (either sign).

    Returns
    -------
    float
        0.13 D up to ±6.50 D; 2 % of the power beyond.

    References
    ----------
    ANSI Z80.1-2015, sphere-meridian power tolerance.

    Examples
    --------
    >>> meridian_tolerance(-4.0), round(meridian_tolerance(10.0), 3)
    (0.13, 0.2)
    """
    magnitude = _nominal(power)
    return 0.13 if magnitude <= 6.50 else 0.02 * magnitude


def cylinder_tolerance(cylinder: float) -> float:
    """The tolerance on the cylinder power, ± D.

    Parameters
    ----------
    cylinder : float
        Nominal cylinder, D (either form).

    Returns
    -------
    float
        0.13 D up to 2.00 D, 0.15 D up to 4.50 D, 4 % of the cylinder above.

    References
    ----------
    ANSI Z80.1-2015, cylinder power tolerance.

    Examples
    --------
    >>> cylinder_tolerance(-1.25), cylinder_tolerance(3.0), round(cylinder_tolerance(-5.0), 3)
    (0.13, 0.15, 0.2)
    """
    magnitude = _nominal(cylinder)
    if magnitude <= 2.00:
        return 0.13
    if magnitude <= 4.50:
        return 0.15
    return 0.04 * magnitude


def axis_tolerance(cylinder: float) -> float | None:
    """The tolerance on the cylinder axis, ± degrees, by the nominal cylinder.

    Parameters
    ----------
    cylinder : float
        Nominal cylinder, D (either form).

    Returns
    -------
    float or None
        14° for 0.12–0.25 D, 7° up to 0.50 D, 5° up to 0.75 D, 3° up to 1.50 D,
        2° above; ``None`` below 0.12 D, where the table sets no axis tolerance.

    References
    ----------
    ANSI Z80.1-2015, cylinder axis tolerance.

    Examples
    --------
    >>> axis_tolerance(-0.25), axis_tolerance(-1.0), axis_tolerance(-2.5), axis_tolerance(0.0)
    (14.0, 3.0, 2.0, None)
    """
    magnitude = _nominal(cylinder)
    if magnitude < 0.12:
        return None
    for upper, degrees in ((0.25, 14.0), (0.50, 7.0), (0.75, 5.0), (1.50, 3.0)):
        if magnitude <= upper:
            return degrees
    return 2.0


def add_tolerance(add: float) -> float:
    """The tolerance on a multifocal add, ± D.

    Parameters
    ----------
    add : float
        Nominal add, D.

    Returns
    -------
    float
        0.12 D up to +4.00 D; 0.18 D above (that row from memory; orders carry
        adds up to +4.00 D only).

    References
    ----------
    ANSI Z80.1-2015, addition power tolerance.

    Examples
    --------
    >>> add_tolerance(2.25)
    0.12
    """
    return 0.12 if _nominal(add) <= 4.00 else 0.18


class MeridianChange(NamedTuple):
    """How a compensation moved one principal meridian of the lens before it."""

    direction_deg: float
    before: float
    after: float
    change: float
    tolerance: float


def principal_meridian_changes(before: PowerMatrix, after: PowerMatrix) -> tuple[MeridianChange, MeridianChange]:
    """The change in each principal meridian of ``before``, beside that meridian's Z80.1 tolerance.

    Parameters
    ----------
    before, after : PowerMatrix
        The lens before and after a compensation, D.

    Returns
    -------
    (MeridianChange, MeridianChange)
        For the two principal meridians of ``before`` (of ``after`` when
        ``before`` is a sphere, whose every meridian is principal): direction
        in degrees, the power before and after in that meridian (Euler's
        theorem), the change, and :func:`meridian_tolerance` of the power before.

    References
    ----------
    ANSI Z80.1-2015 sphere-meridian tolerance; meridian power by Euler's
    theorem on the power matrix.

    Examples
    --------
    >>> from lenslane.plugins.optics.power import power_matrix
    >>> first, second = principal_meridian_changes(power_matrix(-4.0, -1.0, 180), power_matrix(-4.1, -1.0, 180))
    >>> round(first.change, 6), first.tolerance
    (-0.1, 0.13)
    """
    larger, smaller, direction = principal_powers(before)
    if larger - smaller < 1e-9:
        direction = principal_powers(after)[2]
    other = (direction + 90.0) % 180.0
    was, now = meridian_power(before, direction), meridian_power(after, direction)
    first = MeridianChange(direction, was, now, now - was, meridian_tolerance(was))
    was, now = meridian_power(before, other), meridian_power(after, other)
    return first, MeridianChange(other, was, now, now - was, meridian_tolerance(was))


def axis_shift_deg(before_axis: float, after_axis: float) -> float:
    """The signed rotation of a cylinder axis, degrees in (−90, 90].

    Axes are directions, so 178° → 3° is a rotation of +5°, not −175°.

    Examples
    --------
    >>> axis_shift_deg(178.0, 3.0), axis_shift_deg(30.0, 26.5)
    (5.0, -3.5)
    """
    shift = (after_axis - before_axis) % 180.0
    return shift - 180.0 if shift > 90.0 else shift
