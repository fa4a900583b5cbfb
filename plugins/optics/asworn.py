"""Exact as-worn power: real rays through the thick, tilted lens, and the lens that makes the eye's power exact.

The lens (spherical front, toric back, centre thickness, index) sits with its
back vertex B on the line of sight, turned by the obliquity θ about the axis in
its frontal plane perpendicular to the tangential direction t, with no roll
about its own axis — the same angles as the thin-lens tilt model
(:mod:`lenslane.plugins.optics.tilt`), so the two differ in optics only.
Coordinates: x toward the observer's right, y up, z along the primary line of
sight toward the eye, B at the origin. The eye's centre of rotation lies on
the line of sight, :data:`ROTATION_DISTANCE_MM` behind B.

A pencil from a distant object is measured about its chief ray: exactly
traced neighbouring rays (vector Snell's law) give, by central differences,
the vergence matrix ``V = −(∂u/∂q)(∂y/∂q)⁻¹`` of the emerging wavefront at a
reference point on the chief ray (u the direction tangents and y the positions
of the rays on the plane normal to the chief ray there, q their offsets before
the lens). On the line of sight the reference point is B; for an eye turned
about its centre of rotation, it is where the chief ray through the centre of
rotation meets the vertex sphere (about the centre of rotation, through B).

Everything is vectorised: arrays of lenses and pencils are traced in one call.

References
----------
.. [1] Spencer, G. H. & Murty, M. V. R. K. (1962). "General ray-tracing
   procedure." JOSA 52:672 — the ray trace (:mod:`lenslane.plugins.optics.raytrace`).
.. [2] Kneisly, J. A. (1964). "Local curvature of wavefronts in an optical
   system." JOSA 54:229 — the vergence of a pencil about its chief ray.
.. [3] Thibos, L. N., Wheeler, W. & Horner, D. (1997). "Power vectors: an
   application of Fourier analysis to the description and statistical analysis
   of refractive error." Optom Vis Sci 74:367 — M, J₀, J₄₅.
.. [4] Atchison, D. A. (1992). "Spectacle lens design: a review." Applied
   Optics 31:3579 — judging a lens form by its errors at 20°–35° of gaze.
"""
from __future__ import annotations

import math
from typing import Callable, NamedTuple, Sequence

import numpy as np

from lenslane.plugins.optics.power import PowerMatrix
from lenslane.plugins.optics.raytrace import (
    RayMissedSurface, intersect_sphere, intersect_torus, refract, sphere_normal, torus_normal,
)
from lenslane.plugins.optics.surfaces import back_surface_power, surface_curvature_per_mm
from lenslane.plugins.optics.tilt import compensate_tilt

#: From the back vertex to the eye's centre of rotation, mm (about 27 mm; from memory).
ROTATION_DISTANCE_MM = 27.0
#: Gaze angles (degrees) at which the off-axis errors are reported.
GAZE_ANGLES_DEG = (20.0, 30.0)
#: The four main gaze directions, as (x, y) for the right eye (x of "nasal" and "temporal" mirror for the left).
GAZE_DIRECTIONS = {"up": (0.0, 1.0), "down": (0.0, -1.0), "nasal": (1.0, 0.0), "temporal": (-1.0, 0.0)}
#: Offset between neighbouring rays, mm (the stencil reaches twice this).
PENCIL_STEP_MM = 0.01
#: The exact compensation stops when the as-worn power is this close to the wanted one (D, every element).
RESIDUAL_TOLERANCE_D = 1e-9
_MAX_NEWTON_STEPS = 12
_JACOBIAN_STEP_D = 1e-3
_THICKNESS_STEP_MM = 1e-3
#: Five-point central difference: offsets (in steps) and weights (divided by 12 × step).
_STENCIL = np.array([-2.0, -1.0, 1.0, 2.0])
_WEIGHTS = np.array([1.0, -8.0, 8.0, -1.0]) / 12.0
_BASIS = np.array([[1.0, 0.0, 0.0], [0.0, 1.0, 0.0]])


class WornLenses(NamedTuple):
    """Lenses as worn, as arrays of shape (L,) (``rotation`` (L, 3, 3): lens frame → eye frame).

    Curvatures in 1/mm, signed as in :mod:`lenslane.plugins.optics.surfaces`;
    the back is a torus whose profile lies in the meridian ``along`` (unit
    vectors (L, 2) in the lens's own frame) with curvature ``back_profile`` and
    ``back_sweep`` across it.
    """

    front: np.ndarray
    back_profile: np.ndarray
    back_sweep: np.ndarray
    along: np.ndarray
    thickness_mm: np.ndarray
    index: np.ndarray
    rotation: np.ndarray

    def take(self, which) -> "WornLenses":
        """The lenses at the given positions (e.g. each repeated once per pencil)."""
        return WornLenses(*(field[which] for field in self))


