"""Real rays through lens surfaces: intersection with a sphere and a torus, their normals and curvature, Snell's law.

One ray per call, in plain floats: a point or direction is a tuple ``(x, y, z)``
(mm for points). The engine traces a handful of rays per lens, one after
another, where Python's own arithmetic is many times faster than numpy's
per-call cost.

Each surface is given in its own frame: its vertex at the origin, its axis
along +z (toward the eye), and the same sign convention as
:mod:`lenslane.plugins.optics.surfaces`: a curvature is positive when the
centre of curvature lies on the +z side, so a convex front and a concave back
both have positive curvature, and the sag ``z`` is positive where the surface
falls back toward +z.

References
----------
.. [1] Spencer, G. H. & Murty, M. V. R. K. (1962). "General ray-tracing
   procedure." Journal of the Optical Society of America 52(6): 672–678.
.. [2] Welford, W. T. (1986). *Aberrations of Optical Systems*. Adam Hilger,
   chapter 4 (ray tracing through spherical and toric surfaces).
.. [3] Goldman, R. (2005). "Curvature formulas for implicit curves and
   surfaces." Computer Aided Geometric Design 22(7): 632–658.
"""
from __future__ import annotations

import math

Vector = tuple[float, float, float]

#: Newton's iteration on a torus stops when its step along the ray is below this (mm).
TORUS_STEP_MM = 1e-13
_TORUS_MAX_STEPS = 50


class RayMissedSurface(ValueError):
    """A ray does not meet a surface (it passes outside a sphere, or a torus's iteration does not converge)."""


def dot(a: Vector, b: Vector) -> float:
    """The scalar product of two vectors."""
    return a[0] * b[0] + a[1] * b[1] + a[2] * b[2]


def point_at(point: Vector, distance: float, direction: Vector) -> Vector:
    """The point ``point + distance · direction``."""
    return (point[0] + distance * direction[0], point[1] + distance * direction[1],
            point[2] + distance * direction[2])


def reverse(vector: Vector) -> Vector:
    """The opposite vector."""
    return (-vector[0], -vector[1], -vector[2])


def unit(vector: Vector) -> Vector:
    """The vector divided by its length."""
    length = math.sqrt(dot(vector, vector))
    return (vector[0] / length, vector[1] / length, vector[2] / length)


def intersect_sphere(point: Vector, direction: Vector, curvature: float) -> float:
    """Distance along a ray to a sphere (or plane) through the origin, vertex normal +z.

    Parameters
    ----------
    point : Vector
        A point of the ray, mm, in the surface's frame.
    direction : Vector
        Its unit direction (either sense along z).
    curvature : float
        1/r in 1/mm, positive with the centre of curvature at +z; 0 for a plane.

    Returns
    -------
    float
        The signed distance s, so that ``point + s · direction`` lies on the
        surface: the intersection on the sheet through the vertex.

    Raises
    ------
    RayMissedSurface
        The ray passes outside the sphere.

    Notes
    -----
    The sphere ``c(x² + y² + z²) − 2z = 0`` meets the ray where
    ``c s² − 2Bs + C = 0`` with ``B = d_z − c p·d`` and ``C = c|p|² − 2 p_z``;
    the root near the vertex is written ``s = C / (B + sign(B) √(B² − cC))``,
    which stays exact for a plane (c = 0) and loses no digits for flat curves.

    References
    ----------
    Spencer & Murty (1962), JOSA 52:672, the transfer to a spherical surface;
    Welford (1986), section 4.2.

    Examples
    --------
    >>> intersect_sphere((0.0, 0.0, -5.0), (0.0, 0.0, 1.0), 0.01)
    5.0
    """
    b = direction[2] - curvature * dot(point, direction)
    constant = curvature * dot(point, point) - 2.0 * point[2]
    discriminant = b * b - curvature * constant
    if discriminant < 0.0:
        raise RayMissedSurface("a ray passes outside a spherical surface")
    return constant / (b + math.copysign(math.sqrt(discriminant), b))


def sphere_normal(point: Vector, curvature: float) -> Vector:
    """Unit normal of the sphere at a point on it, pointing to +z at the vertex.

    ``(−c x, −c y, 1 − c z)``, which has unit length on the sphere.

    References
    ----------
    Spencer & Murty (1962), JOSA 52:672 (direction cosines of the normal).
    """
    return (-curvature * point[0], -curvature * point[1], 1.0 - curvature * point[2])


