"""Tilt: the power of a lens seen obliquely, and the lens to make so that, tilted, it gives the prescription.

A lens tilted by θ acts, along the line of sight, as a stronger sphere with a
cylinder whose axis lies along the tilt axis (Martin's formula). With the power
matrix the effect of a tilt on any sphero-cylinder is

    F_eff = k · Sᵀ F S,   k = 1 + sin²θ / (2n),   S = I + (sec θ − 1) t tᵀ,

t the unit vector of the tangential meridian (perpendicular to the tilt axis).
The compensated lens is the exact inverse, ``F = S⁻ᵀ F_w S⁻¹ / k``.

Coordinates: x toward the observer's right (0° of the axis notation), y up
(90°), seen facing the wearer.

References
----------
.. [1] Martin's formula, as given in Jalie, *The Principles of Ophthalmic Lenses*,
   and in Brooks & Borish, *System for Ophthalmic Dispensing*.
.. [2] Harris, W. F. (2002). "Tilted power of thin lenses." Optometry and Vision
   Science; Keating, M. P. (1995), Optometry and Vision Science: the
   power-matrix generalisation to sphero-cylinders.
"""
from __future__ import annotations

import math
from typing import NamedTuple

from lenslane.plugins.optics.power import PowerMatrix

#: The tangential direction reported when there is no tilt (any direction is correct then).
NO_TILT_DIRECTION = (0.0, 1.0)


class Obliquity(NamedTuple):
    """The angle between the line of sight and the lens normal, and the tangential direction."""

    theta_rad: float
    tangential: tuple[float, float]


def tilt_obliquity(pantoscopic_deg: float, face_form_deg: float, eye: str) -> Obliquity:
    """Combine pantoscopic tilt and face form into one obliquity and its tangential direction.

    Parameters
    ----------
    pantoscopic_deg : float
        Pantoscopic tilt p, degrees; lower rim toward the cheek is positive.
    face_form_deg : float
        Face-form (wrap) angle w, degrees; temporal rims toward the face is positive.
    eye : {"right", "left"}
        The temporal side of the right lens is at the observer's left, so face
        form turns the two lenses in mirror image.

    Returns
    -------
    Obliquity
        ``theta_rad`` with ``cos θ = cos p · cos w`` and ``tangential`` the unit
        vector along ``(sin w, sin p)`` for the right eye, ``(−sin w, sin p)`` for
        the left; ``(0, 1)`` when θ = 0, where any direction is correct.

    Notes
    -----
    θ is computed as ``atan2(√(1 − cos²p cos²w), cos p cos w)``, which keeps
    full precision for small angles where ``acos`` would not. Valid for
    |p|, |w| < 90°.

    References
    ----------
    The combination of pantoscopic and face-form angles into one obliquity, as
    in the power-matrix treatment of tilted lenses (Harris 2002; Keating 1995).

    Examples
    --------
    >>> theta, t = tilt_obliquity(10.0, 0.0, "right")
    >>> round(math.degrees(theta), 6), t
    (10.0, (0.0, 1.0))
    >>> tilt_obliquity(0.0, 6.0, "left").tangential
    (-1.0, 0.0)
    """
    if eye not in ("right", "left"):
        raise ValueError(f"eye must be 'right' or 'left', not {eye!r}")
    p, w = math.radians(pantoscopic_deg), math.radians(face_form_deg)
    cos_theta = math.cos(p) * math.cos(w)
    sin_p, sin_w = math.sin(p), math.sin(w)
    # 1 − cos²p cos²w, written so that it does not cancel for small angles.
    sin2_theta = sin_p * sin_p + sin_w * sin_w - sin_p * sin_p * sin_w * sin_w
    theta = math.atan2(math.sqrt(max(sin2_theta, 0.0)), cos_theta)
    tx = sin_w if eye == "right" else -sin_w
    length = math.hypot(tx, sin_p)
    if theta == 0.0 or length == 0.0:
        return Obliquity(0.0, NO_TILT_DIRECTION)
    return Obliquity(theta, (tx / length + 0.0, sin_p / length + 0.0))


def martin_factor(theta: float, n: float) -> float:
    """Martin's spherical factor ``k = 1 + sin²θ / (2n)``.

    Parameters
    ----------
    theta : float
        Obliquity, radians.
    n : float
        Refractive index of the lens.

    Returns
    -------
    float
        The factor by which the tilt strengthens the sagittal power of a thin lens.

    Notes
    -----
    The second-order (small-angle) form of :func:`exact_thin_factor`; the term
    it leaves out is ``sin⁴θ (n² + n + 1) / (8 n³)`` to leading order, about
    0.2 % of the power at 20° and n = 1.5.

    References
    ----------
    Martin's formula, as given in Jalie, *The Principles of Ophthalmic Lenses*.

    Examples
    --------
    >>> round(martin_factor(math.radians(10.0), 1.5), 5)
    1.01005
    """
    sin_theta = math.sin(theta)
    return 1.0 + sin_theta * sin_theta / (2.0 * n)