def no_roll_rotation(directions) -> np.ndarray:
    """The rotations that turn +z onto each direction about an axis perpendicular to z.

    Parameters
    ----------
    directions : array, shape (N, 3)
        Unit vectors (with a positive z component).

    Returns
    -------
    ndarray, shape (N, 3, 3)
        ``R = I + K + K² / (1 + v_z)``, K the cross-product matrix of
        ``e_z × v``; no roll about z. The lens's tilt (one rotation about an
        axis in its frontal plane) and the eye's turn by Listing's law are
        both of this kind.

    References
    ----------
    Rodrigues' rotation formula (any text on rigid-body rotations); Listing's
    law of ocular torsion (from memory).

    Examples
    --------
    >>> r = no_roll_rotation(np.array([[0.0, math.sin(0.1), math.cos(0.1)]]))
    >>> [round(float(v), 12) for v in r[0] @ np.array([0.0, 0.0, 1.0])] == [0.0, round(math.sin(0.1), 12),
    ...                                                                      round(math.cos(0.1), 12)]
    True
    """
    v = np.asarray(directions, dtype=float).reshape(-1, 3)
    k = np.zeros((v.shape[0], 3, 3))
    # e_z × v = (−v_y, v_x, 0)
    kx, ky = -v[:, 1], v[:, 0]
    k[:, 0, 2], k[:, 2, 0] = ky, -ky
    k[:, 1, 2], k[:, 2, 1] = -kx, kx
    return np.eye(3) + k + (k @ k) / (1.0 + v[:, 2])[:, None, None]


def lens_direction(theta, tangential) -> np.ndarray:
    """The lens's axis (toward the eye) when it is worn with obliquity θ toward the tangential direction t.

    Returns ``(sin θ · t, cos θ)``, shape (N, 3): the lens normal leans toward t
    (up for pantoscopic tilt, nasally for face form), as in
    :func:`lenslane.plugins.optics.tilt.tilt_obliquity`.
    """
    theta = np.atleast_1d(np.asarray(theta, dtype=float))
    t = np.asarray(tangential, dtype=float).reshape(-1, 2)
    t = t / np.linalg.norm(t, axis=1)[:, None]
    return np.column_stack([np.sin(theta) * t[:, 0], np.sin(theta) * t[:, 1], np.cos(theta)])


def worn_lenses(front_d, surfacing, thickness_mm, index, theta, tangential) -> WornLenses:
    """Lenses as worn, from what a lab publishes: front curve, surfacing power, centre thickness, index, tilt.

    Parameters
    ----------
    front_d : array, shape (L,)
        True front surface power, D.
    surfacing : array, shape (L, 3)
        The back vertex power to produce as power-matrix elements (xx, xy, yy), D.
    thickness_mm, index, theta : array, shape (L,)
        Centre thickness (mm), refractive index, obliquity (radians).
    tangential : array, shape (L, 2)
        The tangential direction of the tilt.

    Returns
    -------
    WornLenses

    Notes
    -----
    The back surface is the one the lab makes for that surfacing power behind
    that front at that thickness, as
    :func:`~lenslane.plugins.optics.surfaces.toric_back_surface` makes it, for
    many lenses at once: per principal meridian of the surfacing power (its
    eigenvectors) ``F₂ = Fv − F₁ / (1 − (t/n) F₁)``
    (:func:`~lenslane.plugins.optics.surfaces.back_surface_power`), the profile
    in the meridian of the larger power.

    References
    ----------
    Jalie, *The Principles of Ophthalmic Lenses* (back vertex power per
    principal meridian).
    """
    surfacing = np.asarray(surfacing, dtype=float).reshape(-1, 3)
    count = surfacing.shape[0]
    thickness = np.broadcast_to(np.asarray(thickness_mm, dtype=float), (count,)).copy()
    index = np.broadcast_to(np.asarray(index, dtype=float), (count,)).copy()
    front_d = np.broadcast_to(np.asarray(front_d, dtype=float).reshape(-1), (count,))
    # Principal meridians of the surfacing power (eigenvalues ascending), then the back per meridian.
    powers, vectors = np.linalg.eigh(surfacing[:, [0, 1, 1, 2]].reshape(count, 2, 2))
    profile = surface_curvature_per_mm(back_surface_power(front_d, powers[:, 1], thickness, index), index, "back")
    sweep = surface_curvature_per_mm(back_surface_power(front_d, powers[:, 0], thickness, index), index, "back")
    front = surface_curvature_per_mm(front_d, index, "front")
    along = np.ascontiguousarray(vectors[:, :, 1])
    tangential = np.broadcast_to(np.asarray(tangential, dtype=float).reshape(-1, 2), (count, 2))
    rotation = no_roll_rotation(lens_direction(np.broadcast_to(theta, (count,)), tangential))
    return WornLenses(front, profile, sweep, along, thickness, index, rotation)


