"""Lens thickness anywhere on the lens, the centre thickness a lab needs, and the weight.

The lens model (the contract's straightforward one): a spherical front of true
power F₁ at the lens index, a toric back solved from the thick-lens back vertex
power per principal meridian, both vertices at the optical centre, and any
prescribed prism as a plane wedge through the optical centre, thicker toward
the base. Thickness at a point p (mm, about the optical centre):

    t(p) = t_c − s(F₁, |p|) + s(F₂(φ), |p|) + (P / (100 (n − 1))) · (p · b)

with s the exact sag, φ the direction of p, F₂(φ) = F_a cos²(φ − α) + F_b sin²(φ − α)
the back's power in that direction (Euler's theorem) and b the unit vector of
the prism base. Points are arrays of shape (N, 2), x to the observer's right,
y up, in the standard axis notation (ISO 8429).

References
----------
.. [1] Jalie, M. *The Principles of Ophthalmic Lenses*: thickness from sags,
   minimum thickness, prism thickness ``g = P d / (100 (n − 1))``.
.. [2] Euler's theorem on the normal curvatures of a surface, as used for the
   power of a sphero-cylinder in an oblique meridian (Long 1976; Harris).
"""
from __future__ import annotations

import math
from typing import NamedTuple, Sequence

import numpy as np

from lenslane.plugins.optics.outline import unit_circle
from lenslane.plugins.optics.power import PowerMatrix, principal_powers
from lenslane.plugins.optics.surfaces import (
    ToricBack, back_surface_power, back_surface_power_slope, sag_from_squared_mm, sag_slope_per_curvature,
    surface_curvature_per_mm,
)


class LensNotMakeable(ValueError):
    """The lens cannot be made as asked: a surface does not reach the outline, or no thickness works."""


class LensShape(NamedTuple):
    """What fixes a lens's shape apart from its centre thickness.

    front_d : true front power (D) at the lens index; surfacing : the back
    vertex power to produce (power matrix, D); index : refractive index;
    prism_delta / prism_base_deg : the prescribed prism (Δ) and its base
    (degrees, 0–360, ISO 8429).
    """

    front_d: float
    surfacing: PowerMatrix
    index: float
    prism_delta: float = 0.0
    prism_base_deg: float = 0.0


def wedge_mm(prism_delta: float, diameter_mm: float, index: float) -> float:
    """The thickness difference a prism makes across a diameter, ``g = P·d / (100 (n − 1))``.

    Parameters
    ----------
    prism_delta : float
        Prism, prism dioptres (Δ).
    diameter_mm : float
        The distance across the lens along the base–apex line, mm.
    index : float
        Refractive index.

    Returns
    -------
    float
        mm, base edge minus apex edge.

    Notes
    -----
    Thin-prism approximation (deviation ≈ (n − 1) × apex angle), good to a
    few per cent up to about 10Δ.

    References
    ----------
    Jalie, *The Principles of Ophthalmic Lenses*: prism thickness difference.

    Examples
    --------
    >>> round(wedge_mm(3.0, 50.0, 1.5), 6)
    3.0
    """
    return prism_delta * diameter_mm / (100.0 * (index - 1.0))


def back_power_in_direction(back: ToricBack, direction_rad):
    """The back surface's power in a direction, ``F(φ) = F_a cos²(φ − α) + F_b sin²(φ − α)``.

    Parameters
    ----------
    back : ToricBack
        Principal powers (D) and the direction α (degrees) of ``power_a_d``.
    direction_rad : float or ndarray
        φ, radians, standard axis notation.

    Returns
    -------
    float or ndarray
        Dioptres.

    References
    ----------
    Euler's theorem on normal curvatures (the oblique-meridian power of a
    sphero-cylinder), e.g. Long (1976), Am J Optom Physiol Opt 53:27.

    Examples
    --------
    >>> round(back_power_in_direction(ToricBack(-4.0, -6.0, 0.0), math.radians(45.0)), 6)
    -5.0
    """
    relative = np.asarray(direction_rad, dtype=float) - math.radians(back.meridian_a_deg)
    power = back.power_a_d * np.cos(relative) ** 2 + back.power_b_d * np.sin(relative) ** 2
    return float(power) if power.ndim == 0 else power


# --------------------------------------------------------------------------
# Thickness at many points: what depends on neither the front curve nor the centre thickness is worked out once
# --------------------------------------------------------------------------

