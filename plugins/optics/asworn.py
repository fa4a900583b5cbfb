"""Exact as-worn power: real rays through the thick, tilted lens, and the lens that makes the eye's power exact.

The lens (spherical front, toric back, centre thickness, index) sits with its
back vertex B on the line of sight, turned by the obliquity θ about the axis in
its frontal plane perpendicular to the tangential direction t, with no roll
about its own axis — the same angles as the thin-lens tilt model
(:mod:`lenslane.plugins.optics.tilt`), so the two differ in optics only.
Coordinates: x toward the observer's right, y up, z along the primary line of
sight toward the eye, B at the origin. The eye's centre of rotation lies on
the line of sight,
:data:`~lenslane.plugins.optics.front_curve.ROTATION_DISTANCE_MM` behind B.

A pencil from a distant object is measured about its chief ray. The chief ray
is traced exactly (vector Snell's law); the vergence of the infinitesimal
pencil about it is carried along it by the generalised Coddington equations,
with each surface's curvature matrix where the chief ray meets it. On the line
of sight the reference point is B; for an eye turned about its centre of
rotation, it is where the chief ray through the centre of rotation meets the
vertex sphere (about the centre of rotation, through B).

One lens and one pencil per call, in plain floats (the engine's case: a few
pencils per lens, one lens after another). Power matrices are
:class:`~lenslane.plugins.optics.power.PowerMatrix` (xx, xy, yy) in dioptres;
inside, 2×2 matrices are pairs of rows and vergences are in 1/mm.

References
----------
.. [1] Spencer, G. H. & Murty, M. V. R. K. (1962). "General ray-tracing
   procedure." JOSA 52:672 — the ray trace (:mod:`lenslane.plugins.optics.raytrace`).
.. [2] Kneisly, J. A. (1964). "Local curvature of wavefronts in an optical
   system." JOSA 54:229 — the vergence of a pencil about its chief ray (the
   generalised Coddington equations); Stavroudis, O. N. (1972). *The Optics of
   Rays, Wavefronts, and Caustics*. Academic Press.
.. [3] Thibos, L. N., Wheeler, W. & Horner, D. (1997). "Power vectors: an
   application of Fourier analysis to the description and statistical analysis
   of refractive error." Optom Vis Sci 74:367 — M, J₀, J₄₅.
.. [4] Atchison, D. A. (1992). "Spectacle lens design: a review." Applied
   Optics 31:3579 — judging a lens form by its errors at 20°–35° of gaze.
"""
from __future__ import annotations

import math
from typing import Callable, NamedTuple, Sequence

from lenslane.plugins.optics.front_curve import ROTATION_DISTANCE_MM
from lenslane.plugins.optics.power import PowerMatrix
from lenslane.plugins.optics.raytrace import (
    RayMissedSurface, Vector, dot, intersect_sphere, intersect_torus, point_at, refract, reverse, sphere_normal,
    torus_curvature, torus_normal,
)
from lenslane.plugins.optics.surfaces import back_vertex_power, surface_curvature_per_mm, toric_back_surface
from lenslane.plugins.optics.thickness import LensNotMakeable

#: Gaze angles (degrees) at which the off-axis errors are reported.
GAZE_ANGLES_DEG = (20.0, 30.0)
#: The four main gaze directions, as (x, y) for the right eye (x of "nasal" and "temporal" mirror for the left).
GAZE_DIRECTIONS = {"up": (0.0, 1.0), "down": (0.0, -1.0), "nasal": (1.0, 0.0), "temporal": (-1.0, 0.0)}
#: The exact compensation stops when the as-worn power is this close to the wanted one (D, every element).
RESIDUAL_TOLERANCE_D = 1e-9
#: A solution still further than this from the wanted power after the last round is not taken (D): half the step
#: the contract rounds a power to, so a solution within it publishes the power a perfect one would, or one step off.
SETTLED_D = 0.005
_MAX_ROUNDS = 12

Matrix = tuple[tuple[float, float], tuple[float, float]]
Basis = tuple[Vector, Vector]

_ORIGIN = (0.0, 0.0, 0.0)
_SIGHT = (0.0, 0.0, 1.0)
_EYE_BASIS = ((1.0, 0.0, 0.0), (0.0, 1.0, 0.0))


class NotSettled(ValueError):
    """The exact compensation's rounds ended with a lens not yet worn as the wanted power (see :data:`SETTLED_D`)."""