def _through_lens(lenses: WornLenses, points: np.ndarray, directions: np.ndarray, backward: bool):
    """Rays through the lens in its own frame (back vertex at the origin); forward from the front, or back from the eye."""
    shift = np.zeros_like(points)
    shift[:, 2] = lenses.thickness_mm
    if backward:
        s = intersect_torus(points, directions, lenses.back_profile, lenses.back_sweep, lenses.along)
        points = points + s[:, None] * directions
        normal = torus_normal(points, lenses.back_profile, lenses.back_sweep, lenses.along)
        directions = refract(directions, normal, 1.0, lenses.index)
        points = points + shift                       # into the front surface's frame
        s = intersect_sphere(points, directions, lenses.front)
        points = points + s[:, None] * directions
        directions = refract(directions, sphere_normal(points, lenses.front), lenses.index, 1.0)
        return points - shift, directions
    points = points + shift
    s = intersect_sphere(points, directions, lenses.front)
    points = points + s[:, None] * directions
    directions = refract(directions, sphere_normal(points, lenses.front), 1.0, lenses.index)
    points = points - shift                           # into the back surface's frame
    s = intersect_torus(points, directions, lenses.back_profile, lenses.back_sweep, lenses.along)
    points = points + s[:, None] * directions
    normal = torus_normal(points, lenses.back_profile, lenses.back_sweep, lenses.along)
    return points, refract(directions, normal, lenses.index, 1.0)


def pencil_vergence(lenses: WornLenses, reference, chief, frame, step_mm: float = PENCIL_STEP_MM) -> np.ndarray:
    """The vergence matrix of the pencil from a distant object about a given emerging chief ray.

    Parameters
    ----------
    lenses : WornLenses
        One lens per pencil (shape (P,)).
    reference : array, shape (P, 3)
        A point of each emerging chief ray, in the eye's frame (mm): where the
        vergence is measured.
    chief : array, shape (P, 3)
        Unit direction of each emerging chief ray (toward the eye).
    frame : array, shape (P, 2, 3)
        Two orthonormal vectors across the chief ray: the matrix's x and y.

    Returns
    -------
    ndarray, shape (P, 2, 2)
        The symmetric vergence matrix, D, positive for a converging pencil.

    Notes
    -----
    The chief ray is traced backward from the reference point through the
    lens, which gives the direction of the incoming light; rays parallel to it
    at offsets ``±step, ±2 step`` in two directions are traced forward and met
    with the plane normal to the chief ray at the reference point, and the
    derivatives of their direction tangents u and positions y by the offsets
    come from the five-point central difference (error of order step⁴). The
    matrix is ``V = −1000 (∂u/∂q)(∂y/∂q)⁻¹``, symmetrised (it is symmetric for
    a pencil from a point; the antisymmetric part left by rounding is below
    1e-10 D).

    References
    ----------
    Spencer & Murty (1962), JOSA 52:672 (the trace); Kneisly (1964), JOSA
    54:229 (wavefront curvature about a chief ray); the five-point stencil as
    in any numerical-analysis text.
    """
    count = lenses.front.shape[0]
    to_lens = np.transpose(lenses.rotation, (0, 2, 1))   # eye frame → lens frame
    reference = np.einsum("pij,pj->pi", to_lens, np.asarray(reference, dtype=float).reshape(count, 3))
    chief = np.einsum("pij,pj->pi", to_lens, np.asarray(chief, dtype=float).reshape(count, 3))
    frame = np.einsum("pij,pkj->pki", to_lens, np.asarray(frame, dtype=float).reshape(count, 2, 3))
    entry, incoming = _through_lens(lenses, reference, -chief, backward=True)
    incoming = -incoming
    # Two directions across the incoming light, for the offsets.
    first = np.broadcast_to(_BASIS[0], (count, 3)) - incoming[:, :1] * incoming
    first /= np.linalg.norm(first, axis=1)[:, None]
    second = np.cross(incoming, first)
    offsets = step_mm * _STENCIL                       # (4,)
    across = np.stack([first, second], axis=1)         # (P, 2, 3)
    start = entry - 5.0 * incoming                     # a point on the chief ray before the lens
    # Rays: pencil p, direction j, offset k → start + offset · across_j.
    points = start[:, None, None, :] + offsets[None, None, :, None] * across[:, :, None, :]
    rays = points.reshape(-1, 3)
    repeat = np.repeat(np.arange(count), 8)
    out_points, out_directions = _through_lens(lenses.take(repeat), rays,
                                               np.repeat(incoming, 8, axis=0), backward=False)
    ref = np.repeat(reference, 8, axis=0)
    axis = np.repeat(chief, 8, axis=0)
    along = np.einsum("ri,ri->r", ref - out_points, axis) / np.einsum("ri,ri->r", out_directions, axis)
    landed = out_points + along[:, None] * out_directions - ref
    frames = np.repeat(frame, 8, axis=0)
    position = np.einsum("rki,ri->rk", frames, landed).reshape(count, 2, 4, 2)
    tangent = (np.einsum("rki,ri->rk", frames, out_directions)
               / np.einsum("ri,ri->r", out_directions, axis)[:, None]).reshape(count, 2, 4, 2)
    # d/dq_j: weights over the offsets; result [p, j, k] = ∂(component k)/∂q_j.
    d_position = np.einsum("o,pjok->pkj", _WEIGHTS, position) / step_mm
    d_tangent = np.einsum("o,pjok->pkj", _WEIGHTS, tangent) / step_mm
    vergence = -1000.0 * d_tangent @ np.linalg.inv(d_position)
    return 0.5 * (vergence + np.transpose(vergence, (0, 2, 1)))