_NOT_REACHING = "a surface of this lens does not reach the outline: its curve is steeper than the lens is wide"
_NOT_CONVERGING = "the centre thickness does not converge for this lens"
#: Added to ρ² where it divides, so that a point at the optical centre itself (ρ = 0) gets cos² = 0, not 0/0;
#: far below half an ulp of any other squared distance, so it changes nothing else.
_TINY_MM2 = 1e-300
#: c²ρ² may come this close to 1 before every point is checked one by one.
_REACH_MARGIN = 0.999999


class _Body(NamedTuple):
    """What a lens's thickness owes to its power, index and prism, apart from the front curve.

    The principal powers of the surfacing power (D) and the direction of the
    larger (degrees); ``cylinder_span`` is ``k (F_a − F_b)`` (1/mm) with
    ``k = −1 / (1000 (n − 1))``: the back's curvature from its cylinder at most.
    """

    index: float
    larger_d: float
    smaller_d: float
    direction_deg: float
    cylinder_span: float
    prism_delta: float
    prism_base_deg: float


def _body(surfacing: PowerMatrix, index: float, prism_delta: float, prism_base_deg: float) -> _Body:
    larger, smaller, direction = principal_powers(surfacing)
    return _Body(index, larger, smaller, direction, surface_curvature_per_mm(larger - smaller, index, "back"),
                 prism_delta, prism_base_deg)


class _Points(NamedTuple):
    """Points about a lens's optical centre, with what their thickness owes to the lens's power and prism alone.

    ``rho2`` is the squared distance from the optical centre (mm²); ``wedge``
    the prism's share of the thickness (mm; None without prism);
    ``back_cylinder`` the back's curvature from its cylinder,
    ``k (F_a − F_b) cos²(φ − α)`` (1/mm, 0.0 for a spherical back), so that the
    back's curvature in each direction is ``back_cylinder + k F_b(t)``: the
    front curve and the centre thickness move both principal back powers by
    the same amount, since F₂ = Fv − F₁/(1 − (t/n)F₁) in each meridian.
    """

    rho2: np.ndarray
    wedge: np.ndarray | None
    back_cylinder: np.ndarray | float


def _points(x_mm: np.ndarray, y_mm: np.ndarray, body: _Body) -> _Points:
    """The :class:`_Points` of points x, y (mm about the optical centre, front view)."""
    rho2 = x_mm * x_mm
    rho2 += y_mm * y_mm
    wedge = None
    if body.prism_delta:
        base = math.radians(body.prism_base_deg)
        per_mm = wedge_mm(body.prism_delta, 1.0, body.index)  # the wedge's thickness change per mm along the base
        wedge = x_mm * (per_mm * math.cos(base))
        wedge += y_mm * (per_mm * math.sin(base))
    back_cylinder: np.ndarray | float = 0.0
    if body.larger_d != body.smaller_d:
        # cos²(φ − α) = (p · a)² / |p|², a the unit vector of the larger power's meridian (Euler's theorem).
        # span ≤ 0, so k (F_a − F_b) cos² = (√−span (p · a))² / (−|p|²).
        alpha, scale = math.radians(body.direction_deg), math.sqrt(-body.cylinder_span)
        along = x_mm * (scale * math.cos(alpha))
        along += y_mm * (scale * math.sin(alpha))
        along *= along
        along /= -_TINY_MM2 - rho2
        back_cylinder = along
    return _Points(rho2, wedge, back_cylinder)


class _Profile(NamedTuple):
    """What the thickness at a set of points owes to the lens apart from its centre thickness.

    ``rho2`` and ``back_cylinder`` as in :class:`_Points`; ``fixed`` the part
    of the thickness that does not depend on the centre thickness, minus the
    front sag plus the prism wedge (mm). ``cylinder_span`` (the most
    ``back_cylinder`` can be) and ``rho2_max`` (at least the largest ρ²)
    bound c²ρ² without looking at every point.
    """

    rho2: np.ndarray
    fixed: np.ndarray
    back_cylinder: np.ndarray | float
    front_d: float
    back_vertex_b_d: float
    index: float
    cylinder_span: float
    rho2_max: float


