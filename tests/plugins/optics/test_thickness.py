"""Thickness at any point, the solved centre thickness, the prism wedge and the weight."""
from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st
from rayoptics.elem.profiles import Spherical

from lenslane.plugins.optics.front_curve import vogel_front_curve
from lenslane.plugins.optics.outline import modelled_outline, outline_points
from lenslane.plugins.optics.power import power_matrix, principal_powers
from lenslane.plugins.optics.thickness import (
    LensNotMakeable, LensShape, back_power_in_direction, centre_minimum_applies, edged_lens, lens_volume_mm3,
    lens_weight_g, outline_grid, place_lens, solve_center_thickness, thickness_mm, wedge_mm,
)
from lenslane.plugins.optics.surfaces import ToricBack


def ring(radius_mm, count=180, centre=(0.0, 0.0)):
    angles = np.arange(count) * 2.0 * math.pi / count
    return np.column_stack((radius_mm * np.cos(angles) - centre[0], radius_mm * np.sin(angles) - centre[1]))


def reference_thickness(x, y, front_d, sphere, cylinder, axis, index, center_mm, prism=0.0, base_deg=0.0):
    """Thickness from the published formulas alone, with rayoptics' spherical sag (independent of the engine).

    Back vertex power per principal meridian Fv = F1/(1 − (t/n)F1) + F2 (Jalie), the back's power in the
    point's direction by Euler's theorem F(φ) = Fa cos²(φ − α) + Fb sin²(φ − α), radius r = (1 − n)/F,
    prism wedge P/(100(n − 1)) per mm along the base.
    """
    rho, phi = math.hypot(x, y), math.atan2(y, x)
    vergence = front_d / (1.0 - center_mm / 1000.0 / index * front_d)
    back_axis = sphere - vergence            # the axis meridian of a minus-form prescription carries the sphere
    back_across = sphere + cylinder - vergence
    alpha = math.radians(axis)
    back_d = back_axis * math.cos(phi - alpha) ** 2 + back_across * math.sin(phi - alpha) ** 2

    def sag(power, side_sign):
        if power == 0.0:
            return 0.0
        radius = 1000.0 * side_sign * (index - 1.0) / power
        return Spherical(c=1.0 / radius).sag(0.0, rho)

    wedge = prism / (100.0 * (index - 1.0)) * (x * math.cos(math.radians(base_deg)) + y * math.sin(math.radians(base_deg)))
    return center_mm - sag(front_d, 1.0) + sag(back_d, -1.0) + wedge


def test_prism_wedge_published_example():
    # Source: DOMAIN.md prism wedge, 3Δ over 50 mm at n 1.5 → 3.0 mm (computed from g = P·d/(100(n − 1)),
    # the prism thickness formula in Jalie).
    assert wedge_mm(3.0, 50.0, 1.5) == pytest.approx(3.0)


def test_wedge_appears_across_a_plano_lens_along_the_base_only():
    # Source: g = P·d/(100(n − 1)) (Jalie): a plano 3Δ base-90° lens, 50 mm across, n 1.5.
    shape = LensShape(0.0, power_matrix(0.0), 1.5, 3.0, 90.0)
    top, bottom, right, left = thickness_mm([[0, 25], [0, -25], [25, 0], [-25, 0]], shape, 3.0)
    assert top - bottom == pytest.approx(3.0)
    assert right == pytest.approx(left) == pytest.approx(3.0)


def test_back_power_in_direction_is_eulers_theorem():
    # Source: Euler's theorem, F(φ) = Fa cos²(φ − α) + Fb sin²(φ − α): halfway between meridians, the mean.
    back = ToricBack(-4.0, -6.0, 30.0)
    assert back_power_in_direction(back, math.radians(30.0)) == pytest.approx(-4.0)
    assert back_power_in_direction(back, math.radians(120.0)) == pytest.approx(-6.0)
    assert back_power_in_direction(back, math.radians(75.0)) == pytest.approx(-5.0)


