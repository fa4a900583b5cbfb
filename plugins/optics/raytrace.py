"""Real rays through lens surfaces: intersection with a sphere and a torus, vector Snell's law.

Every function works on many rays at once: points and directions are arrays of
shape (N, 3), surface parameters scalars or arrays of shape (N,) (one value per
ray, so rays through different lenses travel in one call). Lengths in mm.

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
"""
from __future__ import annotations

import numpy as np

#: Newton's iteration on a torus stops when every ray's step along it is below this (mm).
TORUS_STEP_MM = 1e-13
_TORUS_MAX_STEPS = 50


class RayMissedSurface(ValueError):
    """A ray does not meet a surface (it passes outside a sphere, or a torus's iteration does not converge)."""


def _dot(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    return np.einsum("...i,...i->...", a, b)


def intersect_sphere(points: np.ndarray, directions: np.ndarray, curvature) -> np.ndarray:
    """Distance along each ray to a sphere (or plane) through the origin, vertex normal +z.

    Parameters
    ----------
    points : ndarray, shape (N, 3)
        A point of each ray, mm, in the surface's frame.
    directions : ndarray, shape (N, 3)
        Unit direction of each ray (either sense along z).
    curvature : float or ndarray, shape (N,)
        1/r in 1/mm, positive with the centre of curvature at +z; 0 for a plane.

    Returns
    -------
    ndarray, shape (N,)
        The signed distance s, so that ``points + s · directions`` lies on the
        surface: the intersection on the sheet through the vertex.

    Raises
    ------
    RayMissedSurface
        A ray passes outside the sphere.

    Notes
    -----
    The sphere ``c(x² + y² + z²) − 2z = 0`` meets the ray where
    ``c s² − 2Bs + C = 0`` with ``B = d_z − c p·d`` and ``C = c|p|² − 2 p_z``;
    the root near the vertex is written ``s = C / (B + sign(B) √(B² − cC))``,
    which stays exact for a plane (c = 0) and loses no digits for flat curves.

    References
    ----------
    Spencer & Murty (1962), JOSA 52:672, the transfer to a spherical surface;
    Welford (1986), *Aberrations of Optical Systems*, section 4.2.

    Examples
    --------
    >>> s = intersect_sphere(np.array([[0.0, 0.0, -5.0]]), np.array([[0.0, 0.0, 1.0]]), 0.01)
    >>> float(s[0])
    5.0
    """
    c = np.asarray(curvature, dtype=float)
    b = directions[..., 2] - c * _dot(points, directions)
    constant = c * _dot(points, points) - 2.0 * points[..., 2]
    discriminant = b * b - c * constant
    if np.any(discriminant < 0.0):
        raise RayMissedSurface("a ray passes outside a spherical surface")
    return constant / (b + np.copysign(np.sqrt(discriminant), b))


def sphere_normal(points: np.ndarray, curvature) -> np.ndarray:
    """Unit normal of the sphere at points on it, pointing to +z at the vertex.

    Parameters
    ----------
    points : ndarray, shape (N, 3)
        Points on the surface, mm.
    curvature : float or ndarray, shape (N,)
        1/r in 1/mm.

    Returns
    -------
    ndarray, shape (N, 3)
        ``(−c x, −c y, 1 − c z)``, which has unit length on the sphere.

    References
    ----------
    Spencer & Murty (1962), JOSA 52:672 (direction cosines of the normal).
    """
    c = np.asarray(curvature, dtype=float)[..., None]
    normal = -c * points
    normal[..., 2] += 1.0
    return normal


def _torus_terms(points: np.ndarray, along: np.ndarray, c_profile, c_sweep):
    """The torus's implicit function G and its gradient at points (see :func:`intersect_torus`)."""
    u = points[..., 0] * along[..., 0] + points[..., 1] * along[..., 1]
    w = points[..., 1] * along[..., 0] - points[..., 0] * along[..., 1]
    z = points[..., 2]
    root = np.sqrt(1.0 - c_profile * c_profile * u * u)
    profile = c_profile * u * u / (1.0 + root)        # f(u), the circle of the profile
    slope = c_profile * u / root                      # f'(u)
    value = z - profile - 0.5 * c_sweep * (w * w + z * z - profile * profile)
    d_u = -slope * (1.0 - c_sweep * profile)
    d_w = -c_sweep * w
    gradient = np.empty_like(points)
    gradient[..., 0] = d_u * along[..., 0] - d_w * along[..., 1]
    gradient[..., 1] = d_u * along[..., 1] + d_w * along[..., 0]
    gradient[..., 2] = 1.0 - c_sweep * z
    return value, gradient


def intersect_torus(points: np.ndarray, directions: np.ndarray, c_profile, c_sweep, along) -> np.ndarray:
    """Distance along each ray to a toric surface through the origin, vertex normal +z.

    The torus is a circular profile of curvature ``c_profile`` in the plane of
    the unit vector ``along`` (a direction in the xy-plane) and z, swept about an
    axis parallel to ``along`` at the distance ``1/c_sweep`` from the vertex: its
    principal curvatures at the vertex are ``c_profile`` along ``along`` and
    ``c_sweep`` across it. With u, w the coordinates along and across,

        G = z − f(u) − ½ c_sweep (w² + z² − f(u)²) = 0,   f(u) = c u² / (1 + √(1 − c² u²)).

    Parameters
    ----------
    points, directions : ndarray, shape (N, 3)
        A point and the unit direction of each ray, mm, in the surface's frame.
    c_profile, c_sweep : float or ndarray, shape (N,)
        Principal curvatures at the vertex, 1/mm, signed as for a sphere.
    along : ndarray, shape (2,) or (N, 2)
        Unit vector of the profile's direction in the xy-plane.

    Returns
    -------
    ndarray, shape (N,)
        The signed distance to the surface's sheet through the vertex.

    Raises
    ------
    RayMissedSurface
        Newton's iteration does not converge for a ray (it misses the surface).

    Notes
    -----
    Newton's method along the ray, ``s ← s − G / (∇G · d)``, started at the
    sphere of curvature ``c_profile`` (the exact answer when
    ``c_sweep = c_profile``), until every step is below :data:`TORUS_STEP_MM`.
    A sphere is the torus with equal curvatures; a cylinder has ``c_sweep = 0``.

    References
    ----------
    Spencer & Murty (1962), JOSA 52:672: intersection with a general surface by
    Newton's iteration; Welford (1986), section 4.5 (toric surfaces).

    Examples
    --------
    >>> s = intersect_torus(np.array([[0.0, 0.0, -5.0]]), np.array([[0.0, 0.0, 1.0]]), 0.01, 0.02,
    ...                     np.array([1.0, 0.0]))
    >>> float(s[0])
    5.0
    """
    along = np.asarray(along, dtype=float)
    c_profile = np.asarray(c_profile, dtype=float)
    c_sweep = np.asarray(c_sweep, dtype=float)
    with np.errstate(invalid="ignore"):
        s = intersect_sphere(points, directions, c_profile)
        for _ in range(_TORUS_MAX_STEPS):
            value, gradient = _torus_terms(points + s[..., None] * directions, along, c_profile, c_sweep)
            step = value / _dot(gradient, directions)
            s = s - step
            largest = np.max(np.abs(step)) if step.size else 0.0
            if largest < TORUS_STEP_MM:
                return s
    raise RayMissedSurface("a ray does not meet a toric surface (Newton's iteration did not converge)")


def torus_normal(points: np.ndarray, c_profile, c_sweep, along) -> np.ndarray:
    """Unit normal of the torus of :func:`intersect_torus` at points on it, +z at the vertex.

    Returns
    -------
    ndarray, shape (N, 3)
        ``∇G / |∇G|``.

    References
    ----------
    Spencer & Murty (1962), JOSA 52:672 (the normal as the gradient of the
    surface function).
    """
    _, gradient = _torus_terms(points, np.asarray(along, dtype=float), np.asarray(c_profile, dtype=float),
                               np.asarray(c_sweep, dtype=float))
    return gradient / np.sqrt(_dot(gradient, gradient))[..., None]


def refract(directions: np.ndarray, normals: np.ndarray, index_before, index_after) -> np.ndarray:
    """Vector Snell's law: the unit directions after refraction.

    Parameters
    ----------
    directions : ndarray, shape (N, 3)
        Unit directions before the surface.
    normals : ndarray, shape (N, 3)
        Unit surface normals at the points of incidence (either sense).
    index_before, index_after : float or ndarray, shape (N,)
        Refractive indices on the two sides.

    Returns
    -------
    ndarray, shape (N, 3)
        ``d′ = μ d + Γ N`` with ``μ = n/n′``, N turned to point along the ray
        (``cos I = d · N > 0``) and ``Γ = √(1 − μ² (1 − cos² I)) − μ cos I``.

    Raises
    ------
    RayMissedSurface
        Total internal reflection for a ray.

    References
    ----------
    Spencer & Murty (1962), JOSA 52:672, the refraction equations; Welford
    (1986), section 4.3.

    Examples
    --------
    Snell's law at 30° from air into n 1.5 (sin I′ = 1/3):

    >>> out = refract(np.array([[0.5, 0.0, 0.75 ** 0.5]]), np.array([[0.0, 0.0, 1.0]]), 1.0, 1.5)
    >>> round(float(out[0, 0]), 12)
    0.333333333333
    """
    mu = np.asarray(index_before, dtype=float) / np.asarray(index_after, dtype=float)
    cosine = _dot(directions, normals)
    normals = normals * np.sign(cosine)[..., None]
    cosine = np.abs(cosine)
    under = 1.0 - mu * mu * (1.0 - cosine * cosine)
    if np.any(under < 0.0):
        raise RayMissedSurface("total internal reflection")
    gamma = np.sqrt(under) - mu * cosine
    return mu[..., None] * directions + gamma[..., None] * normals
