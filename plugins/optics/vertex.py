"""Vertex distance: the power a lens needs when it sits at another distance from the eye.

A lens refracted at one vertex distance and worn at another must change power
so that its image (far point) stays where it was: the vergence transfer
``F' = F / (1 − d F)``, in matrix form ``F' = F (I − d F)⁻¹``.

References
----------
.. [1] The vergence (step-along) treatment of vertex distance in any ophthalmic
   optics text, e.g. Jalie, *The Principles of Ophthalmic Lenses*.
.. [2] Harris, W. F., power-matrix papers (Optometry and Vision Science): the
   matrix form of vergence transfer, valid for any sphero-cylinder.
"""
from __future__ import annotations

from lenslane.plugins.optics.power import PowerMatrix

#: Below this |1 − dF| (or |det(I − dF)|) the moved lens would need an infinite power.
SINGULAR_LIMIT = 1e-12


def vertex_change_m(refraction_vertex_mm: float, fitting_vertex_mm: float) -> float:
    """The distance the lens moves toward the eye, in metres.

    Parameters
    ----------
    refraction_vertex_mm : float
        Vertex distance at which the prescription was refracted (mm).
    fitting_vertex_mm : float
        Vertex distance of the fitted frame (mm).

    Returns
    -------
    float
        ``d = (refraction − fitting) / 1000`` m: positive when the fitted lens sits
        closer to the eye than the refracting lens did.

    Examples
    --------
    >>> vertex_change_m(12.0, 13.5)
    -0.0015
    """
    return (refraction_vertex_mm - fitting_vertex_mm) / 1000.0


def vertex_power(power: float, d_m: float) -> float:
    """The power of one meridian moved ``d_m`` metres toward the eye.

    Parameters
    ----------
    power : float
        Power of the lens (or of one principal meridian) at its first position, D.
    d_m : float
        Distance moved toward the eye, m (negative: away from the eye).

    Returns
    -------
    float
        ``F / (1 − d F)`` in dioptres.

    Raises
    ------
    ValueError
        When ``1 − d F`` is zero: the far point lies at the new position.

    Notes
    -----
    Exact in paraxial optics for a thin lens and for the back-vertex power of a
    thick one. Apply it per principal meridian, never to a cylinder value.

    References
    ----------
    Vergence transfer; e.g. Jalie, *The Principles of Ophthalmic Lenses*.

    Examples
    --------
    A −10.00 D lens refracted at 12 mm, taken to the cornea:

    >>> round(vertex_power(-10.0, 0.012), 2)
    -8.93
    """
    denominator = 1.0 - d_m * power
    if abs(denominator) < SINGULAR_LIMIT:
        raise ValueError(f"a {power:+.2f} D lens moved {d_m * 1000:.1f} mm has its far point at the new position")
    return power / denominator


def vertex_move(matrix: PowerMatrix, refraction_vertex_mm: float, fitting_vertex_mm: float) -> PowerMatrix:
    """The power matrix a lens needs at the fitting vertex distance.

    Parameters
    ----------
    matrix : PowerMatrix
        The prescription's power matrix at the refraction vertex distance, D.
    refraction_vertex_mm : float
        Vertex distance of the refraction, mm.
    fitting_vertex_mm : float
        Vertex distance of the fitted frame, mm.

    Returns
    -------
    PowerMatrix
        ``F_w = F (I − d F)⁻¹`` with ``d = (refraction − fitting) / 1000`` m.

    Raises
    ------
    ValueError
        When ``I − d F`` is singular (a principal meridian has its far point at
        the fitting position).

    Notes
    -----
    For a symmetric 2×2 ``F`` the product has the closed form
    ``F_w = (F − d det(F) I) / det(I − d F)``, which is what is computed, in
    plain floats. ``F`` and ``(I − d F)⁻¹`` commute, so the result is symmetric,
    the principal meridians keep their directions and each moves by
    :func:`vertex_power`. The matrix form needs no choice of meridian and
    holds for oblique cylinders alike.

    References
    ----------
    Vergence transfer, e.g. Jalie, *The Principles of Ophthalmic Lenses*;
    matrix form: Harris, power-matrix papers, Optometry and Vision Science.

    Examples
    --------
    >>> from lenslane.plugins.optics.power import power_matrix, sphero_cylinder
    >>> moved = vertex_move(power_matrix(-10.0), 12.0, 0.0)
    >>> round(moved.xx, 2), round(moved.yy, 2)
    (-8.93, -8.93)
    """
    d = vertex_change_m(refraction_vertex_mm, fitting_vertex_mm)
    xx, xy, yy = matrix
    determinant = (1.0 - d * xx) * (1.0 - d * yy) - d * d * xy * xy
    if abs(determinant) < SINGULAR_LIMIT:
        raise ValueError(
            f"I − dF is singular for d = {d * 1000:.1f} mm: a principal meridian has its far point "
            "at the fitting position"
        )
    shift = d * (xx * yy - xy * xy)
    return PowerMatrix((xx - shift) / determinant, xy / determinant + 0.0, (yy - shift) / determinant)
