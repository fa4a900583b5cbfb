"""Sphero-cylinders and the dioptric power matrix.

References
----------
.. [1] Long, W. F. (1976). "A matrix formalism for decentration problems."
   American Journal of Optometry and Physiological Optics 53(1): 27–33.
.. [2] Harris, W. F. (1989–2002), papers on the dioptric power matrix, Optometry
   and Vision Science.
"""
from __future__ import annotations

import math
from typing import Any, Mapping, NamedTuple


class SpheroCylinder(NamedTuple):
    """A sphero-cylinder: sphere (D), cylinder (D), axis (degrees, 0 < axis ≤ 180)."""

    sphere: float
    cylinder: float
    axis: float


class PowerMatrix(NamedTuple):
    """The symmetric dioptric power matrix ``[[xx, xy], [xy, yy]]`` in dioptres.

    x points to the observer's right (0° of the axis notation), y upward (90°).
    """

    xx: float
    xy: float
    yy: float


def power_matrix(sphere: float, cylinder: float = 0.0, axis: float = 180.0) -> PowerMatrix:
    """The power matrix of a sphero-cylinder.

    Parameters
    ----------
    sphere, cylinder : float
        Dioptres, in either cylinder form.
    axis : float
        Cylinder axis in degrees, standard notation.

    Returns
    -------
    PowerMatrix
        ``F = [[S + C sin²α, −C sinα cosα], [−C sinα cosα, S + C cos²α]]``.

    Notes
    -----
    The matrix is the same for both cylinder forms of one lens and adds like a
    number for thin lenses in contact.

    References
    ----------
    Long (1976), Am J Optom Physiol Opt 53:27.

    Examples
    --------
    >>> [round(v, 6) + 0.0 for v in power_matrix(-1.0, -2.0, 180)]
    [-1.0, 0.0, -3.0]
    """
    alpha = math.radians(axis)
    s, c = math.sin(alpha), math.cos(alpha)
    return PowerMatrix(sphere + cylinder * s * s, -cylinder * s * c + 0.0, sphere + cylinder * c * c)


def matrix_of(power: Mapping[str, Any]) -> PowerMatrix:
    """The power matrix of a sphero-cylinder written as an order or a result writes it, ``{"sphere", "cylinder",
    "axis"}`` (no cylinder: none; no axis: 180).

    Examples
    --------
    >>> matrix_of({"sphere": -1.0, "cylinder": -2.0, "axis": 90}) == power_matrix(-1.0, -2.0, 90)
    True
    >>> matrix_of({"sphere": 2.5}) == power_matrix(2.5)
    True
    """
    return power_matrix(power["sphere"], power.get("cylinder") or 0.0, power.get("axis") or 180.0)


def principal_powers(matrix: PowerMatrix) -> tuple[float, float, float]:
    """The larger and smaller principal powers and the direction (degrees, 0 ≤ φ < 180) of the larger.

    Examples
    --------
    >>> principal_powers(PowerMatrix(-1.0, 0.0, -3.0))
    (-1.0, -3.0, 0.0)
    """
    xx, xy, yy = matrix
    mean = (xx + yy) / 2.0
    radius = math.hypot((xx - yy) / 2.0, xy)
    # Eigenvector of the larger eigenvalue: angle of (xy, larger − xx) or, equivalently,
    # half the angle of the vector ((xx − yy)/2, xy).
    direction = math.degrees(0.5 * math.atan2(xy, (xx - yy) / 2.0)) % 180.0
    return mean + radius, mean - radius, direction