def _profile(points: _Points, body: _Body, front_d: float, strict: bool, rho2_max: float) -> _Profile:
    """The :class:`_Profile` of the points for a front curve.

    ``strict``: raise :class:`LensNotMakeable` when the front does not reach a
    point; otherwise the thickness there is NaN. ``rho2_max`` bounds every ρ².
    """
    rho2 = points.rho2
    front_curvature = surface_curvature_per_mm(front_d, body.index, "front")
    if front_curvature:
        square = front_curvature * front_curvature
        # rho2_max bounds every ρ²: only near the limit look at every point.
        reached = strict and square * rho2_max <= _REACH_MARGIN
        if strict and not reached and float(np.max(square * rho2)) > 1.0:
            raise LensNotMakeable(_NOT_REACHING)
        # The sag is odd in the curvature: this is minus the front sag.
        fixed = sag_from_squared_mm(-front_curvature, rho2, reached)
    else:
        fixed = np.zeros_like(rho2)
    if points.wedge is not None:
        fixed += points.wedge
    return _Profile(rho2, fixed, points.back_cylinder, front_d, body.smaller_d, body.index, body.cylinder_span,
                    rho2_max)


def _relief_of(profile: _Profile, center_thickness_mm: float, strict: bool) -> np.ndarray:
    """The thickness (mm) at the profile's points less the centre thickness, for a centre thickness.

    (The centre thickness itself is added where it is needed, to a number
    rather than to every point.) Where the back does not reach a point:
    :class:`LensNotMakeable` when ``strict``, NaN otherwise.
    """
    # k F_b(t): the back's curvature in the meridian of its smaller power, at this centre thickness.
    back_b = back_surface_power(profile.front_d, profile.back_vertex_b_d, center_thickness_mm, profile.index)
    shift = surface_curvature_per_mm(back_b, profile.index, "back")
    # c lies between k F_b and k F_b + span, ρ² is at most rho2_max: only near the limit look at every point.
    reached = strict and max(shift * shift, (shift + profile.cylinder_span) ** 2) * profile.rho2_max <= _REACH_MARGIN
    # The back sag; NaN where it does not reach.
    thickness = sag_from_squared_mm(profile.back_cylinder + shift, profile.rho2, reached)
    if strict and not reached and thickness.size and bool(np.isnan(thickness).any()):
        raise LensNotMakeable(_NOT_REACHING)
    thickness += profile.fixed
    return thickness


def thickness_mm(points_mm, shape: LensShape, center_thickness_mm: float) -> np.ndarray:
    """The lens thickness (mm) at points about the optical centre.

    Parameters
    ----------
    points_mm : array, shape (N, 2)
        x, y in mm about the optical centre, front view (x to the observer's
        right, y up).
    shape : LensShape
        Front curve, surfacing power, index and prism.
    center_thickness_mm : float
        Thickness at the optical centre, mm.

    Returns
    -------
    ndarray, shape (N,)
        ``t_c − s_front + s_back + wedge``; NaN where a surface does not reach.

    Notes
    -----
    Both sags are exact for the circle of the surface's curvature in the
    point's direction; the toric back's curvature in that direction follows
    Euler's theorem. The back surface is re-solved for the given centre
    thickness, so the lens keeps its back vertex power.

    References
    ----------
    Jalie, *The Principles of Ophthalmic Lenses* (thickness from sags, prism
    thickness); Euler's theorem for the toric back.

    Examples
    --------
    A −4.00 D sphere on a +4.00 D front, n 1.5, 2 mm centre, 25 mm out:

    >>> from lenslane.plugins.optics.power import power_matrix
    >>> shape = LensShape(4.0, power_matrix(-4.0), 1.5)
    >>> round(float(thickness_mm([[25.0, 0.0]], shape, 2.0)[0]), 3)
    4.708
    """
    points = np.asarray(points_mm, dtype=float).reshape(-1, 2)
    body = _body(shape.surfacing, shape.index, shape.prism_delta, shape.prism_base_deg)
    with np.errstate(invalid="ignore"):
        profile = _profile(_points(points[:, 0], points[:, 1], body), body, shape.front_d, False, math.inf)
        thickness = _relief_of(profile, center_thickness_mm, strict=False)
    thickness += center_thickness_mm
    return thickness


def centre_minimum_applies(surfacing: PowerMatrix) -> bool:
    """Whether the lab's minimum centre thickness applies: the lens has a minus or a plano meridian.

    A plus lens in both meridians is thinnest at its edge and is held at the
    minimum edge thickness only; a minus, plano or mixed lens is held at the
    minimum centre thickness as well (common practice).

    Examples
    --------
    >>> from lenslane.plugins.optics.power import power_matrix
    >>> centre_minimum_applies(power_matrix(2.0, -1.0, 90)), centre_minimum_applies(power_matrix(2.0, -3.0, 90))
    (False, True)
    """
    return _minus_or_plano(principal_powers(surfacing)[1])