class WornLens(NamedTuple):
    """A lens as worn. Curvatures in 1/mm, signed as in :mod:`lenslane.plugins.optics.surfaces`.

    The back is a torus whose profile lies in the meridian ``along`` (a unit
    vector in the lens's own frame) with curvature ``back_profile``, and
    ``back_sweep`` across it. ``axes`` are the lens's own x, y and z axes in
    the eye's frame (z its axis, toward the eye).
    """

    front: float
    back_profile: float
    back_sweep: float
    along: tuple[float, float]
    thickness_mm: float
    index: float
    axes: tuple[Vector, Vector, Vector]

    def to_lens(self, vector: Vector) -> Vector:
        """A vector of the eye's frame in the lens's own frame."""
        return dot(self.axes[0], vector), dot(self.axes[1], vector), dot(self.axes[2], vector)


def no_roll_axes(direction: Vector) -> tuple[Vector, Vector, Vector]:
    """The rotation that turns +z onto a direction about an axis perpendicular to z: the images of x, y and z.

    Parameters
    ----------
    direction : Vector
        A unit vector with a positive z component.

    Returns
    -------
    (Vector, Vector, Vector)
        The columns of ``R = I + K + K² / (1 + v_z)``, K the cross-product
        matrix of ``e_z × v``; no roll about z. The lens's tilt (one rotation
        about an axis in its frontal plane) and the eye's turn by Listing's law
        are both of this kind.

    References
    ----------
    Rodrigues' rotation formula (any text on rigid-body rotations); Listing's
    law of ocular torsion (from memory).

    Examples
    --------
    >>> no_roll_axes((0.0, 0.6, 0.8))[2]
    (0.0, 0.6, 0.8)
    """
    vx, vy, vz = direction
    k = 1.0 / (1.0 + vz)
    return ((1.0 - vx * vx * k, -vx * vy * k, -vx),
            (-vx * vy * k, 1.0 - vy * vy * k, -vy),
            (vx, vy, vz))


def lens_direction(theta: float, tangential: tuple[float, float]) -> Vector:
    """The lens's axis (toward the eye) when it is worn with obliquity θ toward the tangential direction t.

    Returns ``(sin θ · t, cos θ)``: the lens normal leans toward t (up for
    pantoscopic tilt, nasally for face form), as in
    :func:`lenslane.plugins.optics.tilt.tilt_obliquity`.
    """
    tx, ty = tangential
    length = math.hypot(tx, ty)
    sine = math.sin(theta)
    return sine * tx / length, sine * ty / length, math.cos(theta)


def worn_lens(front_d: float, surfacing, thickness_mm: float, index: float, theta: float,
              tangential: tuple[float, float]) -> WornLens:
    """A lens as worn, from what a lab publishes: front curve, surfacing power, centre thickness, index, tilt.

    Parameters
    ----------
    front_d : float
        True front surface power, D.
    surfacing : PowerMatrix or (xx, xy, yy)
        The back vertex power to produce, D.
    thickness_mm, index, theta : float
        Centre thickness (mm), refractive index, obliquity (radians).
    tangential : (float, float)
        The tangential direction of the tilt.

    Returns
    -------
    WornLens

    Notes
    -----
    The back surface is the one the lab makes for that surfacing power behind
    that front at that thickness,
    :func:`~lenslane.plugins.optics.surfaces.toric_back_surface`: per
    principal meridian ``F₂ = Fv − F₁ / (1 − (t/n) F₁)``, the profile in the
    meridian of the larger power.

    References
    ----------
    Jalie, *The Principles of Ophthalmic Lenses* (back vertex power per
    principal meridian).
    """
    front_d, thickness_mm, index = float(front_d), float(thickness_mm), float(index)
    back = toric_back_surface(front_d, PowerMatrix(*(float(v) for v in surfacing)), thickness_mm, index)
    angle = math.radians(back.meridian_a_deg)
    return WornLens(
        surface_curvature_per_mm(front_d, index, "front"),
        surface_curvature_per_mm(back.power_a_d, index, "back"),
        surface_curvature_per_mm(back.power_b_d, index, "back"),
        (math.cos(angle), math.sin(angle)), thickness_mm, index,
        no_roll_axes(lens_direction(float(theta), (float(tangential[0]), float(tangential[1])))),
    )


