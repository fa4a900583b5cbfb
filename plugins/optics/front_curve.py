"""The front (base) curve: Vogel's rule, Tscherning's best form, the nearest stocked base.

Two published methods compete, so they sit in a small registry
(:data:`FRONT_CURVE_METHODS`) and :func:`front_curve` chooses by name, refusing
a name it does not know. Every curve is a true surface power at the lens index.

References
----------
.. [1] Vogel's rule, as given in Brooks, C. W. & Borish, I. M. *System for
   Ophthalmic Dispensing* (Butterworth-Heinemann).
.. [2] Tscherning's ellipse: the third-order point-focal (best form) solution,
   as derived in Jalie, M. *The Principles of Ophthalmic Lenses*, and reviewed
   in Atchison, D. A. (1992), "Spectacle lens design: a review", Applied
   Optics 31(19): 3579–3585.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Callable, NamedTuple, Sequence

#: Distance from the back of the lens to the eye's centre of rotation, mm (about 27 mm; common practice).
ROTATION_DISTANCE_MM = 27.0


class NoBestForm(ValueError):
    """No spherical front curve is free of oblique astigmatism for this power (Tscherning's ellipse has no real root)."""


def vogel_front_curve(sphere: float, cylinder: float = 0.0) -> float:
    """Vogel's rule: the front curve for a lens, from its spherical equivalent.

    Parameters
    ----------
    sphere, cylinder : float
        The lens power, dioptres, either cylinder form.

    Returns
    -------
    float
        ``SE + 6.00`` for plus lenses, ``SE/2 + 6.00`` for minus lenses (D),
        SE = sphere + cylinder/2.

    Notes
    -----
    A rule of thumb for the usual range (about −10 to +8 D); it can give a
    curve below plano for very high minus powers, which the stocked bases then
    bound.

    References
    ----------
    Vogel's rule, as given in Brooks & Borish, *System for Ophthalmic
    Dispensing*.

    Examples
    --------
    >>> vogel_front_curve(4.0), vogel_front_curve(-4.0), vogel_front_curve(-2.0, -1.0)
    (10.0, 4.0, 4.75)
    """
    equivalent = sphere + cylinder / 2.0
    if equivalent >= 0.0:
        return equivalent + 6.0
    return equivalent / 2.0 + 6.0


def _tscherning_coefficients(power_d: float, index: float, rotation_distance_mm: float,
                             object_vergence_d: float) -> tuple[float, float, float]:
    n, f, big_l = index, power_d, object_vergence_d
    w = 1000.0 / rotation_distance_mm
    a = n + 2.0
    b = -((n + 2.0) * f + 2.0 * (n * n - 1.0) * (w + big_l))
    c = (n * f * f - (n - 2.0) * (n * n - 1.0) * f * big_l + 2.0 * n * (n - 1.0) * f * w
         + 2.0 * (n - 1.0) ** 2 * (n + 1.0) * big_l * w + n * (n - 1.0) ** 2 * w * w)
    return a, b, c


def tscherning_front_curves(power_d: float, index: float, rotation_distance_mm: float = ROTATION_DISTANCE_MM,
                            object_vergence_d: float = 0.0) -> tuple[float, float]:
    """Both front curves that make a thin spherical lens free of oblique astigmatism.

    Parameters
    ----------
    power_d : float
        Lens power F, dioptres.
    index : float
        Refractive index n.
    rotation_distance_mm : float
        z, lens to the eye's centre of rotation, mm; w = 1/z.
    object_vergence_d : float
        L, the object vergence (0 for distance, about −2.5 D for reading).

    Returns
    -------
    (float, float)
        The flatter (Ostwalt) and the steeper (Wollaston) front curve, D: the
        roots of ``(n+2)F₁² − [(n+2)F + 2(n²−1)(w+L)]F₁ + nF² − (n−2)(n²−1)FL
        + 2n(n−1)Fw + 2(n−1)²(n+1)Lw + n(n−1)²w² = 0``.

    Raises
    ------
    NoBestForm
        The equation has no real root: above about +7.2 D (n 1.523, z 27 mm,
        distance) no spherical form is point-focal.

    Notes
    -----
    Third-order (Seidel) theory for thin lenses; exact ray traces give
    somewhat flatter forms, and labs use flatter curves still for looks.

    References
    ----------
    Tscherning's ellipse: Jalie, *The Principles of Ophthalmic Lenses*;
    Atchison (1992), Applied Optics 31:3579.

    Examples
    --------
    >>> [round(c, 2) for c in tscherning_front_curves(0.0, 1.523)]
    [8.37, 19.37]
    """
    a, b, c = _tscherning_coefficients(power_d, index, rotation_distance_mm, object_vergence_d)
    discriminant = b * b - 4.0 * a * c
    if discriminant < 0.0:
        limit = tscherning_limit_d(index, rotation_distance_mm, object_vergence_d)
        raise NoBestForm(
            f"no spherical front curve is free of oblique astigmatism for {power_d:+.2f} D at n {index:.3f} "
            f"(Tscherning's ellipse has real roots only up to {limit:+.2f} D)"
        )
    root = math.sqrt(discriminant)
    return (-b - root) / (2.0 * a), (-b + root) / (2.0 * a)


def tscherning_limit_d(index: float, rotation_distance_mm: float = ROTATION_DISTANCE_MM,
                       object_vergence_d: float = 0.0) -> float:
    """The highest lens power for which Tscherning's equation has a real root (the ellipse's rightmost point).

    Parameters
    ----------
    index, rotation_distance_mm, object_vergence_d : float
        As in :func:`tscherning_front_curves`.

    Returns
    -------
    float
        Dioptres: where the discriminant, a quadratic in F opening downward,
        has its larger zero.

    References
    ----------
    Tscherning's ellipse: Jalie, *The Principles of Ophthalmic Lenses*.

    Examples
    --------
    >>> round(tscherning_limit_d(1.523), 1)
    7.2
    """
    def discriminant(power_d: float) -> float:
        a, b, c = _tscherning_coefficients(power_d, index, rotation_distance_mm, object_vergence_d)
        return b * b - 4.0 * a * c

    # The discriminant is exactly quadratic in F: recover its coefficients from three values.
    d_minus, d_zero, d_plus = discriminant(-1.0), discriminant(0.0), discriminant(1.0)
    qa = (d_plus + d_minus) / 2.0 - d_zero
    qb = (d_plus - d_minus) / 2.0
    qc = d_zero
    root = math.sqrt(qb * qb - 4.0 * qa * qc)
    return max((-qb - root) / (2.0 * qa), (-qb + root) / (2.0 * qa))


def tscherning_front_curve(sphere: float, cylinder: float = 0.0, index: float = 1.523,
                           rotation_distance_mm: float = ROTATION_DISTANCE_MM) -> float:
    """The flatter (Ostwalt) best-form front curve for the lens's spherical equivalent, for distance.

    Parameters
    ----------
    sphere, cylinder : float
        The lens power, dioptres; the form is solved for SE = sphere + cylinder/2.
    index : float
        Refractive index.
    rotation_distance_mm : float
        Lens to the eye's centre of rotation, mm.

    Returns
    -------
    float
        Dioptres.

    Raises
    ------
    NoBestForm
        Above about +7.2 D (see :func:`tscherning_front_curves`).

    References
    ----------
    Tscherning's ellipse: Jalie, *The Principles of Ophthalmic Lenses*.

    Examples
    --------
    >>> round(tscherning_front_curve(-5.0, 0.0, 1.523), 2)
    5.04
    """
    return tscherning_front_curves(sphere + cylinder / 2.0, index, rotation_distance_mm)[0]


class FrontCurveRequest(NamedTuple):
    """What a front-curve method may use: the lens power, the index and where the lens sits before the eye.

    sphere, cylinder, axis : the surfacing power (D, degrees); index : refractive
    index; rotation_distance_mm : lens to the eye's centre of rotation (mm);
    eye : ``"right"``, ``"left"`` or None; vertex_mm, pantoscopic_deg,
    face_form_deg : the fit, when the order gives it (None otherwise).
    """

    sphere: float
    cylinder: float = 0.0
    axis: float = 180.0
    index: float = 1.523
    rotation_distance_mm: float = ROTATION_DISTANCE_MM
    eye: str | None = None
    vertex_mm: float | None = None
    pantoscopic_deg: float | None = None
    face_form_deg: float | None = None


@dataclass(frozen=True)
class FrontCurveMethod:
    """A registered way of choosing the front curve: its function, its title and its published source.

    ``function(request: FrontCurveRequest) -> float`` returns the wanted front
    curve (true power at the lens index, D) before it is snapped to the stock,
    or raises :class:`NoBestForm` when the method has no answer for the power.
    """

    name: str
    function: Callable[[FrontCurveRequest], float]
    title: str
    source: str


FRONT_CURVE_METHODS: dict[str, FrontCurveMethod] = {}


def register_front_curve_method(method: FrontCurveMethod) -> FrontCurveMethod:
    """Add a method to :data:`FRONT_CURVE_METHODS`, so ``[stages.geometry] front_curve_method`` may name it.

    A module that defines a method registers it when it is imported; the lab's
    config is validated against the registry at start, after the plugins are
    loaded. A name registered twice is refused.

    Examples
    --------
    >>> {"vogel", "tscherning"} <= set(FRONT_CURVE_METHODS)
    True
    """
    if method.name in FRONT_CURVE_METHODS:
        raise ValueError(f"front-curve method {method.name!r} is registered already")
    FRONT_CURVE_METHODS[method.name] = method
    return method


register_front_curve_method(FrontCurveMethod(
    "vogel", lambda request: vogel_front_curve(request.sphere, request.cylinder),
    "Vogel's rule (SE + 6 D for plus, SE/2 + 6 D for minus)",
    "Vogel's rule, as given in Brooks & Borish, System for Ophthalmic Dispensing",
))
register_front_curve_method(FrontCurveMethod(
    "tscherning",
    lambda request: tscherning_front_curve(request.sphere, request.cylinder, request.index,
                                           request.rotation_distance_mm),
    "best form by third-order theory (Tscherning's ellipse, flatter root, distance)",
    "Tscherning's ellipse: Jalie, The Principles of Ophthalmic Lenses; Atchison (1992), Applied Optics 31:3579",
))


def front_curve_method(name: str) -> FrontCurveMethod:
    """The registered method of that name; a ``ValueError`` naming the known ones otherwise.

    Examples
    --------
    >>> front_curve_method("vogel").name
    'vogel'
    """
    try:
        return FRONT_CURVE_METHODS[name]
    except KeyError:
        known = ", ".join(sorted(FRONT_CURVE_METHODS))
        raise ValueError(f"unknown front-curve method {name!r} (known: {known})") from None


def front_curve(method: str, sphere: float | FrontCurveRequest, cylinder: float = 0.0, index: float = 1.523,
                rotation_distance_mm: float = ROTATION_DISTANCE_MM) -> float:
    """The front curve (D) by the named method (the dispatcher over :data:`FRONT_CURVE_METHODS`).

    Parameters
    ----------
    method : str
        A key of :data:`FRONT_CURVE_METHODS`.
    sphere : float or FrontCurveRequest
        The lens's sphere (D), or the whole request (the other arguments are then ignored).
    cylinder : float
        Dioptres.
    index : float
        Refractive index (used by best-form methods).
    rotation_distance_mm : float
        Lens to the eye's centre of rotation, mm (best-form methods).

    Returns
    -------
    float
        The unsnapped front curve, true power at the lens index, D.

    Raises
    ------
    ValueError
        Unknown method name; :class:`NoBestForm` when the best form has no solution.

    References
    ----------
    See :data:`FRONT_CURVE_METHODS` (each method names its source).

    Examples
    --------
    >>> front_curve("vogel", -4.0)
    4.0
    """
    request = sphere if isinstance(sphere, FrontCurveRequest) else FrontCurveRequest(
        sphere, cylinder, index=index, rotation_distance_mm=rotation_distance_mm)
    return front_curve_method(method).function(request)


def stocked_at_least(curve_d: float, stocked_d: Sequence[float]) -> list[float]:
    """The stocked bases no flatter than a curve, flattest first (where a technician looks for a steeper base).

    Examples
    --------
    >>> stocked_at_least(6.5, [4.0, 6.0, 7.0, 8.0])
    [7.0, 8.0]
    """
    return sorted(base for base in stocked_d if base >= curve_d - 1e-9)


def nearest_stocked_base(curve_d: float, stocked_d: Sequence[float]) -> float:
    """The stocked base curve nearest to a wanted curve; on a tie, the flatter one.

    Parameters
    ----------
    curve_d : float
        The wanted front curve, D.
    stocked_d : sequence of float
        The lab's stocked base curves for the material, D (true powers).

    Returns
    -------
    float
        One of ``stocked_d``.

    Notes
    -----
    A flatter base on a tie keeps the lens thinner and flatter (common practice).

    Examples
    --------
    >>> nearest_stocked_base(4.75, [2.0, 4.0, 6.0]), nearest_stocked_base(5.0, [4.0, 6.0])
    (4.0, 4.0)
    """
    if not stocked_d:
        raise ValueError("no stocked base curves for this material")
    ordered = sorted(stocked_d)
    nearest, gap = ordered[0], abs(ordered[0] - curve_d)
    for base in ordered:  # the first of equally near bases (the flatter) is kept
        if abs(base - curve_d) < gap:
            nearest, gap = base, abs(base - curve_d)
    return nearest