@settings(max_examples=40, deadline=None)
@given(st.floats(-10, 6), st.floats(-4, 0), st.integers(1, 180), st.sampled_from([1.498, 1.586, 1.665, 1.74]),
       st.floats(0, 4), st.floats(0, 360), st.floats(0, 2 * math.pi), st.floats(5, 28))
def test_thickness_matches_the_published_formulas_with_rayoptics_sags(sphere, cylinder, axis, index, prism, base,
                                                                      angle, radius):
    # Source: the thick-lens and thickness formulas of Jalie with rayoptics 0.9.8 Spherical sags
    # (reference_thickness above, written independently of the engine).
    front = min(max(vogel_front_curve(sphere, cylinder), 0.5), 10.0)
    shape = LensShape(front, power_matrix(sphere, cylinder, axis), index, prism, base)
    x, y = radius * math.cos(angle), radius * math.sin(angle)
    got = float(thickness_mm([[x, y]], shape, 2.5)[0])
    expected = reference_thickness(x, y, front, sphere, cylinder, axis, index, 2.5, prism, base)
    assert not math.isnan(got)
    assert got == pytest.approx(expected, abs=1e-9)


def spherical_cap_volume(height_mm, base_radius_mm):
    # Source: volume of a spherical cap, V = πh(3a² + h²)/6 (standard mensuration, e.g. CRC Standard
    # Mathematical Tables).
    return math.pi * height_mm * (3.0 * base_radius_mm ** 2 + height_mm ** 2) / 6.0


@pytest.mark.parametrize("sphere, front_d, center_mm, index", [(-4.0, 4.0, 2.0, 1.498), (3.0, 9.0, 4.0, 1.6),
                                                               (-8.0, 1.0, 1.2, 1.665)])
def test_weight_of_a_round_spherical_lens_matches_the_spherical_cap_volumes(sphere, front_d, center_mm, index):
    # Source: closed-form volume of a lens of two spherical caps on a cylinder (cap formula above): the volume
    # between each surface and its vertex plane is πR²h − V_cap(h). Round outline, radius 27 mm, centred.
    radius = 27.0
    shape = LensShape(front_d, power_matrix(sphere), index)
    front_radius = 1000.0 * (index - 1.0) / front_d
    front_sag = front_radius - math.sqrt(front_radius ** 2 - radius ** 2)
    vergence = front_d / (1.0 - center_mm / 1000.0 / index * front_d)
    back_radius = 1000.0 * (1.0 - index) / (sphere - vergence)
    back_sag = back_radius - math.sqrt(back_radius ** 2 - radius ** 2)
    disc = math.pi * radius ** 2
    expected = (disc * center_mm - (disc * front_sag - spherical_cap_volume(front_sag, radius))
                + (disc * back_sag - spherical_cap_volume(back_sag, radius)))
    volume = lens_volume_mm3([radius] * 72, "right", (0.0, 0.0), shape, center_mm)
    assert volume == pytest.approx(expected, rel=1e-9)
    # Source: weight = volume × density (Jalie); 1 cm³ = 1000 mm³.
    assert lens_weight_g(volume, 1.32) == pytest.approx(expected / 1000.0 * 1.32, rel=1e-9)


def test_a_decentred_plano_plate_weighs_its_area_times_thickness():
    # Source: volume of a flat plate = area × thickness; the sector area ½Σr²Δθ of a round outline is πR².
    shape = LensShape(0.0, power_matrix(0.0), 1.5)
    volume = lens_volume_mm3([25.0] * 72, "left", (-3.0, 2.0), shape, 2.0)
    assert volume == pytest.approx(math.pi * 25.0 ** 2 * 2.0, rel=1e-12)


def test_centre_minimum_applies_to_minus_plano_and_mixed_lenses_only():
    # Common practice: minus lenses are held at a minimum centre, plus lenses at a minimum edge.
    assert centre_minimum_applies(power_matrix(-2.0))
    assert centre_minimum_applies(power_matrix(0.0))
    assert centre_minimum_applies(power_matrix(1.0, -2.0, 90))
    assert not centre_minimum_applies(power_matrix(1.0, -0.5, 90))