class ChiefRay(NamedTuple):
    """A ray traced back from the eye's side through a lens, in the lens's own frame (back vertex at the origin).

    ``back`` where it meets the back surface, ``back_normal`` the surface's
    normal there, and ``beyond`` how far the ray then runs to the point it was
    traced from (mm); ``glass`` its direction inside the lens and ``path`` its
    length there (mm); ``front`` where it meets the front surface and
    ``front_normal`` that surface's normal; ``incoming`` its direction before
    the lens and ``emerging`` after it. Directions and normals are unit
    vectors toward the eye.
    """

    back: Vector
    back_normal: Vector
    beyond: float
    glass: Vector
    path: float
    front: Vector
    front_normal: Vector
    incoming: Vector
    emerging: Vector


def trace_chief_ray(lens: WornLens, point: Vector, direction: Vector) -> ChiefRay:
    """The ray that leaves the lens through a given point along a given direction, traced back through it.

    Parameters
    ----------
    lens : WornLens
    point, direction : Vector
        A point of the emerging ray and its unit direction toward the eye, in
        the lens's own frame.

    Returns
    -------
    ChiefRay

    Raises
    ------
    RayMissedSurface
        The ray misses a surface or is totally reflected.

    References
    ----------
    Spencer & Murty (1962), JOSA 52:672: intersections and vector Snell's law,
    here used backward (a ray's path is reversible).
    """
    beyond = intersect_torus(point, reverse(direction), lens.back_profile, lens.back_sweep, lens.along)
    back = point_at(point, -beyond, direction)
    back_normal = torus_normal(back, lens.back_profile, lens.back_sweep, lens.along)
    glass = reverse(refract(reverse(direction), back_normal, 1.0, lens.index))
    path = intersect_sphere(_in_front_frame(lens, back), reverse(glass), lens.front)
    front = point_at(back, -path, glass)
    front_normal = sphere_normal(_in_front_frame(lens, front), lens.front)
    incoming = reverse(refract(reverse(glass), front_normal, lens.index, 1.0))
    return ChiefRay(back, back_normal, beyond, glass, path, front, front_normal, incoming, direction)


def _in_front_frame(lens: WornLens, point: Vector) -> Vector:
    """A point of the lens's frame (back vertex at the origin) in the front surface's frame (front vertex there)."""
    return point[0], point[1], point[2] + lens.thickness_mm


# --------------------------------------------------------------------------
# The generalised Coddington equations
# --------------------------------------------------------------------------


def _across(direction: Vector) -> Basis:
    """Two orthonormal vectors across a unit vector, the first in the plane of x and it."""
    nx, ny, nz = direction
    # e_x less its part along the vector, normalised; the second is the vector × the first.
    length = math.sqrt(1.0 - nx * nx)
    return (length, -nx * ny / length, -nx * nz / length), (0.0, nz / length, -ny / length)


def _seen(basis: Basis, tangent: Basis) -> Matrix:
    """``M = Bᵀ T``: how a basis B across a ray sees a surface's tangent basis T."""
    return ((dot(basis[0], tangent[0]), dot(basis[0], tangent[1])),
            (dot(basis[1], tangent[0]), dot(basis[1], tangent[1])))


def _product(a: Matrix, b: Matrix) -> Matrix:
    return ((a[0][0] * b[0][0] + a[0][1] * b[1][0], a[0][0] * b[0][1] + a[0][1] * b[1][1]),
            (a[1][0] * b[0][0] + a[1][1] * b[1][0], a[1][0] * b[0][1] + a[1][1] * b[1][1]))


def _transposed(a: Matrix) -> Matrix:
    return (a[0][0], a[1][0]), (a[0][1], a[1][1])


def _inverse(a: Matrix) -> Matrix:
    determinant = a[0][0] * a[1][1] - a[0][1] * a[1][0]
    return ((a[1][1] / determinant, -a[0][1] / determinant), (-a[1][0] / determinant, a[0][0] / determinant))


def _sum(a: Matrix, b: Matrix, scale: float = 1.0) -> Matrix:
    """``a + scale · b``."""
    return ((a[0][0] + scale * b[0][0], a[0][1] + scale * b[0][1]),
            (a[1][0] + scale * b[1][0], a[1][1] + scale * b[1][1]))


def _phase(vergence: Matrix, basis: Basis, tangent: Basis) -> Matrix:
    """A pencil's vergence matrix in a basis across its ray, as its second-order phase on a surface's tangent
    plane: ``Mᵀ V M`` with ``M = Bᵀ T``."""
    m = _seen(basis, tangent)
    return _product(_transposed(m), _product(vergence, m))


def _vergence(phase: Matrix, basis: Basis, tangent: Basis) -> Matrix:
    """The inverse of :func:`_phase`: the vergence matrix ``M⁻ᵀ Q M⁻¹`` across a ray of a phase on a surface."""
    inverse = _inverse(_seen(basis, tangent))
    return _product(_transposed(inverse), _product(phase, inverse))