def asworn_vergence(lenses: WornLenses) -> np.ndarray:
    """The as-worn vergence matrix on the line of sight, at the plane through the back vertex normal to it.

    Parameters
    ----------
    lenses : WornLenses
        Shape (L,).

    Returns
    -------
    ndarray, shape (L, 2, 2)
        D, in the x (right) / y (up) frame: what a lens "is" for the eye
        looking straight ahead. Untilted, it is the lens's back vertex power.

    Notes
    -----
    The chief ray leaves the lens at its back vertex along the line of sight
    (the optical centre at the fitting point). Carry the result to another
    plane with ``L′ = L (I − d L)⁻¹``
    (:func:`lenslane.plugins.optics.vertex.vertex_move`).

    References
    ----------
    Spencer & Murty (1962); Kneisly (1964) — see :func:`pencil_vergence`.
    """
    count = lenses.front.shape[0]
    reference = np.zeros((count, 3))
    chief = np.broadcast_to(np.array([0.0, 0.0, 1.0]), (count, 3))
    frame = np.broadcast_to(_BASIS, (count, 2, 3))
    return pencil_vergence(lenses, reference, chief, frame)


def coddington_vergence(lenses: WornLenses) -> np.ndarray:
    """The as-worn vergence matrix on the line of sight by the generalised Coddington equations (no neighbours).

    Takes and returns what :func:`asworn_vergence` does: lenses (L,) → the
    vergence matrices (L, 2, 2) in D at the back-vertex plane, x right, y up.

    Notes
    -----
    The chief ray is traced exactly (backward from the back vertex along the
    line of sight: refraction at the back vertex, intersection with the front
    sphere, refraction). Along it the wavefront's vergence matrix is carried
    analytically: the plane wave from a distant object is refracted at each
    surface by matching the eikonal on the surface to second order,

        M′ᵀ V′ M′ = Mᵀ V M + (n′ cos I′ − n cos I) C,

    with V, V′ the reduced vergence matrices (index × curvature) in bases
    across the incident and refracted rays, M, M′ the matrices of those bases
    against the surface's tangent basis, and C the surface's curvature matrix
    (c I for the front sphere; the toric back's principal curvatures at its
    vertex), and transferred through the glass by ``V (I − (s/n) V)⁻¹`` over
    the chief ray's path s. Exact for the pencil about the chief ray, like
    the neighbouring rays of :func:`asworn_vergence` (they agree to 1e-9 D),
    at a fraction of the cost: it is the one the Newton solve uses.

    References
    ----------
    Kneisly, J. A. (1964), "Local curvature of wavefronts in an optical
    system", JOSA 54:229 (the generalised Coddington equations); Stavroudis,
    O. N. (1972), *The Optics of Rays, Wavefronts, and Caustics*, Academic
    Press; the chief ray after Spencer & Murty (1962), JOSA 52:672.
    """
    count = lenses.front.shape[0]
    index = lenses.index
    to_lens = np.transpose(lenses.rotation, (0, 2, 1))
    sight = to_lens[:, :, 2]                                  # the line of sight in the lens frame
    eye_basis = to_lens[:, :, :2]                             # the eye's x and y in the lens frame (P, 3, 2)
    axis = np.broadcast_to(np.array([0.0, 0.0, 1.0]), (count, 3))
    # The chief ray, backward: it leaves the back vertex along the line of sight.
    inside = -refract(-sight, axis, 1.0, index)               # its direction in the glass
    shift = np.zeros((count, 3))
    shift[:, 2] = lenses.thickness_mm
    path = intersect_sphere(shift, -inside, lenses.front)     # front frame: back vertex at +t on the axis
    entry = shift - path[:, None] * inside
    normal = sphere_normal(entry, lenses.front)               # +z-ish, along the ray, so C = c I
    incoming = -refract(-inside, normal, index, 1.0)
    # Front surface: a plane wave (V = 0) refracted into the glass.
    tangent = _tangent_basis(normal)
    across = _tangent_basis(inside)
    m_glass = np.einsum("pki,pkj->pij", across, tangent)
    cos_in = np.einsum("pi,pi->p", incoming, normal)
    cos_glass = np.einsum("pi,pi->p", inside, normal)
    power = (index * cos_glass - cos_in) * lenses.front       # γ c, C = c I
    inverse = np.linalg.inv(m_glass)
    vergence = power[:, None, None] * np.transpose(inverse, (0, 2, 1)) @ inverse
    # Through the glass along the chief ray.
    vergence = vergence @ np.linalg.inv(np.eye(2) - (path / index)[:, None, None] * vergence)
    # Back surface at its vertex: tangent basis the lens's own x and y, normal +z.
    local = np.broadcast_to(np.eye(3)[:, :2], (count, 3, 2))
    m_before = np.einsum("pki,pkj->pij", across, local)
    m_after = np.einsum("pki,pkj->pij", eye_basis, local)
    cos_back = inside[:, 2]
    cos_out = sight[:, 2]
    a = lenses.along
    rotation = np.stack([np.stack([a[:, 0], -a[:, 1]], axis=1), np.stack([a[:, 1], a[:, 0]], axis=1)], axis=1)
    principal = np.zeros((count, 2, 2))
    principal[:, 0, 0], principal[:, 1, 1] = lenses.back_profile, lenses.back_sweep
    curvature = rotation @ principal @ np.transpose(rotation, (0, 2, 1))
    inner = (np.transpose(m_before, (0, 2, 1)) @ vergence @ m_before
             + (cos_out - index * cos_back)[:, None, None] * curvature)
    inverse = np.linalg.inv(m_after)
    result = 1000.0 * np.transpose(inverse, (0, 2, 1)) @ inner @ inverse
    return 0.5 * (result + np.transpose(result, (0, 2, 1)))