#: A principal power this close to zero is plano (D): a meridian written 0.00 D, rebuilt from its sphere,
#: cylinder and an axis in floating point, comes out within about 1e-15 D of zero on either side.
PLANO_TOLERANCE_D = 1e-9


def _minus_or_plano(smaller_principal_d: float) -> bool:
    return smaller_principal_d <= PLANO_TOLERANCE_D


class CentreThickness(NamedTuple):
    """The solved centre thickness (mm) and which minimum binds: ``"centre"`` or ``"edge"``."""

    center_mm: float
    binding: str


#: The thinnest edge meets its minimum to within this (mm); far below what a lab can measure.
EDGE_TOLERANCE_MM = 1e-10
_NEWTON_STEP_MM = 1e-12
_MAX_ITERATIONS = 100


def _edge_root_mm(profile: _Profile, point: int, target_mm: float, center_mm: float) -> float:
    """The centre thickness at which one point's thickness is ``target_mm`` (Newton's method, plain floats).

    The point's thickness is ``T(t) = t + fixed + s(c(t), ρ²)`` with the back's
    curvature ``c(t) = cyl + k F_b(t)``; its slope is ``T′ = 1 + ds/dc · k dF_b/dt``
    (:func:`sag_slope_per_curvature`, :func:`back_surface_power_slope`), and
    ``k dF_b/dt ≥ 0``, so T rises with t and the root is unique.
    """
    rho2 = float(profile.rho2[point])
    fixed = float(profile.fixed[point])
    cylinder = profile.back_cylinder if isinstance(profile.back_cylinder, float) else float(profile.back_cylinder[point])
    front, index = profile.front_d, profile.index
    t = center_mm
    for _ in range(_MAX_ITERATIONS):
        back_b = back_surface_power(front, profile.back_vertex_b_d, t, index)
        curvature = cylinder + surface_curvature_per_mm(back_b, index, "back")
        if not curvature * curvature * rho2 < 1.0:
            raise LensNotMakeable(_NOT_REACHING)
        thickness = t + fixed + float(sag_from_squared_mm(curvature, rho2))
        curvature_slope = surface_curvature_per_mm(back_surface_power_slope(front, t, index), index, "back")
        slope = 1.0 + sag_slope_per_curvature(curvature, rho2) * curvature_slope
        step = (target_mm - thickness) / slope
        t += step
        if abs(step) < _NEWTON_STEP_MM:
            return t
    raise LensNotMakeable(_NOT_CONVERGING)


class _Solved(NamedTuple):
    center_mm: float
    binding: str
    relief_mm: np.ndarray  # thickness less the centre thickness at every point, for the solved centre thickness
    thinnest_mm: float     # the thinnest edge


def _solve(profile: _Profile, edge_count: int, min_center_mm: float, min_edge_mm: float) -> _Solved:
    """The least centre thickness meeting the minimums; the profile's first ``edge_count`` points are the edge."""
    # The minimum centre applies to a lens with a minus or plano meridian (centre_minimum_applies).
    centre_minimum = _minus_or_plano(profile.back_vertex_b_d)
    center = min_center_mm if centre_minimum else min_edge_mm
    relief = _relief_of(profile, center, strict=True)
    edge = relief[:edge_count]
    point = int(edge.argmin())
    thinnest = float(edge[point]) + center
    # Every point thickens with the centre, so edges at or above their minimum here mean the centre binds.
    if centre_minimum and thinnest >= min_edge_mm:
        return _Solved(center, "centre", relief, thinnest)
    for _ in range(_MAX_ITERATIONS):
        if abs(thinnest - min_edge_mm) <= EDGE_TOLERANCE_MM:
            return _Solved(center, "edge", relief, thinnest)
        center = _edge_root_mm(profile, point, min_edge_mm, center)
        relief = _relief_of(profile, center, strict=True)
        edge = relief[:edge_count]
        point = int(edge.argmin())
        thinnest = float(edge[point]) + center
    raise LensNotMakeable(_NOT_CONVERGING)