def _transfer(vergence: Matrix, reduced_mm: float) -> Matrix:
    """A pencil carried along its ray by a reduced distance (mm divided by the index): ``V (I − d V)⁻¹``."""
    (a, b), (c, d) = vergence
    return _product(vergence, _inverse(((1.0 - reduced_mm * a, -reduced_mm * b),
                                        (-reduced_mm * c, 1.0 - reduced_mm * d))))


class _AtTheBack(NamedTuple):
    """The pencil about a chief ray as it reaches the back surface: its phase on the tangent plane (1/mm), the
    refraction's ``n′ cos I′ − n cos I``, and the tangent basis there."""

    phase: Matrix
    gamma: float
    tangent: Basis


def _to_the_back(lens: WornLens, ray: ChiefRay) -> _AtTheBack:
    """The pencil from a distant object about a traced chief ray, refracted by the front and carried to the back.

    The generalised Coddington equation refracts a pencil at a surface of
    curvature matrix C: ``M′ᵀ V′ M′ = Mᵀ V M + (n′ cos I′ − n cos I) C``, V and
    V′ the reduced vergence matrices (index × curvature) across the incident
    and refracted rays, M and M′ those bases against the surface's tangent
    basis (:func:`_phase`). At the front a plane wave (V = 0) meets a sphere
    (C = c I in any tangent basis); through the glass the pencil is carried
    along the chief ray by :func:`_transfer`. What the back surface adds (its
    γ C) is left to the caller.
    """
    index, normal = lens.index, ray.front_normal
    glass = _across(ray.glass)
    power = (index * dot(ray.glass, normal) - dot(ray.incoming, normal)) * lens.front
    vergence = _transfer(_vergence(((power, 0.0), (0.0, power)), glass, _across(normal)), ray.path / index)
    normal = ray.back_normal
    tangent = _across(normal)
    gamma = dot(ray.emerging, normal) - index * dot(ray.glass, normal)
    return _AtTheBack(_phase(vergence, glass, tangent), gamma, tangent)


def _power_matrix(matrix: Matrix) -> PowerMatrix:
    """A vergence matrix in 1/mm as a power matrix in D (its symmetric part: the rest is rounding)."""
    return PowerMatrix(1000.0 * matrix[0][0], 500.0 * (matrix[0][1] + matrix[1][0]) + 0.0, 1000.0 * matrix[1][1])


def pencil_vergence(lens: WornLens, reference: Vector, chief: Vector, frame: Basis) -> PowerMatrix:
    """The vergence matrix of the pencil from a distant object about a given emerging chief ray.

    Parameters
    ----------
    lens : WornLens
    reference : Vector
        A point of the emerging chief ray, in the eye's frame (mm): where the
        vergence is measured.
    chief : Vector
        Unit direction of the emerging chief ray (toward the eye).
    frame : (Vector, Vector)
        Two orthonormal vectors across the chief ray: the matrix's x and y.

    Returns
    -------
    PowerMatrix
        The vergence matrix, D, positive for a converging pencil.

    Raises
    ------
    RayMissedSurface
        The chief ray cannot be traced through the lens.

    Notes
    -----
    One exactly traced ray: the chief ray, traced back from the reference
    point through the lens (:func:`trace_chief_ray`). Along it the vergence
    of the infinitesimal pencil about it is carried by the generalised
    Coddington equations (:func:`_to_the_back`), with the back surface's
    curvature matrix where the chief ray meets it
    (:func:`~lenslane.plugins.optics.raytrace.torus_curvature`), then on to
    the reference point. It is what exactly traced neighbouring rays give in
    the limit of a small pencil; the tests compare it with rayoptics' real
    rays.

    References
    ----------
    Kneisly, J. A. (1964), "Local curvature of wavefronts in an optical
    system", JOSA 54:229 (the generalised Coddington equations); Stavroudis,
    O. N. (1972), *The Optics of Rays, Wavefronts, and Caustics*, Academic
    Press; the chief ray after Spencer & Murty (1962), JOSA 52:672.
    """
    ray = trace_chief_ray(lens, lens.to_lens(reference), lens.to_lens(chief))
    back = _to_the_back(lens, ray)
    curvature = torus_curvature(ray.back, back.tangent, lens.back_profile, lens.back_sweep, lens.along)
    emerging = _vergence(_sum(back.phase, curvature, back.gamma),
                         (lens.to_lens(frame[0]), lens.to_lens(frame[1])), back.tangent)
    return _power_matrix(_transfer(emerging, ray.beyond))