def _tangent_basis(normals: np.ndarray) -> np.ndarray:
    """Two orthonormal vectors across each unit vector (P, 3) → (P, 3, 2), the first in the plane of x and it."""
    nx, ny, nz = normals[:, 0], normals[:, 1], normals[:, 2]
    # e_x less its part along n, normalised; the second is n × first.
    length = np.sqrt(1.0 - nx * nx)
    basis = np.empty((normals.shape[0], 3, 2))
    basis[:, 0, 0], basis[:, 1, 0], basis[:, 2, 0] = length, -nx * ny / length, -nx * nz / length
    basis[:, 0, 1], basis[:, 1, 1], basis[:, 2, 1] = 0.0, nz / length, -ny / length
    return basis


def power_elements(matrices: np.ndarray) -> np.ndarray:
    """Symmetric 2×2 matrices (…, 2, 2) as their elements (…, 3): xx, xy, yy."""
    return np.stack([matrices[..., 0, 0], matrices[..., 0, 1], matrices[..., 1, 1]], axis=-1)


def largest_meridional_error(error) -> np.ndarray:
    """The largest meridional error ``|M| + √(J₀² + J₄₅²)`` of error matrices given as elements (…, 3), D.

    References
    ----------
    Thibos, Wheeler & Horner (1997), Optom Vis Sci 74:367 (power vectors).

    Examples
    --------
    >>> float(largest_meridional_error(np.array([0.25, 0.0, -0.25])))
    0.25
    """
    error = np.asarray(error, dtype=float)
    mean = 0.5 * (error[..., 0] + error[..., 2])
    return np.abs(mean) + np.hypot(0.5 * (error[..., 0] - error[..., 2]), error[..., 1])


class ExactCompensation(NamedTuple):
    """The solved lenses: surfacing power elements (L, 3), centre thickness (L,), residual (L,), Newton steps."""

    surfacing: np.ndarray
    center_mm: np.ndarray
    residual_d: np.ndarray
    steps: int