@pytest.mark.parametrize("axis", [0.0, 17.0, 33.000000000000004, 45.0, 90.0, 123.45, 179.99999999999997])
def test_a_plano_meridian_counts_as_plano_whatever_the_axis(axis):
    # Common practice: a plano meridian (+2.00 / -2.00 D, +0.50 / -0.50 D) is held at the minimum centre; the
    # matrix rebuilt from an axis in floating point puts that meridian within ~1e-15 D of zero, either side.
    assert centre_minimum_applies(power_matrix(2.0, -2.0, axis))
    assert centre_minimum_applies(power_matrix(0.5, -0.5, axis))


def test_a_minus_lens_is_held_at_its_minimum_centre():
    # Common practice (DOMAIN.md): minus lenses at the minimum centre thickness; their edges are thicker.
    shape = LensShape(4.0, power_matrix(-4.0, -1.0, 20), 1.498)
    solved = solve_center_thickness(ring(27.0, centre=(3.0, 0.0)), shape, 2.0, 1.0)
    assert solved == (2.0, "centre")


def test_a_plus_lens_is_held_at_its_minimum_edge():
    # Common practice (DOMAIN.md): plus lenses at the minimum edge thickness.
    points = ring(27.0, centre=(3.0, 0.0))
    shape = LensShape(10.0, power_matrix(4.0), 1.498)
    solved = solve_center_thickness(points, shape, 2.0, 1.0)
    assert solved.binding == "edge"
    assert float(thickness_mm(points, shape, solved.center_mm).min()) == pytest.approx(1.0, abs=1e-9)


def test_a_back_curve_steeper_than_the_lens_is_wide_cannot_be_made():
    # Source: a sphere of radius r does not reach beyond y = r: −25 D at n 1.5 needs a back of r ≈ 19 mm.
    with pytest.raises(LensNotMakeable):
        solve_center_thickness(ring(30.0), LensShape(1.0, power_matrix(-25.0), 1.5), 2.0, 1.0)


indices = st.sampled_from([1.498, 1.53, 1.586, 1.6, 1.665, 1.74])


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.filter_too_much])
@given(st.floats(-10, 6), st.floats(-4, 0), st.integers(1, 180), indices, st.floats(0, 5), st.floats(0, 360),
       st.floats(40, 60), st.floats(28, 45), st.floats(0, 6), st.floats(-2, 6), st.floats(-4, 4),
       st.floats(1.0, 2.5), st.floats(0.8, 2.5))
def test_the_thinnest_point_meets_the_binding_minimum(sphere, cylinder, axis, index, prism, base, width, height,
                                                      ed_extra, inward, upward, min_center, min_edge):
    # Source: the rule to satisfy (DOMAIN.md, common practice): minimum centre for minus, minimum edge for plus,
    # whichever binds for mixed lenses — the binding minimum is met exactly and the other is not broken.
    height = min(height, width)
    outline = modelled_outline(round(width, 1), round(height, 1), round(width + ed_extra, 1))
    points = outline_points(outline.radii_mm, "right") - (inward, upward)
    front = min(max(vogel_front_curve(sphere, cylinder), 0.5), 10.0)
    matrix = power_matrix(sphere, cylinder, axis)
    shape = LensShape(front, matrix, index, prism, base)
    try:
        solved = solve_center_thickness(points, shape, min_center, min_edge)
    except LensNotMakeable:
        assume(False)
    thinnest_edge = float(thickness_mm(points, shape, solved.center_mm).min())
    centre_applies = centre_minimum_applies(matrix)
    margins = [thinnest_edge - min_edge] + ([solved.center_mm - min_center] if centre_applies else [])
    assert min(margins) == pytest.approx(0.0, abs=1e-7)
    if solved.binding == "centre":
        assert solved.center_mm == min_center
    else:
        assert thinnest_edge == pytest.approx(min_edge, abs=1e-7)

    # Without prism, a minus lens is thinnest at its centre and a plus lens at its edge: there the
    # lens's thinnest point is the binding minimum itself.
    larger, smaller, _ = principal_powers(matrix)
    thinnest_point = min(solved.center_mm, thinnest_edge)
    if prism == 0.0 and larger <= 0.0 and min_edge <= min_center:
        assert thinnest_point == pytest.approx(min_center, abs=1e-7)
    if prism == 0.0 and smaller >= 0.5:
        assert thinnest_point == pytest.approx(min_edge, abs=1e-7)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.filter_too_much])