def asworn_power(lens: WornLens) -> PowerMatrix:
    """The as-worn vergence matrix on the line of sight, at the plane through the back vertex normal to it.

    Returns
    -------
    PowerMatrix
        D, in the x (right) / y (up) frame: what the lens "is" for the eye
        looking straight ahead. Untilted, it is the lens's back vertex power.

    Notes
    -----
    The chief ray leaves the lens at its back vertex along the line of sight
    (the optical centre at the fitting point); :func:`pencil_vergence` about
    it. Carry the result to another plane with ``L′ = L (I − d L)⁻¹``
    (:func:`lenslane.plugins.optics.vertex.vertex_move`).
    """
    return pencil_vergence(lens, _ORIGIN, _SIGHT, _EYE_BASIS)


def surfacing_for(wanted, front_d: float, thickness_mm: float, index: float, theta: float,
                  tangential: tuple[float, float]) -> PowerMatrix:
    """The surfacing power whose lens, behind this front at this centre thickness, is worn as the wanted power.

    Parameters
    ----------
    wanted : PowerMatrix or (xx, xy, yy)
        The as-worn power wanted at the back-vertex plane, D.
    front_d, thickness_mm, index, theta : float
        Front curve (D), centre thickness (mm), refractive index, obliquity
        (radians).
    tangential : (float, float)
        Tangential direction of the tilt.

    Returns
    -------
    PowerMatrix
        The surfacing power (the back vertex power to produce), D: exact, in
        closed form.

    Notes
    -----
    The chief ray leaves the lens at its back vertex along the line of sight,
    and the back surface's normal there is the lens's axis whatever its
    curvatures: so the chief ray, and the pencil that reaches the back
    (:func:`_to_the_back`), do not depend on the back surface. The
    generalised Coddington equation at the back is then linear in the back's
    curvature matrix C (in the lens's own x and y at its vertex) and is
    solved for it: ``C = (M′ᵀ V′ M′ − Mᵀ V M) / (cos I′ − n cos I)``. The back's
    power matrix is ``1000 (1 − n) C`` (surface power F = (1 − n)/r), and the
    surfacing power adds the front's vergence at the back vertex,
    ``F₁ / (1 − (t/n) F₁)``: the back vertex power formula per meridian, by
    which :func:`worn_lens` makes the back again.

    References
    ----------
    Kneisly (1964), JOSA 54:229 (the generalised Coddington equation);
    Jalie, *The Principles of Ophthalmic Lenses* (surface and back vertex power).

    Examples
    --------
    Untilted, the surfacing power is the wanted power itself:

    >>> [round(v, 12) + 0.0 for v in surfacing_for((-4.0, 0.5, -5.0), 4.0, 2.0, 1.6, 0.0, (0.0, 1.0))]
    [-4.0, 0.5, -5.0]
    """
    # Any back will do for the trace (here the one for a plano surfacing power): the chief ray leaves at its vertex.
    lens = worn_lens(front_d, (0.0, 0.0, 0.0), thickness_mm, index, theta, tangential)
    back = _to_the_back(lens, trace_chief_ray(lens, _ORIGIN, lens.to_lens(_SIGHT)))
    xx, xy, yy = (float(v) / 1000.0 for v in wanted)
    target = _phase(((xx, xy), (xy, yy)), (lens.to_lens(_EYE_BASIS[0]), lens.to_lens(_EYE_BASIS[1])), back.tangent)
    curvature = _sum(target, back.phase, -1.0)
    scale = (1.0 - lens.index) / back.gamma
    front_vergence = back_vertex_power(float(front_d), 0.0, lens.thickness_mm, lens.index) / 1000.0
    return _power_matrix(((scale * curvature[0][0] + front_vergence, scale * curvature[0][1]),
                          (scale * curvature[1][0], scale * curvature[1][1] + front_vergence)))


def largest_meridional_error(error) -> float:
    """The largest meridional error ``|M| + √(J₀² + J₄₅²)`` of an error matrix (xx, xy, yy), D.

    It is the larger principal error's size, the largest absolute eigenvalue.

    References
    ----------
    Thibos, Wheeler & Horner (1997), Optom Vis Sci 74:367 (power vectors).

    Examples
    --------
    >>> largest_meridional_error((0.25, 0.0, -0.25))
    0.25
    """
    xx, xy, yy = (float(v) for v in error)
    return abs(0.5 * (xx + yy)) + math.hypot(0.5 * (xx - yy), xy)