def exact_compensation(wanted, front_d, index, theta, tangential,
                       thickness_of: Callable[[np.ndarray], np.ndarray],
                       tolerance_d: float = RESIDUAL_TOLERANCE_D) -> ExactCompensation:
    """The surfacing power whose real-ray as-worn power equals the wanted power, with the thickness it implies.

    Parameters
    ----------
    wanted : array, shape (L, 3)
        The wanted as-worn power at the back-vertex plane (power-matrix elements
        xx, xy, yy), D: the prescription carried to the fitting vertex distance.
    front_d, index, theta : array, shape (L,)
        Front curve (D), refractive index, obliquity (radians).
    tangential : array, shape (L, 2)
        Tangential direction of the tilt.
    thickness_of : callable
        ``thickness_of(surfacing (K, 3)) -> centre thickness (K,) mm``: how the
        lab derives the thickness from the surfacing power (the lens geometry
        model); a constant for a lens of fixed thickness.
    tolerance_d : float
        Stop when every element of ``wanted − as-worn`` is below this.

    Returns
    -------
    ExactCompensation
        The surfacing power, the centre thickness of that surfacing power, the
        residual (largest absolute eigenvalue of ``wanted − as-worn`` for that
        lens, D) and the number of Newton steps taken.

    Notes
    -----
    Newton's method on the three elements of the surfacing power matrix (the
    back surface's power matrix less the front's vergence at the back vertex,
    a shift that does not change the steps), from Martin's compensation
    (:func:`~lenslane.plugins.optics.tilt.compensate_tilt`). Each step
    evaluates the lens and its three neighbours ``+10⁻³ D`` in each element
    (:func:`coddington_vergence`, one batched call) at the thickness the
    lens's surfacing power gives, and once more 10⁻³ mm thicker; solves the
    3×3 system for the next surfacing power and re-derives the thickness for
    it. The thickness's own gradient by the surfacing power, which would cost
    three more thickness solutions per step, is estimated by Broyden's
    rank-one update from the steps taken (it starts at zero), so the Jacobian
    carries the coupling along the direction the solution moves: two or three
    steps reach 1e-9 D.

    References
    ----------
    Newton's method as in any numerical-analysis text; Broyden, C. G. (1965),
    "A class of methods for solving nonlinear simultaneous equations", Math.
    Comp. 19:577 (the secant update); the optics as in
    :func:`coddington_vergence`.
    """
    wanted = np.asarray(wanted, dtype=float).reshape(-1, 3)
    count = wanted.shape[0]
    front_d = np.broadcast_to(np.asarray(front_d, dtype=float), (count,))
    index = np.broadcast_to(np.asarray(index, dtype=float), (count,))
    theta = np.broadcast_to(np.asarray(theta, dtype=float), (count,))
    tangential = np.broadcast_to(np.asarray(tangential, dtype=float).reshape(-1, 2), (count, 2))
    surfacing = np.array([compensate_tilt(PowerMatrix(*w), float(th), tuple(t), float(n))
                          for w, th, t, n in zip(wanted, theta, tangential, index)])
    # The lens, its three neighbours +10⁻³ D in each element, and one 10⁻³ mm thicker.
    variants = np.concatenate([np.zeros((1, 3)), _JACOBIAN_STEP_D * np.eye(3), np.zeros((1, 3))])
    thicker = np.array([0.0, 0.0, 0.0, 0.0, _THICKNESS_STEP_MM])
    repeat = np.repeat(np.arange(count), 5)
    thickness = np.asarray(thickness_of(surfacing), dtype=float).reshape(count)
    slope = np.zeros((count, 3))            # the thickness's gradient by the surfacing power, mm/D (secant)
    for step in range(_MAX_NEWTON_STEPS + 1):
        trial = (surfacing[:, None, :] + variants[None, :, :]).reshape(-1, 3)
        lenses = worn_lenses(front_d[repeat], trial, (thickness[:, None] + thicker).reshape(-1), index[repeat],
                             theta[repeat], tangential[repeat])
        worn = power_elements(coddington_vergence(lenses)).reshape(count, 5, 3)
        residual = wanted - worn[:, 0]
        if step == _MAX_NEWTON_STEPS or np.max(np.abs(residual)) < tolerance_d:
            break
        jacobian = np.transpose(worn[:, 1:4] - worn[:, :1], (0, 2, 1)) / _JACOBIAN_STEP_D   # [l, out, in]
        by_thickness = (worn[:, 4] - worn[:, 0]) / _THICKNESS_STEP_MM
        jacobian = jacobian + by_thickness[:, :, None] * slope[:, None, :]
        change = np.linalg.solve(jacobian, residual[..., None])[..., 0]
        surfacing = surfacing + change
        previous, thickness = thickness, np.asarray(thickness_of(surfacing), dtype=float).reshape(count)
        # Broyden's update of the thickness's gradient along the step just taken.
        slope = slope + ((thickness - previous - np.sum(slope * change, axis=1))
                         / np.maximum(np.sum(change * change, axis=1), 1e-300))[:, None] * change
    largest = np.abs(np.linalg.eigvalsh(np.stack([residual[:, [0, 1]], residual[:, [1, 2]]], axis=1))).max(axis=1)
    return ExactCompensation(surfacing, thickness, largest, step)