def exact_thin_factor(theta: float, n: float) -> float:
    """The exact oblique factor of a zero-thickness lens, ``(√(n² − sin²θ) − cos θ) / (n − 1)``.

    Parameters
    ----------
    theta : float
        Obliquity, radians.
    n : float
        Refractive index (n > 1).

    Returns
    -------
    float
        The ratio of the sagittal power along the oblique ray to the paraxial
        power, for a thin lens in air (Coddington's equations); the tangential
        power is this times ``sec²θ``.

    Notes
    -----
    For comparison and notes only: the engine's contract uses
    :func:`martin_factor`.

    References
    ----------
    Coddington's equations for a thin lens in air; the same expression in the
    notes on Martin's formula (Harris 2002).

    Examples
    --------
    >>> round(exact_thin_factor(math.radians(10.0), 1.5), 5)
    1.01021
    """
    sin_theta = math.sin(theta)
    return (math.sqrt(n * n - sin_theta * sin_theta) - math.cos(theta)) / (n - 1.0)


def _stretch(theta: float, tangential: tuple[float, float], amount: float) -> PowerMatrix:
    """``I + amount · t tᵀ`` as a symmetric matrix (t normalised here)."""
    tx, ty = tangential
    length = math.hypot(tx, ty)
    if length == 0.0:
        if theta == 0.0:
            return PowerMatrix(1.0, 0.0, 1.0)
        raise ValueError("the tangential direction must not be the zero vector")
    tx, ty = tx / length, ty / length
    return PowerMatrix(1.0 + amount * tx * tx, amount * tx * ty, 1.0 + amount * ty * ty)


def _congruence(matrix: PowerMatrix, s: PowerMatrix, factor: float) -> PowerMatrix:
    """``factor · S F S`` for symmetric ``S`` and ``F`` (so ``Sᵀ = S``), in plain floats."""
    a, b, c = matrix
    s11, s12, s22 = s
    g11, g12 = a * s11 + b * s12, a * s12 + b * s22
    g21, g22 = b * s11 + c * s12, b * s12 + c * s22
    return PowerMatrix(
        factor * (s11 * g11 + s12 * g21),
        factor * (s11 * g12 + s12 * g22) + 0.0,
        factor * (s12 * g12 + s22 * g22),
    )


def tilted_power(matrix: PowerMatrix, theta: float, tangential: tuple[float, float], n: float) -> PowerMatrix:
    """The effective power of a lens tilted by θ, along the line of sight (the forward model).

    Parameters
    ----------
    matrix : PowerMatrix
        The lens's power matrix, D.
    theta : float
        Obliquity, radians (from :func:`tilt_obliquity`).
    tangential : (float, float)
        Direction of the tangential meridian, the plane containing the line of
        sight and the lens normal; normalised here.
    n : float
        Refractive index of the lens.

    Returns
    -------
    PowerMatrix
        ``k · Sᵀ F S`` with ``k`` :func:`martin_factor` and
        ``S = I + (sec θ − 1) t tᵀ``.

    Notes
    -----
    For a sphere F this is Martin's formula: sphere ``kF`` and a cylinder
    ``kF tan²θ`` with its axis along the tilt axis (pantoscopic tilt: axis 180;
    face form: axis 90). Thin-lens model; good to the order of sin⁴θ.

    References
    ----------
    Martin's formula (Jalie; Brooks & Borish); power-matrix generalisation,
    Harris, Optom Vis Sci 2002, and Keating, Optom Vis Sci 1995.

    Examples
    --------
    >>> from lenslane.plugins.optics.power import power_matrix, sphero_cylinder
    >>> tilted = tilted_power(power_matrix(15.0), math.radians(10.0), (0.0, 1.0), 1.5)
    >>> [round(v, 2) for v in sphero_cylinder(tilted, "plus")]
    [15.15, 0.47, 180.0]
    """
    s = _stretch(theta, tangential, 1.0 / math.cos(theta) - 1.0)
    return _congruence(matrix, s, martin_factor(theta, n))


def compensate_tilt(wanted: PowerMatrix, theta: float, tangential: tuple[float, float], n: float) -> PowerMatrix:
    """The lens to make so that, tilted by θ, it acts as ``wanted`` (the exact inverse).

    Parameters
    ----------
    wanted : PowerMatrix
        The effective power wanted along the line of sight, D.
    theta : float
        Obliquity, radians.
    tangential : (float, float)
        Direction of the tangential meridian; normalised here.
    n : float
        Refractive index of the lens.

    Returns
    -------
    PowerMatrix
        ``F = S⁻ᵀ F_w S⁻¹ / k``, with ``S⁻¹ = I + (cos θ − 1) t tᵀ``, so that
        ``tilted_power(F, θ, t, n)`` returns ``wanted``.

    Notes
    -----
    Not the induced power subtracted: subtracting ``tilted_power(F_w) − F_w``
    from ``F_w`` differs from the exact inverse by up to about a tenth of a
    dioptre at high powers.

    References
    ----------
    The inverse of the power-matrix form of Martin's formula (Harris 2002;
    Keating 1995).

    Examples
    --------
    >>> from lenslane.plugins.optics.power import power_matrix, sphero_cylinder
    >>> lens = compensate_tilt(power_matrix(-5.0, -2.0, 30), math.radians(12.0), (0.0, 1.0), 1.523)
    >>> [round(v, 2) for v in sphero_cylinder(lens)]
    [-4.87, -1.81, 33.5]
    """
    s_inverse = _stretch(theta, tangential, math.cos(theta) - 1.0)
    return _congruence(wanted, s_inverse, 1.0 / martin_factor(theta, n))


def tangential_meridian_deg(tangential: tuple[float, float]) -> float:
    """The tangential direction as a meridian in the axis notation, 0 ≤ φ < 180 degrees.

    Examples
    --------
    >>> tangential_meridian_deg((0.0, 1.0))
    90.0
    """
    return math.degrees(math.atan2(tangential[1], tangential[0])) % 180.0
