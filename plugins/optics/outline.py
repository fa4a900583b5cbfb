"""The lens outline (boxing system) as points about the box centre.

Conventions: radii at equal angle steps, the first at 0°, counter-clockwise, of
the right lens seen from the front, about its box centre; the left lens is the
mirror image. Boxing terms (A, B, DBL, ED) as in ISO 8624.
"""
from __future__ import annotations

import math
from typing import NamedTuple, Sequence

import numpy as np


class Extent(NamedTuple):
    """Width and height of the outline's box and twice its longest radius (mm)."""

    width_mm: float
    height_mm: float
    effective_diameter_mm: float


def unit_circle(count: int) -> tuple[np.ndarray, np.ndarray]:
    """cos θ and sin θ of ``count`` equal angle steps from 0°, counter-clockwise: the directions of an outline of
    ``count`` radii.

    Examples
    --------
    >>> [c.round(6).tolist() for c in unit_circle(4)]
    [[1.0, 0.0, -1.0, -0.0], [0.0, 1.0, 0.0, -1.0]]
    """
    angles = np.arange(count) * (2.0 * math.pi / count)
    return np.cos(angles), np.sin(angles)


def outline_points(radii_mm: Sequence[float], eye: str = "right") -> np.ndarray:
    """The outline as an (N, 2) array of x, y in mm about the box centre, seen from the front.

    x points to the observer's right, y up. The left lens mirrors the right about
    the vertical.

    Examples
    --------
    >>> outline_points([20.0] * 4).round(6).tolist()
    [[20.0, 0.0], [0.0, 20.0], [-20.0, 0.0], [-0.0, -20.0]]
    """
    radii = np.asarray(radii_mm, dtype=float)
    cosines, sines = unit_circle(radii.size)
    x = radii * cosines
    if eye == "left":
        x = -x
    return np.column_stack((x, radii * sines))


def outline_extent(radii_mm: Sequence[float]) -> Extent:
    """The box (A, B) and the ED of an outline given as radii about its box centre.

    Notes
    -----
    Sampled at the given radii only; with 36 or more radii the box is within a
    few hundredths of a millimetre of the continuous outline's for usual shapes.

    Examples
    --------
    >>> outline_extent([25.0] * 360).width_mm
    50.0
    """
    radii = np.asarray(radii_mm, dtype=float)
    cosines, sines = unit_circle(radii.size)
    # The points of outline_points, by coordinate (argmax/argmin: numpy's quick path to an extreme).
    x, y = radii * cosines, radii * sines
    width = float(x[x.argmax()] - x[x.argmin()])
    height = float(y[y.argmax()] - y[y.argmin()])
    return Extent(width, height, 2.0 * float(radii[radii.argmax()]))


# --------------------------------------------------------------------------
# The modelled outline, when the order sends none
# --------------------------------------------------------------------------

#: Radii of a modelled outline: one a degree, the first at 0°.
MODEL_RADII_COUNT = 360
#: Their directions (cos θ, sin θ of :func:`unit_circle`), the same for every modelled outline: constants of the
#: model like the count itself, worked out once (read-only arrays).
MODEL_DIRECTIONS = unit_circle(MODEL_RADII_COUNT)
MODEL_DIRECTIONS[0].flags.writeable = MODEL_DIRECTIONS[1].flags.writeable = False
#: The superellipse exponent used when the order gives no effective diameter.
DEFAULT_EXPONENT = 4.0
#: Exponent limits: 2 is the ellipse; 60 is all but the box rectangle.
_EXPONENT_RANGE = (2.0, 60.0)


class ModelledOutline(NamedTuple):
    """A modelled outline: the radii (mm, a read-only array) at equal steps from 0°, the superellipse exponent used,
    and the radii's directions (cos θ, sin θ: :func:`unit_circle`), for work on its points."""

    radii_mm: np.ndarray
    exponent: float
    directions: tuple[np.ndarray, np.ndarray]