class GazeErrors(NamedTuple):
    """Off-axis errors of lenses (L,) at gaze angles (A,) in the directions (D,) of :data:`GAZE_DIRECTIONS`.

    ``mean_d`` the mean power error M, ``cylinder_d`` the astigmatic error
    2√(J₀² + J₄₅²), both (L, A, D) in dioptres; NaN where the pencil does not
    get through the lens (beyond its edge, or totally reflected).
    """

    angles_deg: tuple[float, ...]
    directions: tuple[str, ...]
    mean_d: np.ndarray
    cylinder_d: np.ndarray


def gaze_errors(lenses: WornLenses, wanted, eyes: Sequence[str],
                rotation_distance_mm: float = ROTATION_DISTANCE_MM,
                angles_deg: Sequence[float] = GAZE_ANGLES_DEG) -> GazeErrors:
    """The mean power error and astigmatic error of each lens as the eye turns behind it.

    Parameters
    ----------
    lenses : WornLenses
        Shape (L,).
    wanted : array, shape (L, 3)
        The wanted power on the vertex sphere (power-matrix elements), D — the
        prescription carried to the back-vertex distance.
    eyes : sequence of {"right", "left"}
        Per lens: nasal is toward +x for the right eye, −x for the left.
    rotation_distance_mm : float
        From the back vertex to the eye's centre of rotation, mm.
    angles_deg : sequence of float
        Gaze angles from the primary line of sight.

    Returns
    -------
    GazeErrors

    Notes
    -----
    For each gaze the chief ray runs through the centre of rotation C; its
    vergence is measured where it meets the vertex sphere (about C, through
    the back vertex), in the frame the eye carries when it turns by Listing's
    law (:func:`no_roll_rotation`), and compared with the wanted power in that
    frame: ``E = V − F``, ``M = (E₁₁ + E₂₂)/2``, astigmatic error
    ``2√(J₀² + J₄₅²)`` with ``J₀ = (E₁₁ − E₂₂)/2``, ``J₄₅ = E₁₂``.

    References
    ----------
    Thibos, Wheeler & Horner (1997), Optom Vis Sci 74:367 (power vectors);
    Atchison (1992), Applied Optics 31:3579 (off-axis errors of spectacle
    lenses; the centre of rotation and Listing's law, from memory).
    """
    wanted = np.asarray(wanted, dtype=float).reshape(-1, 3)
    count = wanted.shape[0]
    names = tuple(GAZE_DIRECTIONS)
    angles = np.radians(np.asarray(angles_deg, dtype=float))
    sides = np.array([1.0 if eye == "right" else -1.0 for eye in eyes])
    plane = np.array([GAZE_DIRECTIONS[name] for name in names])             # (D, 2)
    # Gaze g (the ray toward the eye) for lens l, angle a, direction d: (−sin β · dir, cos β).
    dx = -np.sin(angles)[None, :, None] * plane[None, None, :, 0] * sides[:, None, None]
    dy = -np.sin(angles)[None, :, None] * plane[None, None, :, 1] * np.ones((count, 1, 1))
    dz = np.cos(angles)[None, :, None] * np.ones((count, 1, len(names)))
    chief = np.stack(np.broadcast_arrays(dx, dy, dz), axis=-1).reshape(-1, 3)
    centre = np.array([0.0, 0.0, rotation_distance_mm])
    reference = centre - rotation_distance_mm * chief
    turn = no_roll_rotation(chief)
    frame = np.transpose(turn[:, :, :2], (0, 2, 1))                           # columns e_x, e_y turned
    per_lens = angles.size * len(names)
    repeat = np.repeat(np.arange(count), per_lens)
    try:
        vergence = power_elements(pencil_vergence(lenses.take(repeat), reference, chief, frame))
    except RayMissedSurface:
        # Some pencil misses (a ray beyond the edge of a steep lens, or totally reflected): each on its own,
        # NaN for those that do not get through.
        vergence = np.full((repeat.size, 3), np.nan)
        for p in range(repeat.size):
            try:
                vergence[p] = power_elements(pencil_vergence(lenses.take(repeat[p:p + 1]), reference[p:p + 1],
                                                             chief[p:p + 1], frame[p:p + 1]))[0]
            except RayMissedSurface:
                pass
    error = (vergence - wanted[repeat]).reshape(count, angles.size, len(names), 3)
    mean = 0.5 * (error[..., 0] + error[..., 2])
    cylinder = 2.0 * np.hypot(0.5 * (error[..., 0] - error[..., 2]), error[..., 1])
    return GazeErrors(tuple(float(a) for a in angles_deg), names, mean, cylinder)


