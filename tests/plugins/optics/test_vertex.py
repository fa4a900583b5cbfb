"""Vertex distance: the scalar and matrix vergence transfer, against published values and real rays."""
from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from lenslane.plugins.optics.power import PowerMatrix, power_matrix, principal_powers, sphero_cylinder
from lenslane.plugins.optics.vertex import vertex_change_m, vertex_move, vertex_power
from tests.plugins.optics.lens_reference import paraxial_back_vertex_power, thick_lens
from tests.plugins.optics.raytrace_reference import singlet, vergence_matrix

# Source: DOMAIN.md vertex check values — spectacle lens at 12 mm → power at the cornea, from the vertex
# formula F / (1 − dF) as in the standard vertex-conversion tables (computed from the formula).
CHECK_VALUES_AT_12_MM = [(-10.0, -8.93), (+10.0, +11.36), (-5.0, -4.72), (+4.0, +4.20)]


@pytest.mark.parametrize("spectacle, cornea", CHECK_VALUES_AT_12_MM)
def test_vertex_power_check_values_at_12_mm(spectacle, cornea):
    # Source: DOMAIN.md check values from the vertex formula (standard vertex-conversion tables).
    assert round(vertex_power(spectacle, 0.012), 2) == cornea


@pytest.mark.parametrize("spectacle, cornea", CHECK_VALUES_AT_12_MM)
def test_vertex_move_check_values_at_12_mm(spectacle, cornea):
    # Source: DOMAIN.md check values (vertex formula, standard conversion tables); a sphere moves alike in
    # every meridian.
    moved = vertex_move(power_matrix(spectacle), refraction_vertex_mm=12.0, fitting_vertex_mm=0.0)
    assert round(moved.xx, 2) == cornea and round(moved.yy, 2) == cornea
    assert moved.xy == 0.0


def test_vertex_change_is_refraction_minus_fitting_in_metres():
    # Source: ORDER_FORMAT.md compensation model, d = (refraction vertex − fitting vertex) in metres.
    assert vertex_change_m(12.0, 13.5) == pytest.approx(-0.0015, abs=1e-15)
    assert vertex_change_m(14.0, 10.0) == pytest.approx(0.004, abs=1e-15)


def test_sphero_cylinder_moves_per_principal_meridian_and_keeps_its_axis():
    # Source: DOMAIN.md (after Jalie, The Principles of Ophthalmic Lenses): apply the vertex formula per
    # principal meridian, never to the cylinder value. −4.25 −1.25 × 170 refracted at 12 mm, worn at 13.5 mm:
    # meridians −4.25 and −5.50 each move by F / (1 − dF), d = −0.0015 m, to −4.277 and −5.546 (computed
    # from the formula: worn farther from the eye, a minus lens must be stronger).
    moved = vertex_move(power_matrix(-4.25, -1.25, 170), 12.0, 13.5)
    larger, smaller, direction = principal_powers(moved)
    assert larger == pytest.approx(-4.25 / (1 - 0.0015 * 4.25), abs=1e-12)
    assert smaller == pytest.approx(-5.50 / (1 - 0.0015 * 5.50), abs=1e-12)
    assert direction == pytest.approx(170.0, abs=1e-9)
    sphere, cylinder, axis = sphero_cylinder(moved)
    # The cylinder is not the cylinder moved as if it were a power of its own.
    assert cylinder != pytest.approx(vertex_power(-1.25, -0.0015), abs=1e-4)


def test_singular_vertex_move_is_refused():
    # Source: the vertex formula F / (1 − dF) has no value where dF = 1 (the far point at the new position).
    with pytest.raises(ValueError):
        vertex_power(50.0, 0.02)
    with pytest.raises(ValueError):
        vertex_move(power_matrix(10.0, 40.0, 90), 25.0, 5.0)  # a 50 D meridian moved 20 mm


# --------------------------------------------------------------------------
# Properties
# --------------------------------------------------------------------------

spheres = st.floats(-20.0, 20.0, allow_nan=False)
cylinders = st.floats(-6.0, 6.0, allow_nan=False)
axes = st.floats(0.0, 180.0, allow_nan=False)
vertex_mm = st.floats(5.0, 25.0, allow_nan=False)