def superellipse_radii(half_width_mm: float, half_height_mm: float, exponent: float,
                       count: int = MODEL_RADII_COUNT,
                       directions: tuple[np.ndarray, np.ndarray] | None = None) -> np.ndarray:
    """Radii (mm) of the superellipse ``|x/a|^m + |y/b|^m = 1`` at ``count`` equal angle steps from 0°.

    Parameters
    ----------
    half_width_mm, half_height_mm : float
        a = A/2 and b = B/2, mm.
    exponent : float
        m ≥ 2: 2 is the ellipse; larger values square the corners toward the box.
    count : int
        Number of radii, the first at 0°, counter-clockwise.
    directions : (ndarray, ndarray) or None
        ``unit_circle(count)`` when the caller has it already.

    Returns
    -------
    ndarray
        ``r(θ) = (|cos θ / a|^m + |sin θ / b|^m)^(−1/m)``.

    References
    ----------
    Lamé's superellipse (Lamé curve), as in any handbook of plane curves.

    Examples
    --------
    >>> superellipse_radii(26.0, 19.0, 2.0, 4).round(6).tolist()
    [26.0, 19.0, 26.0, 19.0]
    """
    cosines, sines = unit_circle(count) if directions is None else directions
    with np.errstate(divide="ignore"):
        inverse = (np.abs(cosines / half_width_mm) ** exponent
                   + np.abs(sines / half_height_mm) ** exponent)
    return inverse ** (-1.0 / exponent)


def longest_radius(half_width_mm: float, half_height_mm: float, exponent: float) -> float:
    """The longest radius of the superellipse |x/a|^m + |y/b|^m = 1 from its centre (mm), in closed form.

    Notes
    -----
    For m > 2 the farthest point is where the curve's normal points at the centre: with L the longer and S
    the shorter semi-axis, Lagrange's condition on x² + y² gives its short-axis coordinate over its long-axis
    one as v = (S/L)^(m/(m−2)); scaled onto the curve, the long-axis coordinate is
    L (1 + q^m)^(−1/m) with q = (S/L)^(2/(m−2)), and the radius is that times √(1 + v²). The axis ends are
    the nearest points for m > 2 (the curve is flatter there than the circle through them). For m = 2, the
    ellipse, it is L. Both powers of S/L ≤ 1 stay in range for every m > 2 (they fall to 0 as m → 2).

    Examples
    --------
    A square's superellipse reaches its diagonal at x = y = a·2^(−1/m):

    >>> round(longest_radius(20.0, 20.0, 4.0), 9) == round(20.0 * 2 ** 0.25, 9)
    True
    >>> longest_radius(26.0, 19.0, 2.0)
    26.0
    """
    longer, shorter = max(half_width_mm, half_height_mm), min(half_width_mm, half_height_mm)
    if exponent <= 2.0:
        return longer
    ratio = shorter / longer
    v = ratio ** (exponent / (exponent - 2.0))
    q = ratio ** (2.0 / (exponent - 2.0))
    return longer * (1.0 + q ** exponent) ** (-1.0 / exponent) * math.sqrt(1.0 + v * v)


def fitted_exponent(box_width_mm: float, box_height_mm: float, effective_diameter_mm: float) -> float:
    """The superellipse exponent whose longest radius is half the effective diameter.

    Parameters
    ----------
    box_width_mm, box_height_mm : float
        Boxing A and B, mm.
    effective_diameter_mm : float
        ED, mm: twice the longest radius from the box centre.

    Returns
    -------
    float
        m in [2, 60]. An ED no larger than the box's longer side gives the
        ellipse (m = 2); an ED at or beyond the box diagonal gives m = 60, all
        but the rectangle.

    Notes
    -----
    The superellipse grows with m (its ℓᵐ unit ball contains the smaller m's),
    so the longest radius rises monotonically and bisection finds m.

    References
    ----------
    Lamé's superellipse; boxing terms as in ISO 8624.

    Examples
    --------
    >>> round(fitted_exponent(52.0, 38.0, 52.0), 6)
    2.0
    """
    a, b = box_width_mm / 2.0, box_height_mm / 2.0
    target = effective_diameter_mm / 2.0
    low, high = _EXPONENT_RANGE
    if target <= longest_radius(a, b, low):
        return low
    if target >= longest_radius(a, b, high):
        return high
    for _ in range(60):
        middle = 0.5 * (low + high)
        if longest_radius(a, b, middle) < target:
            low = middle
        else:
            high = middle
    return 0.5 * (low + high)