def form_score(errors: GazeErrors) -> np.ndarray:
    """How far each lens's form is from perfect: the RMS over all gaze points of the largest meridional error.

    Returns
    -------
    ndarray, shape (L,)
        ``√(mean (|M| + cyl/2)²)`` over the angles and directions, D;
        infinite for a lens that some pencil does not get through.

    References
    ----------
    Thibos, Wheeler & Horner (1997) for the largest meridional error; a
    least-squares merit over the field as in Atchison (1992), Applied Optics
    31:3579.
    """
    largest = np.abs(errors.mean_d) + 0.5 * errors.cylinder_d
    score = np.sqrt(np.mean(largest.reshape(largest.shape[0], -1) ** 2, axis=1))
    return np.where(np.isnan(score), np.inf, score)


class BestForm(NamedTuple):
    """The chosen base (D), and per candidate base: its centre thickness, errors and score."""

    base_d: float
    bases_d: tuple[float, ...]
    center_mm: np.ndarray
    errors: GazeErrors
    score_d: np.ndarray


def _number(value) -> float | None:
    """A float for a record, None for NaN (a pencil that did not get through)."""
    return None if np.isnan(value) else float(value)


def off_axis_record(errors: GazeErrors, row: int = 0) -> dict:
    """One lens's off-axis errors as plain numbers for a record: per direction, per angle, M and the cylinder error.

    Examples
    --------
    >>> zero = np.zeros((1, 2, 4))
    >>> off_axis_record(GazeErrors((20.0, 30.0), tuple(GAZE_DIRECTIONS), zero, zero))["up"]
    {'mean_d': [0.0, 0.0], 'cylinder_d': [0.0, 0.0]}
    """
    record: dict = {"gaze_angles_deg": list(errors.angles_deg)}
    for column, name in enumerate(errors.directions):
        record[name] = {"mean_d": [_number(v) for v in errors.mean_d[row, :, column]],
                        "cylinder_d": [_number(v) for v in errors.cylinder_d[row, :, column]]}
    return record


def best_form(surfacing, index: float, theta: float, tangential, eye: str, bases_d: Sequence[float],
              thickness_of: Callable[[float], float],
              rotation_distance_mm: float = ROTATION_DISTANCE_MM,
              angles_deg: Sequence[float] = GAZE_ANGLES_DEG) -> BestForm:
    """Among stocked bases, the front curve whose lens has the least off-axis error.

    Parameters
    ----------
    surfacing : array, shape (3,)
        The surfacing power (power-matrix elements), D.
    index, theta : float
        Refractive index; obliquity (radians).
    tangential : (float, float)
        Tangential direction of the tilt.
    eye : {"right", "left"}
    bases_d : sequence of float
        The candidate front curves, D (true power at the lens index).
    thickness_of : callable
        ``thickness_of(base_d) -> centre thickness (mm)`` of the lens with that
        front; a base for which no lens can be made raises
        :class:`~lenslane.plugins.optics.thickness.LensNotMakeable` and is
        left out.
    rotation_distance_mm : float
    angles_deg : sequence of float

    Returns
    -------
    BestForm
        The base with the least :func:`form_score` (on a tie, the flatter), and
        every makeable candidate's numbers. Each lens's errors are taken
        relative to its own as-worn power on the line of sight, so that the
        form is judged apart from the compensation of its centre.

    Raises
    ------
    ValueError
        No candidate base gives a makeable lens.

    Notes
    -----
    All candidates are traced together: one batched trace of
    ``bases × angles × 4`` pencils.

    References
    ----------
    Atchison (1992), Applied Optics 31:3579 (best form by exact ray trace).
    """
    from lenslane.plugins.optics.thickness import LensNotMakeable

    kept, centres = [], []
    for base in sorted(bases_d):
        try:
            centres.append(float(thickness_of(base)))
        except LensNotMakeable:
            continue
        kept.append(float(base))
    if not kept:
        raise ValueError("no stocked base gives a lens that can be made")
    count = len(kept)
    lenses = worn_lenses(np.array(kept), np.broadcast_to(np.asarray(surfacing, dtype=float), (count, 3)),
                         np.array(centres), index, theta, np.asarray(tangential, dtype=float))
    errors = gaze_errors(lenses, power_elements(asworn_vergence(lenses)), [eye] * count, rotation_distance_mm,
                         angles_deg)
    score = form_score(errors)
    return BestForm(kept[int(np.argmin(score))], tuple(kept), np.array(centres), errors, score)