@settings(max_examples=300, deadline=None)
@given(spheres, cylinders, axes, vertex_mm, vertex_mm)
def test_vertex_there_and_back_is_identity(sphere, cylinder, axis, refraction, fitting):
    # Source: vergence transfer (Jalie): moving a lens by d and back by −d restores its power.
    lens = power_matrix(sphere, cylinder, axis)
    back = vertex_move(vertex_move(lens, refraction, fitting), fitting, refraction)
    assert max(abs(a - b) for a, b in zip(back, lens)) < 1e-9


@settings(max_examples=200, deadline=None)
@given(spheres, cylinders, axes, vertex_mm, vertex_mm)
def test_matrix_form_equals_the_numpy_product(sphere, cylinder, axis, refraction, fitting):
    # Source: ORDER_FORMAT.md model F_w = F (I − dF)⁻¹, evaluated here with numpy's general inverse.
    lens = power_matrix(sphere, cylinder, axis)
    f = np.array([[lens.xx, lens.xy], [lens.xy, lens.yy]])
    d = (refraction - fitting) / 1000.0
    expected = f @ np.linalg.inv(np.eye(2) - d * f)
    moved = vertex_move(lens, refraction, fitting)
    assert np.allclose([[moved.xx, moved.xy], [moved.xy, moved.yy]], expected, atol=1e-10, rtol=0)


# --------------------------------------------------------------------------
# Independent check with real and paraxial rays (rayoptics)
# --------------------------------------------------------------------------


def test_back_vertex_power_of_a_thick_lens_from_rayoptics():
    # Source: rayoptics 0.9.8 paraxial back focal length of the DOMAIN.md example lens — F₁ +10, F₂ −4,
    # t 6 mm, n 1.5 — against the thick-lens formula Fv = F₁/(1 − (t/n)F₁) + F₂ = +6.417 (computed from
    # the formula). Radii from F = (n − 1)/r: r₁ = 50 mm, r₂ = 125 mm.
    opm = thick_lens(50.0, 125.0, 6.0, 1.5)
    assert paraxial_back_vertex_power(opm) == pytest.approx(10.0 / (1 - 0.006 / 1.5 * 10.0) - 4.0, abs=1e-9)
    assert round(paraxial_back_vertex_power(opm), 3) == 6.417
    # The real-ray vergence at the back vertex agrees with the paraxial value.
    real = vergence_matrix(singlet(50.0, 125.0, 6.0, 1.5, object_distance_mm=10.0))
    assert real == pytest.approx(np.eye(2) * 6.41667, abs=1e-4)


def test_vertex_move_matches_the_vergence_traced_12_mm_behind_a_thick_lens():
    # Source: rayoptics 0.9.8 real-ray trace; the vergence 12 mm behind the back vertex is the power a lens
    # needs at the cornea to act as this one does at 12 mm (vergence transfer, Jalie).
    opm = singlet(50.0, 125.0, 6.0, 1.5, object_distance_mm=10.0)
    at_lens, behind = vergence_matrix(opm), vergence_matrix(opm, behind_mm=12.0)
    moved = vertex_move(PowerMatrix(at_lens[0, 0], 0.0, at_lens[1, 1]), 12.0, 0.0)
    assert [moved.xx, moved.yy] == pytest.approx([behind[0, 0], behind[1, 1]], abs=1e-6)


@pytest.mark.parametrize("axis", [30.0, 75.0, 150.0])
def test_vertex_move_of_an_oblique_toric_matches_real_rays(axis):
    # Source: rayoptics 0.9.8 real-ray trace of a thick toric lens (YToroid front turned to an oblique axis):
    # the vergence matrix 12 mm behind the back surface equals F (I − dF)⁻¹ of the one at the back surface
    # (matrix vergence transfer, Harris power-matrix papers).
    opm = singlet(80.0, 125.0, 4.0, 1.5, front_cross_radius_mm=60.0, toric_rotation_deg=axis,
                  object_distance_mm=10.0)
    at_lens, behind = vergence_matrix(opm), vergence_matrix(opm, behind_mm=12.0)
    lens = PowerMatrix(at_lens[0, 0], (at_lens[0, 1] + at_lens[1, 0]) / 2.0, at_lens[1, 1])
    assert abs(sphero_cylinder(lens).cylinder) > 2.0  # a real cylinder, at an oblique axis
    moved = vertex_move(lens, 12.0, 0.0)
    assert [moved.xx, moved.xy, moved.yy] == pytest.approx([behind[0, 0], behind[0, 1], behind[1, 1]], abs=1e-6)