def _difference(a, b) -> PowerMatrix:
    return PowerMatrix(float(a[0]) - float(b[0]), float(a[1]) - float(b[1]), float(a[2]) - float(b[2]))


class ExactLens(NamedTuple):
    """A lens to compensate: the wanted as-worn power at the back-vertex plane (D) — the prescription carried to
    the fitting vertex distance — its refractive index, obliquity (radians) and tangential direction."""

    wanted: PowerMatrix
    index: float
    theta: float
    tangential: tuple[float, float]


class ExactCompensation(NamedTuple):
    """A solved lens: surfacing power, front curve (D), centre thickness (mm), residual (D), rounds of the solution."""

    surfacing: PowerMatrix
    front_d: float
    center_mm: float
    residual_d: float
    rounds: int


#: How the lab shapes lenses: ``shape(surfacings) -> {key: (front curve D, centre thickness mm)}`` for the
#: surfacing powers of all the lenses solved together (a pair: its fronts are chosen together).
Shaping = Callable[[dict[str, PowerMatrix]], dict[str, tuple[float, float]]]


class _Rounds:
    """One lens's solution so far: the front and thickness it is being solved on, the surfacing power made for
    them, the thicknesses tried with how far the lab's thickness was from each, and the lens the lab last made."""

    def __init__(self, lens: ExactLens, front_d: float, thickness_mm: float):
        self.lens = lens
        self.front_d, self.thickness_mm = float(front_d), float(thickness_mm)
        self.surfacing: PowerMatrix | None = None
        self.rounds, self.tried = 0, []
        self.made: ExactCompensation | None = None

    @property
    def done(self) -> bool:
        """The lens the lab makes for the surfacing power is worn as the wanted power."""
        return self.made is not None and self.made.residual_d < RESIDUAL_TOLERANCE_D

    def solve(self) -> None:
        """The surfacing power, exact in closed form, for the front and thickness being tried."""
        lens = self.lens
        self.surfacing = surfacing_for(lens.wanted, self.front_d, self.thickness_mm, lens.index, lens.theta,
                                       lens.tangential)
        self.rounds += 1

    def take(self, front_d: float, own_mm: float) -> None:
        """The lab's front and centre thickness for the surfacing power: the lens it makes, traced afresh with its
        toric back, and what to try next if that lens is not yet worn as wanted."""
        if self.done and (front_d, own_mm) == (self.made.front_d, self.made.center_mm):
            return  # the same lens as the one already traced
        if front_d != self.front_d:  # the lab would choose another front for this power: solve on that one
            self.front_d, self.thickness_mm, self.tried, self.made = float(front_d), own_mm, [], None
            return
        lens = self.lens
        worn = asworn_power(worn_lens(front_d, self.surfacing, own_mm, lens.index, lens.theta, lens.tangential))
        self.made = ExactCompensation(self.surfacing, self.front_d, own_mm,
                                      largest_meridional_error(_difference(lens.wanted, worn)), self.rounds)
        if self.done:
            return
        self.tried.append((self.thickness_mm, own_mm - self.thickness_mm))
        self.thickness_mm = own_mm
        if len(self.tried) > 1 and self.tried[-1][1] != self.tried[-2][1]:
            (t_a, g_a), (t_b, g_b) = self.tried[-2:]
            self.thickness_mm = t_b - g_b * (t_b - t_a) / (g_b - g_a)


