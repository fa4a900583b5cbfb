"""Prism at a point of a lens (Prentice's rule, matrix form), vertical imbalance, transverse chromatism.

Positions are in the front view of the standard axis notation (x to the
observer's right, y up), measured from the optical centre. A prism vector points
from apex to base, so its direction is the base direction in degrees 0–360.

References
----------
.. [1] Prentice, C. F. (1890). "A metric system of numbering and measuring
   prisms." Archives of Ophthalmology 19: 64–75, 128–135 (P = c F).
.. [2] Long, W. F. (1976). "A matrix formalism for decentration problems."
   American Journal of Optometry and Physiological Optics 53(1): 27–33
   (p = −F c).
"""
from __future__ import annotations

import math

from lenslane.plugins.optics.power import PowerMatrix
from lenslane.plugins.optics.prism import Prism

#: Depth of the usual reading point below the distance optical centre, mm (common practice).
READING_DEPTH_MM = 10.0


def prentice_prism_vector(matrix: PowerMatrix, x_mm: float, y_mm: float) -> tuple[float, float]:
    """The prism (horizontal, vertical components in Δ) at a point of a lens, ``p = −F c``.

    Parameters
    ----------
    matrix : PowerMatrix
        The lens's dioptric power matrix, D.
    x_mm, y_mm : float
        The point, mm from the optical centre (front view: x to the observer's
        right, y up).

    Returns
    -------
    (float, float)
        Prism components in Δ, the vector pointing toward the base (c in cm).

    Notes
    -----
    Thin-lens first-order optics; a good model within the lens's aperture for
    the powers of spectacle lenses. Works for oblique cylinders, where the
    prism is not parallel to the decentration.

    References
    ----------
    Prentice (1890); matrix form, Long (1976).

    Examples
    --------
    A −4.00 D lens, 5 mm below its centre: 2Δ base down.

    >>> from lenslane.plugins.optics.power import power_matrix
    >>> [round(v, 6) + 0.0 for v in prentice_prism_vector(power_matrix(-4.0), 0.0, -5.0)]
    [0.0, -2.0]
    """
    cx, cy = x_mm / 10.0, y_mm / 10.0
    return -(matrix.xx * cx + matrix.xy * cy), -(matrix.xy * cx + matrix.yy * cy)


def prentice_prism(matrix: PowerMatrix, x_mm: float, y_mm: float) -> Prism:
    """The prism at a point of a lens as an amount (Δ) and a base direction (degrees 0–360).

    Parameters
    ----------
    matrix : PowerMatrix
        The lens's dioptric power matrix, D.
    x_mm, y_mm : float
        The point, mm from the optical centre, front view.

    Returns
    -------
    Prism
        Amount and base direction; base 0 for no prism.

    References
    ----------
    Prentice (1890); matrix form, Long (1976).

    Examples
    --------
    −4.00 −2.00 × 180, 5 mm below the optical centre: 3.0Δ base down (270°).

    >>> from lenslane.plugins.optics.power import power_matrix
    >>> prism = prentice_prism(power_matrix(-4.0, -2.0, 180), 0.0, -5.0)
    >>> round(prism.amount, 6), round(prism.base_deg, 6)
    (3.0, 270.0)
    """
    horizontal, vertical = prentice_prism_vector(matrix, x_mm, y_mm)
    amount = math.hypot(horizontal, vertical)
    if amount < 1e-12:
        return Prism(0.0, 0.0)
    return Prism(amount, math.degrees(math.atan2(vertical, horizontal)) % 360.0)


def vertical_imbalance(right: PowerMatrix, left: PowerMatrix, depth_mm: float = READING_DEPTH_MM) -> float:
    """The vertical prism difference (Δ) between the eyes at a point ``depth_mm`` below both optical centres.

    Parameters
    ----------
    right, left : PowerMatrix
        The power matrices of the right and left lenses, D.
    depth_mm : float
        How far below the distance optical centres the eyes look, mm (about
        10 mm at the reading level; common practice).

    Returns
    -------
    float
        ``|p_y,R − p_y,L|`` in Δ, from :func:`prentice_prism_vector`; for lenses
        whose cylinder axes are 90 or 180 this is ``|F₉₀,R − F₉₀,L| × c``.

    Notes
    -----
    Both eyes are taken to look straight down by the same depth, without the
    near inset; the prism prescribed at the optical centres is left out, since
    it is meant.

    References
    ----------
    Prentice (1890); matrix form, Long (1976); vertical imbalance at the
    reading level as in opticianry training texts.

    Examples
    --------
    +1.00 right, +4.00 left, 10 mm down: 3.0Δ.

    >>> from lenslane.plugins.optics.power import power_matrix
    >>> round(vertical_imbalance(power_matrix(1.0), power_matrix(4.0)), 6)
    3.0
    """
    right_vertical = prentice_prism_vector(right, 0.0, -depth_mm)[1]
    left_vertical = prentice_prism_vector(left, 0.0, -depth_mm)[1]
    return abs(right_vertical - left_vertical)


def transverse_chromatic_aberration(prism_delta: float, abbe_number: float) -> float:
    """Transverse chromatic aberration (Δ) where a lens acts as a prism, ``TCA = P / V``.

    Parameters
    ----------
    prism_delta : float
        The prism at the point, Δ (e.g. from :func:`prentice_prism`).
    abbe_number : float
        The material's Abbe number V_d.

    Returns
    -------
    float
        The angular spread between the blue F and red C lines, Δ.

    References
    ----------
    Transverse chromatic aberration of an ophthalmic prism, P/V, as in
    Jalie, *The Principles of Ophthalmic Lenses*, and opticianry exam texts.

    Examples
    --------
    >>> round(transverse_chromatic_aberration(5.0, 30.0), 2)
    0.17
    """
    return prism_delta / abbe_number