def modelled_outline(box_width_mm: float, box_height_mm: float,
                     effective_diameter_mm: float | None = None,
                     exponent_without_ed: float = DEFAULT_EXPONENT) -> ModelledOutline:
    """The outline modelled from the box sizes and the effective diameter, for an order without ``outline_mm``.

    Parameters
    ----------
    box_width_mm, box_height_mm : float
        Boxing A and B, mm.
    effective_diameter_mm : float or None
        ED, mm. When given, the superellipse exponent is fitted so that twice
        the longest radius equals it (:func:`fitted_exponent`).
    exponent_without_ed : float
        The exponent used when the order gives no ED.

    Returns
    -------
    ModelledOutline
        360 radii about the box centre, one a degree from 0°, the exponent and
        the radii's directions.

    Notes
    -----
    A superellipse ``|x/(A/2)|^m + |y/(B/2)|^m = 1`` touches the box at the
    middle of each side, so its box is exactly A × B; the exponent sets how
    square the corners are, which is what ED measures. It is symmetric about
    both axes, so it is the same for the right and the left lens. Without an
    ED the exponent is 4 by default, a modelling choice: for a 52 × 38 mm box
    it gives an ED of 55.4 mm, A + 3.4 mm, as usual frame shapes run a few
    millimetres over A (common practice, from memory).

    References
    ----------
    Lamé's superellipse; boxing system (A, B, ED) as in ISO 8624.

    Examples
    --------
    >>> shape = modelled_outline(52.0, 38.0, 56.0)
    >>> round(2 * float(shape.radii_mm.max()), 2), round(outline_extent(shape.radii_mm).height_mm, 2)
    (56.0, 38.0)
    """
    if effective_diameter_mm is None:
        exponent = exponent_without_ed
    else:
        exponent = fitted_exponent(box_width_mm, box_height_mm, effective_diameter_mm)
    radii = superellipse_radii(box_width_mm / 2.0, box_height_mm / 2.0, exponent, MODEL_RADII_COUNT,
                               MODEL_DIRECTIONS)
    radii.flags.writeable = False
    return ModelledOutline(radii, exponent, MODEL_DIRECTIONS)


# --------------------------------------------------------------------------
# The optical centre and the blank
# --------------------------------------------------------------------------


class Decentration(NamedTuple):
    """Decentration of the optical centre from the box centre, mm: inward (toward the nose) and upward."""

    inward_mm: float
    upward_mm: float


def decentration(box_width_mm: float, bridge_mm: float, box_height_mm: float,
                 pd_mm: float, height_mm: float | None = None) -> Decentration:
    """How far the optical centre sits from the box centre, for one eye.

    Parameters
    ----------
    box_width_mm, bridge_mm, box_height_mm : float
        Boxing A, DBL and B, mm.
    pd_mm : float
        Monocular distance PD from the bridge centre, mm.
    height_mm : float or None
        Fitting (optical-centre) height above the box bottom, mm; None means
        half the box height (the contract's default).

    Returns
    -------
    Decentration
        Inward ``(A + DBL)/2 − PD`` (negative: outward) and upward ``height − B/2``.

    References
    ----------
    Boxing system, ISO 8624: frame PD = A + DBL; decentration per eye =
    (A + DBL)/2 − monocular PD, toward the nose.

    Examples
    --------
    >>> decentration(52.0, 18.0, 38.0, 32.0, 21.0)
    Decentration(inward_mm=3.0, upward_mm=2.0)
    """
    upward = 0.0 if height_mm is None else height_mm - box_height_mm / 2.0
    return Decentration((box_width_mm + bridge_mm) / 2.0 - pd_mm, upward)


def optical_centre(eye: str, offset: Decentration) -> tuple[float, float]:
    """The optical centre (x, y) in mm about the box centre, in the front view of :func:`outline_points`.

    Seen from the front, the nose lies toward +x for the right lens and −x
    for the left, as base-in prism does (0° right, 180° left, ISO 8429).

    Examples
    --------
    >>> optical_centre("right", Decentration(3.0, 1.0)), optical_centre("left", Decentration(3.0, 1.0))
    ((3.0, 1.0), (-3.0, 1.0))
    """
    if eye not in ("right", "left"):
        raise ValueError(f"eye must be 'right' or 'left', not {eye!r}")
    x = offset.inward_mm if eye == "right" else -offset.inward_mm
    return (x, offset.upward_mm)


