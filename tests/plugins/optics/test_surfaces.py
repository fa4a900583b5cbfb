"""Surface power and radius, exact sag, thick-lens back vertex power, the toric back."""
from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from rayoptics.elem.profiles import Spherical, YToroid

from lenslane.plugins.optics.power import power_matrix
from lenslane.plugins.optics.surfaces import (
    approximate_sag_mm, back_surface_power, back_surface_power_slope, back_vertex_power, sag_from_squared_mm, sag_mm,
    sag_slope_per_curvature, surface_curvature_per_mm, surface_power_d,
    surface_radius_mm, toric_back_surface,
)
from tests.plugins.optics.lens_reference import paraxial_back_vertex_power, thick_lens


def test_sag_published_example_exact_and_approximate():
    # Source: DOMAIN.md sag example, F +6, n 1.5, y 25 mm → 3.838 mm exact, 3.750 mm approximate
    # (computed from the formulas s = r − √(r² − y²) and s ≈ y²F/(2000(n − 1)), as in the sagitta article
    # of any optics reference).
    curvature = surface_curvature_per_mm(6.0, 1.5)
    assert sag_mm(curvature, 25.0) == pytest.approx(3.838, abs=5e-4)
    assert approximate_sag_mm(6.0, 1.5, 25.0) == pytest.approx(3.750, abs=5e-4)


def test_surface_power_and_radius_follow_the_lensmakers_surface_formula():
    # Source: F = (n − 1)/r for a front surface, F = (1 − n)/r for a back (Jalie, The Principles of
    # Ophthalmic Lenses); expected radii computed from the formula.
    assert surface_radius_mm(6.0, 1.5) == pytest.approx(500.0 / 6.0)
    assert surface_radius_mm(-4.0, 1.586, "back") == pytest.approx(586.0 / 4.0)
    assert surface_radius_mm(0.0, 1.5) == math.inf
    assert surface_power_d(500.0 / 6.0, 1.5) == pytest.approx(6.0)
    assert surface_power_d(math.inf, 1.5, "back") == 0.0
    with pytest.raises(ValueError):
        surface_radius_mm(6.0, 1.5, "side")


@pytest.mark.parametrize("radius_mm, y_mm", [(83.333, 25.0), (50.0, 30.0), (250.0, 35.0), (-120.0, 20.0)])
def test_exact_sag_matches_rayoptics_spherical_profile(radius_mm, y_mm):
    # Source: rayoptics 0.9.8, Spherical profile sag (an independent optics library, test-only).
    reference = Spherical(c=1.0 / radius_mm).sag(0.0, y_mm)
    assert sag_mm(1.0 / radius_mm, y_mm) == pytest.approx(reference, abs=1e-9)


def test_sag_is_zero_for_plano_and_nan_beyond_the_sphere():
    # Source: definition of the sag; a sphere of radius r does not reach beyond y = r.
    assert sag_mm(0.0, 30.0) == 0.0
    assert math.isnan(sag_mm(1.0 / 20.0, 25.0))
    # Arrays in, arrays out.
    assert sag_mm(np.array([0.0, 0.01]), np.array([10.0, 10.0])).shape == (2,)


def test_back_vertex_power_published_example():
    # Source: DOMAIN.md back vertex example, F1 +10, F2 −4, t 6 mm, n 1.5 → +6.417 D (computed from
    # Fv = F1/(1 − (t/n)F1) + F2, the thick-lens formula in Jalie).
    assert back_vertex_power(10.0, -4.0, 6.0, 1.5) == pytest.approx(6.417, abs=5e-4)
    assert back_surface_power(10.0, 6.4166667, 6.0, 1.5) == pytest.approx(-4.0, abs=1e-6)


@pytest.mark.parametrize("front_d, back_d, thickness_mm, index", [
    (10.0, -4.0, 6.0, 1.5), (4.0, -9.0, 1.5, 1.586), (8.0, -2.0, 4.5, 1.74), (2.0, -12.0, 1.0, 1.6),
])
def test_back_vertex_power_matches_rayoptics_paraxial_trace(front_d, back_d, thickness_mm, index):
    # Source: rayoptics 0.9.8 paraxial first-order data (bfl) of the same thick singlet (test-only library).
    front_r = surface_radius_mm(front_d, index, "front")
    back_r = surface_radius_mm(back_d, index, "back")
    reference = paraxial_back_vertex_power(thick_lens(front_r, back_r, thickness_mm, index))
    assert back_vertex_power(front_d, back_d, thickness_mm, index) == pytest.approx(reference, abs=1e-6)


def test_toric_back_gives_each_principal_power_in_rayoptics():
    # Source: rayoptics 0.9.8 paraxial trace, one singlet per principal meridian of the toric back
    # (the front is spherical, so each meridian is an ordinary thick lens).
    front_d, thickness_mm, index = 5.0, 2.2, 1.6
    back = toric_back_surface(front_d, power_matrix(-3.25, -1.50, 30), thickness_mm, index)
    front_r = surface_radius_mm(front_d, index)
    for back_power, wanted in ((back.power_a_d, -3.25), (back.power_b_d, -4.75)):
        opm = thick_lens(front_r, surface_radius_mm(back_power, index, "back"), thickness_mm, index)
        assert paraxial_back_vertex_power(opm) == pytest.approx(wanted, abs=1e-6)
    assert back.meridian_a_deg == pytest.approx(30.0)