class _Torus:
    """The torus of :func:`intersect_torus` at a point: its function G, the gradient, and the profile's terms."""

    __slots__ = ("value", "gradient", "u", "profile", "slope", "root")

    def __init__(self, point: Vector, c_profile: float, c_sweep: float, along: tuple[float, float]):
        ax, ay = along
        x, y, z = point
        u, w = x * ax + y * ay, y * ax - x * ay
        root = math.sqrt(1.0 - c_profile * c_profile * u * u)
        profile = c_profile * u * u / (1.0 + root)        # f(u), the circle of the profile
        slope = c_profile * u / root                      # f'(u)
        d_u = -slope * (1.0 - c_sweep * profile)
        d_w = -c_sweep * w
        self.value = z - profile - 0.5 * c_sweep * (w * w + z * z - profile * profile)
        self.gradient = (d_u * ax - d_w * ay, d_u * ay + d_w * ax, 1.0 - c_sweep * z)
        self.u, self.profile, self.slope, self.root = u, profile, slope, root


def intersect_torus(point: Vector, direction: Vector, c_profile: float, c_sweep: float,
                    along: tuple[float, float]) -> float:
    """Distance along a ray to a toric surface through the origin, vertex normal +z.

    The torus is a circular profile of curvature ``c_profile`` in the plane of
    the unit vector ``along`` (a direction in the xy-plane) and z, swept about
    an axis parallel to ``along`` at the distance ``1/c_sweep`` from the
    vertex: its principal curvatures at the vertex are ``c_profile`` along
    ``along`` and ``c_sweep`` across it. With u, w the coordinates along and
    across,

        G = z − f(u) − ½ c_sweep (w² + z² − f(u)²) = 0,   f(u) = c u² / (1 + √(1 − c² u²)).

    Parameters
    ----------
    point, direction : Vector
        A point and the unit direction of the ray, mm, in the surface's frame.
    c_profile, c_sweep : float
        Principal curvatures at the vertex, 1/mm, signed as for a sphere.
    along : (float, float)
        Unit vector of the profile's direction in the xy-plane.

    Returns
    -------
    float
        The signed distance to the surface's sheet through the vertex.

    Raises
    ------
    RayMissedSurface
        Newton's iteration does not converge (the ray misses the surface).

    Notes
    -----
    Newton's method along the ray, ``s ← s − G / (∇G · d)``, started at the
    sphere of curvature ``c_profile`` (the exact answer when
    ``c_sweep = c_profile``), until the step is below :data:`TORUS_STEP_MM`.
    A sphere is the torus with equal curvatures; a cylinder has ``c_sweep = 0``.

    References
    ----------
    Spencer & Murty (1962), JOSA 52:672: intersection with a general surface by
    Newton's iteration; Welford (1986), section 4.5 (toric surfaces).

    Examples
    --------
    >>> intersect_torus((0.0, 0.0, -5.0), (0.0, 0.0, 1.0), 0.01, 0.02, (1.0, 0.0))
    5.0
    """
    s = intersect_sphere(point, direction, c_profile)
    for _ in range(_TORUS_MAX_STEPS):
        try:
            torus = _Torus(point_at(point, s, direction), c_profile, c_sweep, along)
        except ValueError:  # beyond the profile circle
            break
        step = torus.value / dot(torus.gradient, direction)
        s -= step
        if abs(step) < TORUS_STEP_MM:
            return s
    raise RayMissedSurface("a ray does not meet a toric surface (Newton's iteration did not converge)")


def torus_normal(point: Vector, c_profile: float, c_sweep: float, along: tuple[float, float]) -> Vector:
    """Unit normal ``∇G / |∇G|`` of the torus of :func:`intersect_torus` at a point on it, +z at the vertex.

    References
    ----------
    Spencer & Murty (1962), JOSA 52:672 (the normal as the gradient of the
    surface function).
    """
    return unit(_Torus(point, c_profile, c_sweep, along).gradient)