def blank_diameter_mm(points_mm: np.ndarray, centre_mm: tuple[float, float], allowance_mm: float = 2.0) -> float:
    """The smallest blank that covers the outline: twice the farthest outline point from the optical centre, plus the allowance.

    Parameters
    ----------
    points_mm : ndarray, shape (N, 2)
        Outline points about the box centre, mm (:func:`outline_points`).
    centre_mm : (float, float)
        The optical centre about the box centre, mm (:func:`optical_centre`).
    allowance_mm : float
        Added for edging (common practice: 2 mm).

    Returns
    -------
    float
        Diameter in mm.

    References
    ----------
    Minimum blank size from the frame shape and the decentration, as in
    dispensing texts (e.g. Brooks & Borish, *System for Ophthalmic Dispensing*).

    Examples
    --------
    A round 56 mm outline, optical centre 3 mm inward:

    >>> round(blank_diameter_mm(outline_points([28.0] * 360), (3.0, 0.0)), 6)
    64.0
    """
    offsets = np.asarray(points_mm, dtype=float) - np.asarray(centre_mm, dtype=float)
    return blank_diameter_from_farthest_mm(float(np.max(np.hypot(offsets[:, 0], offsets[:, 1]))), allowance_mm)


def blank_diameter_from_farthest_mm(farthest_mm: float, allowance_mm: float = 2.0) -> float:
    """The smallest blank from the distance of the farthest outline point to the optical centre: ``2 r + allowance``.

    References
    ----------
    Minimum blank size, as in dispensing texts (e.g. Brooks & Borish, *System
    for Ophthalmic Dispensing*).

    Examples
    --------
    >>> blank_diameter_from_farthest_mm(31.0)
    64.0
    """
    return 2.0 * farthest_mm + allowance_mm


def blank_diameter_from_ed_mm(effective_diameter_mm: float, inward_mm: float, allowance_mm: float = 2.0) -> float:
    """The classic minimum blank size ``ED + 2 × decentration + allowance`` (mm).

    Notes
    -----
    An upper bound of :func:`blank_diameter_mm`: it assumes the longest radius
    points straight away from the decentration. A decentration outward counts
    by its size.

    References
    ----------
    Dispensing texts (e.g. Brooks & Borish, *System for Ophthalmic Dispensing*);
    some omit the allowance.

    Examples
    --------
    A 52, DBL 18, PD 64 (32 per eye), ED 56 → 3 mm per eye:

    >>> blank_diameter_from_ed_mm(56.0, decentration(52.0, 18.0, 38.0, 32.0).inward_mm)
    64.0
    """
    return effective_diameter_mm + 2.0 * abs(inward_mm) + allowance_mm


def vertical_extent_at(points_mm: np.ndarray, x_mm: float) -> tuple[float, float] | None:
    """The lowest and highest point of the outline on the vertical line x = ``x_mm`` (mm about the box centre).

    Parameters
    ----------
    points_mm : (N, 2) array
        The outline's points (:func:`outline_points`), the polygon through them, its last side closing it.
    x_mm : float
        The vertical line's distance right of the box centre, in the points' view, mm.

    Returns
    -------
    (float, float) or None
        y of the outline's lowest and highest crossing, mm; None when the line misses the outline.

    Examples
    --------
    A square-ish round lens of radius 20 mm, on its vertical through the centre:

    >>> [round(v, 6) for v in vertical_extent_at(outline_points([20.0] * 360), 0.0)]
    [-20.0, 20.0]
    """
    x, y = points_mm[:, 0], points_mm[:, 1]
    # Each side of the polygon runs from a point to the next; the last closes it, back to the first.
    offset = x - x_mm
    crosses = offset[:-1] * offset[1:] <= 0.0
    crosses &= x[:-1] != x[1:]
    closing = offset[-1] * offset[0] <= 0.0 and x[-1] != x[0]
    if not (closing or crosses.any()):
        return None
    start = np.flatnonzero(crosses)
    end = start + 1
    if closing:
        start, end = np.append(start, x.size - 1), np.append(end, 0)
    x_start, y_start = x[start], y[start]
    fraction = (x_mm - x_start) / (x[end] - x_start)
    heights = y_start + fraction * (y[end] - y_start)
    return float(heights.min()), float(heights.max())