def test_toric_back_sag_in_its_principal_meridians_matches_a_rayoptics_toroid():
    # Source: rayoptics 0.9.8 YToroid sag: in a principal section a toroid is the circle of that section.
    ry, rx = 80.0, 60.0
    toroid = YToroid(r=ry, rR=rx)
    assert sag_mm(1.0 / ry, 25.0) == pytest.approx(toroid.sag(0.0, 25.0), abs=1e-9)
    assert sag_mm(1.0 / rx, 25.0) == pytest.approx(toroid.sag(25.0, 0.0), abs=1e-9)


@given(st.floats(-2.0, 14.0), st.floats(-25.0, 25.0), st.floats(0.5, 12.0), st.floats(1.45, 1.9))
def test_back_surface_power_inverts_back_vertex_power(front_d, back_vertex_d, thickness_mm, index):
    # Source: algebraic inverse of the thick-lens formula (Jalie).
    back_d = back_surface_power(front_d, back_vertex_d, thickness_mm, index)
    assert back_vertex_power(front_d, back_d, thickness_mm, index) == pytest.approx(back_vertex_d, abs=1e-9)


# --------------------------------------------------------------------------
# The forms the thickness solver calls: sag from ρ², and the two slopes of its Newton step
# --------------------------------------------------------------------------


@pytest.mark.parametrize("reached", [False, True])
@pytest.mark.parametrize("power_d, y_mm", [(6.0, 25.0), (-8.0, 30.0), (0.0, 20.0), (12.0, 10.0)])
def test_sag_from_the_squared_distance_is_the_sagitta_formula(power_d, y_mm, reached):
    # Source: the sagitta formula s = r − √(r² − y²) (Jalie), written out here with the radius; for points and
    # arrays, with numpy's error state set (the default) or left alone (reached=True: every point within reach).
    curvature = surface_curvature_per_mm(power_d, 1.5)
    radius = math.inf if curvature == 0 else 1.0 / curvature
    reference = 0.0 if math.isinf(radius) else radius - math.copysign(math.sqrt(radius ** 2 - y_mm ** 2), radius)
    assert float(sag_from_squared_mm(curvature, y_mm * y_mm, reached)) == pytest.approx(reference, abs=1e-9)
    [array] = sag_from_squared_mm(curvature, np.array([y_mm * y_mm]), reached)
    assert array == pytest.approx(reference, abs=1e-9)


@given(st.floats(-0.06, 0.06), st.floats(0.0, 1600.0))
def test_the_sag_of_plain_numbers_is_the_sag_of_arrays_to_the_bit(curvature, rho2):
    # Source: IEEE 754 square root and arithmetic are correctly rounded, so numbers and arrays give the same bits;
    # a sphere does not reach beyond c²ρ² = 1 (NaN, as for arrays).
    scalar = sag_from_squared_mm(curvature, rho2)
    [array] = sag_from_squared_mm(curvature, np.array([rho2]))
    assert (math.isnan(scalar) and math.isnan(array)) or scalar == array
    reach = curvature * curvature * rho2
    if abs(reach - 1.0) > 1e-9:  # away from the rim, where rounding decides
        assert math.isnan(scalar) == (reach > 1.0)


@pytest.mark.parametrize("curvature, rho2", [(0.012, 625.0), (-0.02, 400.0), (0.0, 900.0), (0.03, 1000.0)])
def test_the_sag_slope_is_the_derivative_of_the_sag(curvature, rho2):
    # Source: a central difference of the sagitta formula (independent of the closed form), step 1e-7 /mm.
    h = 1e-7
    numeric = (float(sag_from_squared_mm(curvature + h, rho2)) - float(sag_from_squared_mm(curvature - h, rho2))) / (2 * h)
    assert sag_slope_per_curvature(curvature, rho2) == pytest.approx(numeric, rel=1e-6)


@pytest.mark.parametrize("front_d, thickness_mm, index", [(10.0, 6.0, 1.5), (4.0, 2.0, 1.6), (1.0, 12.0, 1.74)])
def test_the_back_surface_slope_is_the_derivative_of_the_back_surface_power(front_d, thickness_mm, index):
    # Source: a central difference of F₂ = Fv − F₁/(1 − (t/n)F₁) (Jalie), step 1e-5 mm.
    h = 1e-5
    numeric = (back_surface_power(front_d, 3.0, thickness_mm + h, index)
               - back_surface_power(front_d, 3.0, thickness_mm - h, index)) / (2 * h)
    assert back_surface_power_slope(front_d, thickness_mm, index) == pytest.approx(numeric, rel=1e-6)


@pytest.mark.parametrize("front_d, back_d, thickness_mm, index", [(10.0, -4.0, 6.0, 1.5), (8.0, -0.5, 9.0, 1.6)])
def test_the_front_for_a_back_inverts_the_back_vertex_power(front_d, back_d, thickness_mm, index):
    # Source: DOMAIN.md worked example F₁ +10, F₂ −4, t 6 mm, n 1.5 → Fv +6.417, and Fv = F₁/(1 − (t/n)F₁) + F₂
    # (Jalie) solved back for F₁.
    from lenslane.plugins.optics.surfaces import front_surface_power
    vertex_power = back_vertex_power(front_d, back_d, thickness_mm, index)
    assert front_surface_power(vertex_power, back_d, thickness_mm, index) == pytest.approx(front_d, abs=1e-9)