def exact_compensation(lenses: dict[str, ExactLens], shape: Shaping,
                       start: dict[str, tuple[float, float]]) -> dict[str, ExactCompensation]:
    """The surfacing powers whose real-ray as-worn powers equal the wanted powers, solved together with the front
    curves and centre thicknesses the lab gives them.

    Parameters
    ----------
    lenses : dict of ExactLens
        The lenses solved together (a pair: its fronts are chosen together).
    shape : callable
        ``shape(surfacings) -> {key: (front_d, centre_mm)}``: the front curve
        and centre thickness the lab gives each lens for these surfacing
        powers (the lens geometry model); constants for lenses of fixed shape.
        It may raise (no lens can be made).
    start : dict of (float, float)
        Each lens's first front curve (D) and thickness (mm) tried: the lab's
        for an estimate of the surfacing powers (Martin's formula's).

    Returns
    -------
    dict of ExactCompensation
        Per lens: the surfacing power, the front curve and centre thickness
        the lab gives that power, the residual (the largest meridional error
        of ``wanted − as-worn`` for that lens, D) and how many surfacing
        powers were solved for it (its rounds).

    Raises
    ------
    LensNotMakeable
        The solved powers keep changing the front curves the lab chooses.
    NotSettled
        After the last round a lens is still :data:`SETTLED_D` or more from
        the wanted power.

    Notes
    -----
    On a given front at a given thickness t the surfacing power S(t) is
    exact in closed form (:func:`surfacing_for`), and the lab gives that
    power its own front and thickness T(S(t)): the solution is the thickness
    with ``T(S(t)) = t`` on the front the lab chooses for S(t). Each round
    makes S(t) for every lens not yet solved, asks the lab once for all
    the lenses' fronts and thicknesses, and traces each lens it makes afresh
    with its toric back (:func:`asworn_power`); a lens is solved when that
    lens, on the front it was solved for, is worn as the wanted power. The
    next thickness is the one just found, and from a lens's third round the
    secant method's root of ``T(S(t)) − t`` through its last two tries; a lens
    the lab would put on another front starts again on that front, from the
    thickness the lab gives it there. The thickness moves the as-worn power
    by thousandths of a dioptre per millimetre and S(t) moves T by far less
    than t itself, so one round suffices when the start is the lens's
    thickness (a minus lens at the lab's minimum centre).

    References
    ----------
    The optics as in :func:`pencil_vergence` (Kneisly 1964; Spencer & Murty
    1962); fixed-point iteration and the secant method as in any
    numerical-analysis text.
    """
    rounds = {key: _Rounds(lens, *start[key]) for key, lens in lenses.items()}
    for _ in range(_MAX_ROUNDS):
        for solution in rounds.values():
            if not solution.done:
                solution.solve()
        shaped = shape({key: solution.surfacing for key, solution in rounds.items()})
        for key, solution in rounds.items():
            solution.take(*shaped[key])
        if all(solution.done for solution in rounds.values()):
            break
    if any(solution.made is None for solution in rounds.values()):
        raise LensNotMakeable(f"the solved powers keep changing the front curves the lab would choose "
                              f"({_MAX_ROUNDS} rounds)")
    unsettled = {key: solution.made.residual_d for key, solution in rounds.items()
                 if solution.made.residual_d >= SETTLED_D}
    if unsettled:
        raise NotSettled(f"after {_MAX_ROUNDS} rounds the lens is still worn "
                         + ", ".join(f"{residual:.3f} D" for residual in unsettled.values())
                         + " from the wanted power (the lab's thickness does not settle for the solved power)")
    return {key: solution.made for key, solution in rounds.items()}


# --------------------------------------------------------------------------
# Off axis: the eye turning behind the lens
# --------------------------------------------------------------------------


class GazeErrors(NamedTuple):
    """A lens's off-axis errors at gaze angles (A) in the directions (D) of :data:`GAZE_DIRECTIONS`.

    ``mean_d`` the mean power error M, ``cylinder_d`` the astigmatic error
    2√(J₀² + J₄₅²), both as rows per angle of values per direction, in
    dioptres; NaN where the pencil does not get through the lens (beyond its
    edge, or totally reflected).
    """

    angles_deg: tuple[float, ...]
    directions: tuple[str, ...]
    mean_d: tuple[tuple[float, ...], ...]
    cylinder_d: tuple[tuple[float, ...], ...]