def sphero_cylinder(matrix: PowerMatrix, form: str = "minus", axis_if_spherical: float = 180.0) -> SpheroCylinder:
    """A power matrix written as a sphero-cylinder in the given cylinder form.

    Parameters
    ----------
    matrix : PowerMatrix
    form : {"minus", "plus"}
        Minus form: the sphere is the larger principal power, the cylinder is
        negative and its axis is the direction of the larger power. Plus form is
        its transposition.
    axis_if_spherical : float
        The axis to report when the lens has no cylinder (any axis is correct).

    Returns
    -------
    SpheroCylinder
        Full precision; axis in (0, 180].

    References
    ----------
    Long (1976); Harris, power-matrix papers (eigen-decomposition of F).

    Examples
    --------
    >>> sphero_cylinder(power_matrix(-2.0, 1.5, 90))
    SpheroCylinder(sphere=-0.5, cylinder=-1.5, axis=180.0)
    """
    larger, smaller, direction = principal_powers(matrix)
    cylinder = smaller - larger
    if abs(cylinder) < 1e-12:
        return SpheroCylinder(larger, 0.0, _axis_range(axis_if_spherical))
    if form == "minus":
        return SpheroCylinder(larger, cylinder, _axis_range(direction))
    if form == "plus":
        return SpheroCylinder(smaller, -cylinder, _axis_range(direction + 90.0))
    raise ValueError(f"cylinder form must be 'minus' or 'plus', not {form!r}")


def transpose(sphere: float, cylinder: float, axis: float) -> SpheroCylinder:
    """Transposition: the same lens in the other cylinder form.

    ``(S, C, α) → (S + C, −C, α ± 90°)``, axis kept in (0, 180].

    References
    ----------
    The standard transposition rule of ophthalmic optics (any text, e.g. Jalie,
    *The Principles of Ophthalmic Lenses*).

    Examples
    --------
    >>> transpose(-2.0, 1.5, 90)
    SpheroCylinder(sphere=-0.5, cylinder=-1.5, axis=180.0)
    """
    return SpheroCylinder(sphere + cylinder, -cylinder, _axis_range(axis + 90.0))


def in_form(sphere: float, cylinder: float, axis: float, form: str = "minus") -> SpheroCylinder:
    """The sphero-cylinder written in the given form, transposing only when needed.

    Examples
    --------
    >>> in_form(-2.0, 1.5, 90, "minus")
    SpheroCylinder(sphere=-0.5, cylinder=-1.5, axis=180.0)
    """
    if form not in ("minus", "plus"):
        raise ValueError(f"cylinder form must be 'minus' or 'plus', not {form!r}")
    if (form == "minus" and cylinder > 0) or (form == "plus" and cylinder < 0):
        return transpose(sphere, cylinder, axis)
    return SpheroCylinder(sphere, cylinder, _axis_range(axis))


def spherical_equivalent(sphere: float, cylinder: float) -> float:
    """Sphere plus half the cylinder, in dioptres."""
    return sphere + cylinder / 2.0


def meridian_power(matrix: PowerMatrix, direction_deg: float) -> float:
    """The power acting in the meridian at ``direction_deg`` (the normal curvature, Euler's theorem).

    Examples
    --------
    >>> meridian_power(power_matrix(-4.0, -2.0, 180), 90)
    -6.0
    """
    phi = math.radians(direction_deg)
    c, s = math.cos(phi), math.sin(phi)
    xx, xy, yy = matrix
    return xx * c * c + 2.0 * xy * s * c + yy * s * s


def _axis_range(axis: float) -> float:
    axis = axis % 180.0
    return 180.0 if axis < 1e-9 or 180.0 - axis < 1e-9 else axis


def nearest_step(value: float, step: float) -> float:
    """The multiple of ``step`` nearest to ``value`` (a power on a generator's or a prescription's step).

    The result is cleaned of the last binary digits a product like ``17 × 0.01``
    leaves, so that a value on the step reads exactly as written.

    Examples
    --------
    >>> nearest_step(-2.137, 0.01), nearest_step(0.99, 0.25), nearest_step(-0.37, 0.125)
    (-2.14, 1.0, -0.375)
    """
    return round(round(value / step) * step, 10) + 0.0


def is_on_step(value: float, step: float, written_to_d: float = 0.005) -> bool:
    """Whether a written value lies on the step, allowing for eighths written to two decimals (2.12 for 2.125).

    Examples
    --------
    >>> is_on_step(-2.25, 0.25), is_on_step(-2.13, 0.25), is_on_step(2.12, 0.125), is_on_step(2.13, 0.125)
    (True, False, True, True)
    """
    return abs(value - nearest_step(value, step)) <= written_to_d + 1e-9