def solve_center_thickness(edge_points_mm, shape: LensShape, min_center_mm: float,
                           min_edge_mm: float) -> CentreThickness:
    """The least centre thickness that meets the lab's minimums.

    Parameters
    ----------
    edge_points_mm : array, shape (N, 2)
        The outline about the optical centre, mm.
    shape : LensShape
        Front curve, surfacing power, index and prism.
    min_center_mm : float
        The minimum centre thickness, for lenses with a minus or plano meridian
        (:func:`centre_minimum_applies`).
    min_edge_mm : float
        The minimum edge thickness along the whole outline.

    Returns
    -------
    CentreThickness
        The centre thickness at which the binding minimum is met exactly and
        the other holds.

    Raises
    ------
    LensNotMakeable
        A surface does not reach the outline, or no thickness converges.

    Notes
    -----
    Every point of the lens thickens with the centre, a little faster than
    the centre does (the back steepens as the centre thickens, to keep the
    back vertex power), so the thinnest edge rises strictly with the centre
    thickness and the answer is unique. When the minimum centre applies and
    the edges already meet their minimum there, the centre binds. Otherwise
    the thinnest edge point's own equation ``T(t) = minimum`` is solved by
    Newton's method in plain floats, the whole outline is checked at that
    thickness, and a point that is then thinner takes over (each takeover
    raises the thickness, so this ends); the thinnest edge meets its minimum
    to within :data:`EDGE_TOLERANCE_MM`.

    References
    ----------
    Jalie, *The Principles of Ophthalmic Lenses*: minimum substance of minus
    and plus lenses; Newton's method as in any numerical-analysis text.

    Examples
    --------
    >>> from lenslane.plugins.optics.power import power_matrix
    >>> ring = [[25.0 * math.cos(a), 25.0 * math.sin(a)] for a in np.linspace(0, 2 * math.pi, 72, endpoint=False)]
    >>> shape = LensShape(8.0, power_matrix(3.0), 1.5)
    >>> solved = solve_center_thickness(ring, shape, 2.0, 1.0)
    >>> solved.binding, round(float(thickness_mm(ring, shape, solved.center_mm).min()), 9)
    ('edge', 1.0)
    """
    points = np.asarray(edge_points_mm, dtype=float).reshape(-1, 2)
    body = _body(shape.surfacing, shape.index, shape.prism_delta, shape.prism_base_deg)
    edge = _points(points[:, 0], points[:, 1], body)
    rho2_max = float(edge.rho2[edge.rho2.argmax()]) if edge.rho2.size else 0.0
    solved = _solve(_profile(edge, body, shape.front_d, True, rho2_max), len(points), min_center_mm, min_edge_mm)
    return CentreThickness(solved.center_mm, solved.binding)


# --------------------------------------------------------------------------
# The outline's points and the nodes of the volume's quadrature (the thickness integrated over the outline)
# --------------------------------------------------------------------------

#: Radial Gauss–Legendre nodes per angle of the volume quadrature.
RADIAL_NODES = 6
_NODES, _WEIGHTS = np.polynomial.legendre.leggauss(RADIAL_NODES)
_RADIAL_NODES = 0.5 * (_NODES + 1.0)
_RADIAL_WEIGHTS = 0.5 * _WEIGHTS
#: ∫₀¹ f(s R) s ds ≈ Σ f(s_k R) s_k w_k: the weights of the area element r dr on [0, 1].
_AREA_NODE_WEIGHTS = _RADIAL_NODES * _RADIAL_WEIGHTS
#: The sag part of the volume is integrated over about this many of the outline's angles (every k-th radius).
VOLUME_ANGLES = 120