@given(st.floats(-10, 6), st.floats(-4, 0), st.integers(1, 180), indices, st.floats(0, 5), st.floats(0, 360),
       st.floats(40, 60), st.floats(28, 45), st.floats(-2, 6), st.floats(-4, 4), st.sampled_from(["right", "left"]),
       st.floats(1.0, 2.5), st.floats(0.8, 2.5))
def test_a_lens_placed_on_its_outline_has_the_edges_of_the_published_formulas(
        sphere, cylinder, axis, index, prism, base, width, height, inward, upward, eye, min_center, min_edge):
    # Source: the thick-lens and thickness formulas of Jalie with rayoptics 0.9.8 Spherical sags
    # (reference_thickness above, independent of the engine), at every outline point about the optical centre
    # (the left lens the mirror image of the right); the binding minimum met as DOMAIN.md's rule asks.
    height = min(height, width)
    outline = modelled_outline(round(width, 1), round(height, 1))
    centre = (inward, upward) if eye == "right" else (-inward, upward)
    front = min(max(vogel_front_curve(sphere, cylinder), 0.5), 10.0)
    matrix = power_matrix(sphere, cylinder, axis)
    placed = place_lens(outline_grid(outline.radii_mm), eye, centre, matrix, index, prism, base)
    try:
        lens = edged_lens(placed, front, min_center, min_edge)
    except LensNotMakeable:
        assume(False)
    points = outline_points(outline.radii_mm, eye) - centre
    edges = [reference_thickness(x, y, front, sphere, cylinder, axis, index, lens.center_mm, prism, base)
             for x, y in points]
    assert lens.edge_min_mm == pytest.approx(min(edges), abs=1e-9)
    assert lens.edge_max_mm == pytest.approx(max(edges), abs=1e-9)
    assert placed.farthest_mm == pytest.approx(max(math.hypot(x, y) for x, y in points), abs=1e-9)
    if lens.binding == "centre":
        assert lens.center_mm == min_center and min(edges) >= min_edge - 1e-9
    else:
        assert min(edges) == pytest.approx(min_edge, abs=1e-7)


@pytest.mark.parametrize("sphere, front_d, index", [(-4.0, 4.0, 1.498), (3.0, 9.0, 1.6), (-8.0, 1.0, 1.665)])
def test_a_placed_round_lens_weighs_its_spherical_caps(sphere, front_d, index):
    # Source: closed-form volume of a lens of two spherical caps on a cylinder, V_cap = πh(3a² + h²)/6 (CRC
    # Standard Mathematical Tables), at the centre thickness the lens was solved to. Round outline, radius 27 mm.
    radius = 27.0
    lens = edged_lens(place_lens(outline_grid([radius] * 72), "right", (0.0, 0.0), power_matrix(sphere), index),
                      front_d, 2.0, 1.0)
    front_radius = 1000.0 * (index - 1.0) / front_d
    front_sag = front_radius - math.sqrt(front_radius ** 2 - radius ** 2)
    vergence = front_d / (1.0 - lens.center_mm / 1000.0 / index * front_d)
    back_radius = 1000.0 * (1.0 - index) / (sphere - vergence)
    back_sag = back_radius - math.sqrt(back_radius ** 2 - radius ** 2)
    disc = math.pi * radius ** 2
    expected = (disc * lens.center_mm - (disc * front_sag - spherical_cap_volume(front_sag, radius))
                + (disc * back_sag - spherical_cap_volume(back_sag, radius)))
    assert lens.volume_mm3 == pytest.approx(expected, rel=1e-9)