def torus_curvature(point: Vector, tangent: tuple[Vector, Vector], c_profile: float, c_sweep: float,
                    along: tuple[float, float]) -> tuple[tuple[float, float], tuple[float, float]]:
    """The curvature matrix of the torus of :func:`intersect_torus` at a point on it, in a given tangent basis.

    Parameters
    ----------
    point : Vector
        A point on the surface, mm.
    tangent : (Vector, Vector)
        Two orthonormal vectors in the tangent plane there.
    c_profile, c_sweep, along
        The torus, as for :func:`intersect_torus`.

    Returns
    -------
    ((float, float), (float, float))
        The second fundamental form in the tangent basis, 1/mm, signed like a
        curvature (positive where the surface bends toward its normal
        :func:`torus_normal`): ``−Tᵀ (∇²G) T / |∇G|``. At the vertex it is
        ``c_profile`` along ``along`` and ``c_sweep`` across it.

    Notes
    -----
    In the coordinates u (along), w (across) and z the Hessian of G is
    diagonal: ``G_uu = −f″ (1 − c_sweep f) + c_sweep f′²`` and
    ``G_ww = G_zz = −c_sweep``, with ``f′ = c u / √(1 − c² u²)`` and
    ``f″ = c / (1 − c² u²)^{3/2}`` the profile circle's derivatives.

    References
    ----------
    Goldman (2005), Computer Aided Geometric Design 22:632 (the second
    fundamental form of an implicit surface, ``−Hess G / |∇G|`` on the
    tangent plane).

    Examples
    --------
    >>> torus_curvature((0.0, 0.0, 0.0), ((1.0, 0.0, 0.0), (0.0, 1.0, 0.0)), 0.01, 0.02, (0.0, 1.0))
    ((0.02, 0.0), (0.0, 0.01))
    """
    torus = _Torus(point, c_profile, c_sweep, along)
    g_uu = -c_profile / torus.root ** 3 * (1.0 - c_sweep * torus.profile) + c_sweep * torus.slope * torus.slope
    length = math.sqrt(dot(torus.gradient, torus.gradient))
    ax, ay = along
    # Each tangent vector's components along u, w and z.
    (u1, w1, z1), (u2, w2, z2) = ((t[0] * ax + t[1] * ay, t[1] * ax - t[0] * ay, t[2]) for t in tangent)

    def form(ua, wa, za, ub, wb, zb):
        return -(g_uu * ua * ub - c_sweep * (wa * wb + za * zb)) / length + 0.0

    off = form(u1, w1, z1, u2, w2, z2)
    return (form(u1, w1, z1, u1, w1, z1), off), (off, form(u2, w2, z2, u2, w2, z2))


def refract(direction: Vector, normal: Vector, index_before: float, index_after: float) -> Vector:
    """Vector Snell's law: the unit direction after refraction.

    Parameters
    ----------
    direction : Vector
        Unit direction before the surface.
    normal : Vector
        Unit surface normal at the point of incidence (either sense).
    index_before, index_after : float
        Refractive indices on the two sides.

    Returns
    -------
    Vector
        ``d′ = μ d + Γ N`` with ``μ = n/n′``, N turned to point along the ray
        (``cos I = d · N > 0``) and ``Γ = √(1 − μ² (1 − cos² I)) − μ cos I``.

    Raises
    ------
    RayMissedSurface
        Total internal reflection.

    References
    ----------
    Spencer & Murty (1962), JOSA 52:672, the refraction equations; Welford
    (1986), section 4.3.

    Examples
    --------
    Snell's law at 30° from air into n 1.5 (sin I′ = 1/3):

    >>> round(refract((0.5, 0.0, 0.75 ** 0.5), (0.0, 0.0, 1.0), 1.0, 1.5)[0], 12)
    0.333333333333
    """
    mu = index_before / index_after
    cosine = dot(direction, normal)
    if cosine < 0.0:
        normal, cosine = reverse(normal), -cosine
    under = 1.0 - mu * mu * (1.0 - cosine * cosine)
    if under < 0.0:
        raise RayMissedSurface("total internal reflection")
    gamma = math.sqrt(under) - mu * cosine
    return (mu * direction[0] + gamma * normal[0], mu * direction[1] + gamma * normal[1],
            mu * direction[2] + gamma * normal[2])