def gaze_errors(lens: WornLens, wanted, eye: str, rotation_distance_mm: float = ROTATION_DISTANCE_MM,
                angles_deg: Sequence[float] = GAZE_ANGLES_DEG) -> GazeErrors:
    """The mean power error and astigmatic error of a lens as the eye turns behind it.

    Parameters
    ----------
    lens : WornLens
    wanted : PowerMatrix or (xx, xy, yy)
        The wanted power on the vertex sphere, D — the prescription carried to
        the back-vertex distance.
    eye : {"right", "left"}
        Nasal is toward +x for the right eye, −x for the left.
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
    law (:func:`no_roll_axes`), and compared with the wanted power in that
    frame: ``E = V − F``, ``M = (E₁₁ + E₂₂)/2``, astigmatic error
    ``2√(J₀² + J₄₅²)`` with ``J₀ = (E₁₁ − E₂₂)/2``, ``J₄₅ = E₁₂``.

    References
    ----------
    Thibos, Wheeler & Horner (1997), Optom Vis Sci 74:367 (power vectors);
    Atchison (1992), Applied Optics 31:3579 (off-axis errors of spectacle
    lenses; the centre of rotation and Listing's law, from memory).
    """
    side = 1.0 if eye == "right" else -1.0
    means, cylinders = [], []
    for angle in angles_deg:
        sine, cosine = math.sin(math.radians(angle)), math.cos(math.radians(angle))
        mean_row, cylinder_row = [], []
        for x, y in GAZE_DIRECTIONS.values():
            # The chief ray toward the eye for a gaze (x, y) off the line of sight: (−sin β · direction, cos β).
            chief = (-sine * x * side, -sine * y, cosine)
            reference = point_at((0.0, 0.0, rotation_distance_mm), -rotation_distance_mm, chief)
            turned = no_roll_axes(chief)
            try:
                error = _difference(pencil_vergence(lens, reference, chief, (turned[0], turned[1])), wanted)
            except RayMissedSurface:
                mean_row.append(math.nan)
                cylinder_row.append(math.nan)
                continue
            mean_row.append(0.5 * (error.xx + error.yy))
            cylinder_row.append(2.0 * math.hypot(0.5 * (error.xx - error.yy), error.xy))
        means.append(tuple(mean_row))
        cylinders.append(tuple(cylinder_row))
    return GazeErrors(tuple(float(a) for a in angles_deg), tuple(GAZE_DIRECTIONS), tuple(means), tuple(cylinders))


def form_score(errors: GazeErrors) -> float:
    """How far a lens's form is from perfect: the RMS over all gaze points of the largest meridional error.

    Returns
    -------
    float
        ``√(mean (|M| + cyl/2)²)`` over the angles and directions, D;
        infinite for a lens that some pencil does not get through.

    References
    ----------
    Thibos, Wheeler & Horner (1997) for the largest meridional error; a
    least-squares merit over the field as in Atchison (1992), Applied Optics
    31:3579.
    """
    largest = [abs(m) + 0.5 * c for means, cylinders in zip(errors.mean_d, errors.cylinder_d)
               for m, c in zip(means, cylinders)]
    score = math.sqrt(sum(v * v for v in largest) / len(largest))
    return math.inf if math.isnan(score) else score


class BestForm(NamedTuple):
    """The chosen base (D), and per candidate base: its centre thickness, errors and score."""

    base_d: float
    bases_d: tuple[float, ...]
    center_mm: tuple[float, ...]
    errors: tuple[GazeErrors, ...]
    score_d: tuple[float, ...]


def _number(value: float) -> float | None:
    """A float for a record, None for NaN (a pencil that did not get through)."""
    return None if math.isnan(value) else float(value)


def off_axis_record(errors: GazeErrors) -> dict:
    """A lens's off-axis errors as plain numbers for a record: per direction, per angle, M and the cylinder error.

    Examples
    --------
    >>> zero = ((0.0,) * 4,) * 2
    >>> off_axis_record(GazeErrors((20.0, 30.0), tuple(GAZE_DIRECTIONS), zero, zero))["up"]
    {'mean_d': [0.0, 0.0], 'cylinder_d': [0.0, 0.0]}
    """
    record: dict = {"gaze_angles_deg": list(errors.angles_deg)}
    for column, name in enumerate(errors.directions):
        record[name] = {"mean_d": [_number(row[column]) for row in errors.mean_d],
                        "cylinder_d": [_number(row[column]) for row in errors.cylinder_d]}
    return record


def best_form(surfacing, index: float, theta: float, tangential: tuple[float, float], eye: str,
              bases_d: Sequence[float], thickness_of: Callable[[float], float],
              rotation_distance_mm: float = ROTATION_DISTANCE_MM) -> BestForm:
    """Among stocked bases, the front curve whose lens has the least off-axis error at :data:`GAZE_ANGLES_DEG`.

    Parameters
    ----------
    surfacing : PowerMatrix or (xx, xy, yy)
        The surfacing power, D.
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

    References
    ----------
    Atchison (1992), Applied Optics 31:3579 (best form by exact ray trace).
    """
    kept, centres, errors = [], [], []
    for base in sorted(bases_d):
        try:
            centre = float(thickness_of(base))
        except LensNotMakeable:
            continue
        lens = worn_lens(base, surfacing, centre, index, theta, tangential)
        kept.append(float(base))
        centres.append(centre)
        errors.append(gaze_errors(lens, asworn_power(lens), eye, rotation_distance_mm))
    if not kept:
        raise ValueError("no stocked base gives a lens that can be made")
    scores = tuple(form_score(e) for e in errors)
    return BestForm(kept[scores.index(min(scores))], tuple(kept), tuple(centres), tuple(errors), scores)