def _volume_stride(count: int) -> int:
    stride = max(1, count // VOLUME_ANGLES)
    while count % stride:
        stride -= 1
    return stride


class _Layout(NamedTuple):
    """Where the points of an outline of ``count`` radii sit (the right lens's view).

    ``cosines`` / ``sines``: cos θ and sin θ of the ``count`` radii (the
    quadrature's nodes lie ``RADIAL_NODES`` on every ``stride``-th of them);
    ``row``: the node weights of one sampled radius, including its share
    ``stride × 2π / count`` of the angle.
    """

    cosines: np.ndarray
    sines: np.ndarray
    stride: int
    row: np.ndarray


def _layout(count: int, directions: tuple[np.ndarray, np.ndarray] | None = None) -> _Layout:
    cosines, sines = unit_circle(count) if directions is None else directions
    stride = _volume_stride(count)
    row = (stride * 2.0 * math.pi / count) * _AREA_NODE_WEIGHTS
    return _Layout(cosines, sines, stride, row)


class OutlineGrid(NamedTuple):
    """An outline's points and volume weights, prepared once and shared by the lenses cut to it.

    ``x`` / ``y``: mm about the box centre, the right lens's view, of the
    outline points, then of the volume's quadrature nodes; ``weights``: each
    node's share of ∬ · dA; ``area``: the sector area ½ Σ r² Δθ over every
    radius; ``radii``: the outline. Read-only arrays.
    """

    radii: np.ndarray
    layout: _Layout
    x: np.ndarray
    y: np.ndarray
    weights: np.ndarray
    area: float


def outline_grid(radii_mm: Sequence[float], directions: tuple[np.ndarray, np.ndarray] | None = None) -> OutlineGrid:
    """The points and volume weights of an outline, for :func:`place_lens` (a frame's may be kept and reused).

    Parameters
    ----------
    radii_mm : sequence of float
        The outline of the right lens seen from the front, radii about the box
        centre at equal angle steps from 0° (the contract's form), mm.
    directions : (ndarray, ndarray) or None
        The radii's directions, ``unit_circle(len(radii_mm))``, when the
        caller has them already (a modelled outline's).

    Returns
    -------
    OutlineGrid
        The outline points and the nodes of :func:`lens_volume_mm3`'s
        quadrature (6 Gauss–Legendre nodes on every k-th radius, about 120
        radii), with their area weights.

    References
    ----------
    Gauss–Legendre quadrature and the trapezoidal rule, as in any
    numerical-analysis text; the sector area ½ Σ r² Δθ.

    Examples
    --------
    >>> grid = outline_grid([25.0] * 72)
    >>> round(grid.area / (math.pi * 25.0 ** 2), 12), round(float(grid.weights.sum()) / grid.area, 12)
    (1.0, 1.0)
    """
    radii = np.array(radii_mm, dtype=float)
    layout = _layout(radii.size, directions)
    stride = layout.stride
    sampled = radii[::stride, None]
    nodes = sampled * _RADIAL_NODES  # each sampled radius's nodes, distances from the box centre
    # Each point is its distance times its direction: the outline's points, then the nodes row by row.
    x = np.concatenate((radii * layout.cosines, (nodes * layout.cosines[::stride, None]).ravel()))
    y = np.concatenate((radii * layout.sines, (nodes * layout.sines[::stride, None]).ravel()))
    weights = (sampled * sampled * layout.row).ravel()
    area = math.pi / radii.size * float(np.dot(radii, radii))
    grid = OutlineGrid(radii, layout, x, y, weights, area)
    for array in (grid.radii, grid.x, grid.y, grid.weights):
        array.flags.writeable = False
    return grid


def _about_centre(x: np.ndarray, y: np.ndarray, eye: str,
                  centre_mm: tuple[float, float]) -> tuple[np.ndarray, np.ndarray]:
    """Points of the right lens's grid about one lens's optical centre (the left lens is the mirror image)."""
    if eye == "right":
        x = x - centre_mm[0]
    elif eye == "left":
        x = np.subtract(-centre_mm[0], x)  # −x − c, in one step
    else:
        raise ValueError(f"eye must be 'right' or 'left', not {eye!r}")
    return x, y - centre_mm[1]


def _volume_from(relief_nodes: np.ndarray, grid: OutlineGrid, eye: str, centre_mm: tuple[float, float], body: _Body,
                 center_thickness_mm: float, wedge_nodes: np.ndarray | None) -> float:
    """``∬ t dA`` from the relief (thickness less the centre thickness) at the nodes.

    The centre thickness is a constant and the prism wedge a linear function:
    both are integrated over every sector exactly (area ½ Σ r² Δθ, first
    moments ⅓ Σ r³ (cos θ, sin θ) Δθ), in place of their share of the sampled
    quadrature (``wedge_nodes``, the wedge at the nodes; which is exact for
    them already when every radius is used).
    """
    volume = float(np.dot(relief_nodes, grid.weights)) + center_thickness_mm * grid.area
    if wedge_nodes is not None and grid.layout.stride > 1:
        radii = grid.radii
        count = radii.size
        cosines, sines = grid.layout.cosines, grid.layout.sines  # the outline's directions
        cubes = radii * radii * radii
        third = 2.0 * math.pi / count / 3.0
        mirror = -1.0 if eye == "left" else 1.0
        moment_x = mirror * third * float(np.dot(cosines, cubes)) - centre_mm[0] * grid.area
        moment_y = third * float(np.dot(sines, cubes)) - centre_mm[1] * grid.area
        base = math.radians(body.prism_base_deg)
        per_mm = wedge_mm(body.prism_delta, 1.0, body.index)
        along_x, along_y = per_mm * math.cos(base), per_mm * math.sin(base)
        volume += along_x * moment_x + along_y * moment_y - float(np.dot(wedge_nodes, grid.weights))
    return volume


# --------------------------------------------------------------------------
# One lens on its outline: placed once, then tried on front curves
# --------------------------------------------------------------------------


class LensPlacement(NamedTuple):
    """A lens placed on its outline before its front curve is chosen: what every trial of a front shares.

    ``points``: the outline's points, then the volume's nodes, about the
    optical centre, with their prism wedge and the back's cylinder
    (:class:`_Points`); ``reach_rho2``: at least the largest ρ² of them all
    (the box centre's or the farthest edge point's); ``farthest_mm``: the
    distance of the farthest outline point from the optical centre.
    """

    grid: OutlineGrid
    eye: str
    centre_mm: tuple[float, float]
    body: _Body
    points: _Points
    reach_rho2: float
    farthest_mm: float

    @property
    def larger_d(self) -> float:
        """The surfacing power's larger principal power (D), the meridian of the back's flattest curve."""
        return self.body.larger_d


def place_lens(grid: OutlineGrid, eye: str, centre_mm: tuple[float, float], surfacing: PowerMatrix, index: float,
               prism_delta: float = 0.0, prism_base_deg: float = 0.0) -> LensPlacement:
    """One lens placed on its outline, for :func:`edged_lens` on any front curve.

    Parameters
    ----------
    grid : OutlineGrid
        The right lens's outline (:func:`outline_grid`).
    eye : {"right", "left"}
        The left lens is the mirror image of the right.
    centre_mm : (float, float)
        The optical centre about the box centre, mm.
    surfacing : PowerMatrix
        The back vertex power to produce, D.
    index : float
        Refractive index.
    prism_delta, prism_base_deg : float
        The prescribed prism (Δ) and its base (degrees, ISO 8429).

    Returns
    -------
    LensPlacement
        The outline's points and the volume's nodes about the optical centre,
        with what their thickness owes to neither the front curve nor the
        centre thickness (distances, prism wedge, the back's cylinder by
        Euler's theorem), worked out once for every front curve tried.

    References
    ----------
    Jalie, *The Principles of Ophthalmic Lenses* (prism thickness); Euler's
    theorem for the toric back.

    Examples
    --------
    >>> from lenslane.plugins.optics.power import power_matrix
    >>> placed = place_lens(outline_grid([25.0] * 72), "right", (3.0, 0.0), power_matrix(-2.0), 1.5)
    >>> round(placed.farthest_mm, 9)
    28.0
    """
    body = _body(surfacing, index, prism_delta, prism_base_deg)
    points = _points(*_about_centre(grid.x, grid.y, eye, centre_mm), body)
    edge = points.rho2[:grid.radii.size]
    edge_rho2_max = float(edge[edge.argmax()])
    # The nodes lie on the segments from the box centre to the edge points; ρ² is convex along a segment, so
    # none is farther than the edge or the box centre.
    cx, cy = centre_mm
    return LensPlacement(grid, eye, centre_mm, body, points, max(edge_rho2_max, cx * cx + cy * cy),
                         math.sqrt(edge_rho2_max))


class EdgedLens(NamedTuple):
    """An edged lens on one front curve: the centre thickness and its binding minimum, the edges, the volume.

    ``center_mm`` and ``binding`` as in :class:`CentreThickness`;
    ``edge_min_mm`` / ``edge_max_mm`` the thinnest and thickest point of the
    outline (mm); ``volume_mm3`` as :func:`lens_volume_mm3`.
    """

    center_mm: float
    binding: str
    edge_min_mm: float
    edge_max_mm: float
    volume_mm3: float


def edged_lens(placement: LensPlacement, front_d: float, min_center_mm: float, min_edge_mm: float) -> EdgedLens:
    """Centre thickness, thinnest and thickest edge and volume of a placed lens on a front curve.

    Parameters
    ----------
    placement : LensPlacement
        The lens on its outline (:func:`place_lens`).
    front_d : float
        True front power (D) at the lens index.
    min_center_mm, min_edge_mm : float
        The lab's minimums, as in :func:`solve_center_thickness`.

    Returns
    -------
    EdgedLens
        The same centre thickness and binding as :func:`solve_center_thickness`
        on the outline about the optical centre, the least and greatest of
        :func:`thickness_mm` there, and the volume as :func:`lens_volume_mm3`.

    Raises
    ------
    LensNotMakeable
        As :func:`solve_center_thickness`, or a surface does not reach the
        volume's quadrature nodes.

    Notes
    -----
    The outline's points and the volume's nodes share one set of arrays,
    placed once per lens; per front curve only the front sag is added, and
    each trial thickness costs a handful of array operations.

    References
    ----------
    Jalie, *The Principles of Ophthalmic Lenses* (thickness from sags, minimum
    substance, weight = volume × density); Euler's theorem for the toric back.

    Examples
    --------
    >>> from lenslane.plugins.optics.power import power_matrix
    >>> grid = outline_grid([25.0] * 72)
    >>> right = edged_lens(place_lens(grid, "right", (2.0, 0.0), power_matrix(3.0), 1.5), 8.0, 2.0, 1.0)
    >>> left = edged_lens(place_lens(grid, "left", (-2.0, 0.0), power_matrix(3.0), 1.5), 8.0, 2.0, 1.0)
    >>> right.binding, round(right.edge_min_mm, 9), round(right.center_mm - left.center_mm, 9)
    ('edge', 1.0, 0.0)
    """
    count = placement.grid.radii.size
    points = placement.points
    profile = _profile(points, placement.body, front_d, True, placement.reach_rho2)
    solved = _solve(profile, count, min_center_mm, min_edge_mm)
    center, relief = solved.center_mm, solved.relief_mm
    edges = relief[:count]
    volume = _volume_from(relief[count:], placement.grid, placement.eye, placement.centre_mm, placement.body,
                          center, None if points.wedge is None else points.wedge[count:])
    return EdgedLens(center, solved.binding, solved.thinnest_mm, float(edges[edges.argmax()]) + center, volume)


def lens_volume_mm3(radii_mm: Sequence[float], eye: str, centre_mm: tuple[float, float],
                    shape: LensShape, center_thickness_mm: float) -> float:
    """The volume (mm³) of the edged lens: its thickness integrated over the outline.

    Parameters
    ----------
    radii_mm : sequence of float
        The outline of the right lens seen from the front, as radii about the
        box centre at equal angle steps from 0° (the contract's form).
    eye : {"right", "left"}
        The left lens is the mirror image of the right.
    centre_mm : (float, float)
        The optical centre about the box centre, mm.
    shape : LensShape
    center_thickness_mm : float

    Returns
    -------
    float
        ``∬ t dA`` in mm³, in polar coordinates about the box centre:
        6-point Gauss–Legendre along the radii and the trapezoidal rule over
        the angles, on every k-th radius so that about 120 remain (all of them
        up to 239 radii); the centre thickness and the prism wedge, a constant
        and a linear function, are integrated over all the given sectors
        exactly (area ½ Σ r² Δθ, first moments ⅓ Σ r³ (cos θ, sin θ) Δθ).

    Raises
    ------
    LensNotMakeable
        A surface does not reach part of the outline.

    Notes
    -----
    Between two given radii the outline is taken as the arc of the sector each
    radius stands for (area ½ Σ r² Δθ), which differs from the polygon through
    the points by under 0.2 % with 72 radii. Against 16 radial nodes on every
    one of 360 radii, the sampled rule moves the weight by under 0.05 % for
    powers to ±15 D (a milligram or less for usual lenses): sags vary
    smoothly, and the sampled angles only miss the outline's fine detail in
    the sag part; along a radius, 6 nodes leave a relative error of about
    1e-10 for spectacle powers.

    References
    ----------
    Jalie, *The Principles of Ophthalmic Lenses* (weight = volume × density);
    Gauss–Legendre quadrature and the trapezoidal rule as in any
    numerical-analysis text.

    Examples
    --------
    A plano parallel plate 2 mm thick, 25 mm in radius:

    >>> from lenslane.plugins.optics.power import power_matrix
    >>> volume = lens_volume_mm3([25.0] * 72, "right", (0.0, 0.0), LensShape(0.0, power_matrix(0.0), 1.5), 2.0)
    >>> round(volume / (math.pi * 25.0 ** 2 * 2.0), 9)
    1.0
    """
    grid = outline_grid(radii_mm)
    count = grid.radii.size
    body = _body(shape.surfacing, shape.index, shape.prism_delta, shape.prism_base_deg)
    nodes = _points(*_about_centre(grid.x[count:], grid.y[count:], eye, centre_mm), body)
    relief = _relief_of(_profile(nodes, body, shape.front_d, True, float(nodes.rho2.max())), center_thickness_mm,
                        strict=True)
    return _volume_from(relief, grid, eye, centre_mm, body, center_thickness_mm, nodes.wedge)


def lens_weight_g(volume_mm3: float, density_g_cm3: float) -> float:
    """Weight in grams of a lens of the given volume (mm³) and density (g/cm³).

    Examples
    --------
    >>> round(lens_weight_g(10000.0, 1.32), 9)
    13.2
    """
    return volume_mm3 / 1000.0 * density_g_cm3
