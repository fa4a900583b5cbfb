"""The outline (given or modelled), the optical centre and the minimum blank size."""
from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from lenslane.plugins.optics.outline import (
    blank_diameter_from_ed_mm, blank_diameter_mm, decentration, fitted_exponent, longest_radius, modelled_outline,
    optical_centre, outline_extent, outline_points, superellipse_radii, vertical_extent_at,
)


def test_blank_size_published_example():
    # Source: DOMAIN.md blank example from dispensing texts: A 52, DBL 18, PD 64, ED 56 → 3 mm per eye, 64 mm.
    offset = decentration(52.0, 18.0, 38.0, 32.0)
    assert offset.inward_mm == pytest.approx(3.0)
    assert blank_diameter_from_ed_mm(56.0, offset.inward_mm, 2.0) == pytest.approx(64.0)


def test_blank_from_a_round_outline_equals_the_ed_formula():
    # Source: for a round outline the farthest point from the optical centre is ED/2 + decentration, so the
    # outline rule gives the dispensing texts' ED + 2 × decentration + 2 mm (computed, not printed).
    for eye in ("right", "left"):
        points = outline_points([28.0] * 360, eye)
        centre = optical_centre(eye, decentration(56.0, 14.0, 56.0, 32.0))
        assert blank_diameter_mm(points, centre, 2.0) == pytest.approx(64.0)


@settings(deadline=None)
@given(st.floats(40, 60), st.floats(28, 45), st.floats(0, 8), st.floats(-3, 8), st.floats(-5, 5))
def test_the_outline_blank_never_exceeds_the_ed_formula(width, height, ed_extra, inward, upward):
    # Source: triangle inequality — no outline point lies farther from the optical centre than ED/2 plus the
    # decentration, so the outline rule is within the dispensing texts' bound.
    height = min(height, width)
    shape = modelled_outline(round(width, 1), round(height, 1), round(width + ed_extra, 1))
    ed = outline_extent(shape.radii_mm).effective_diameter_mm
    points = outline_points(shape.radii_mm, "right")
    blank = blank_diameter_mm(points, (inward, upward), 2.0)
    assert blank <= ed + 2.0 * math.hypot(inward, upward) + 2.0 + 1e-9


def test_decentration_and_optical_centre_per_eye():
    # Source: ISO 8624 boxing: decentration (A + DBL)/2 − PD toward the nose; height − B/2 up. Seen from the
    # front, the right lens's nose side is +x and the left lens's −x (base in = 0° right, 180° left, ISO 8429).
    offset = decentration(50.0, 18.0, 36.0, 31.0, 20.0)
    assert offset == pytest.approx((3.0, 2.0))
    assert optical_centre("right", offset) == pytest.approx((3.0, 2.0))
    assert optical_centre("left", offset) == pytest.approx((-3.0, 2.0))
    assert decentration(50.0, 18.0, 36.0, 36.0).inward_mm == pytest.approx(-2.0)
    with pytest.raises(ValueError):
        optical_centre("both", offset)


def test_the_left_outline_is_the_mirror_of_the_right():
    # Source: ORDER_FORMAT.md, outline_mm is the right lens seen from the front; the left is its mirror image.
    radii = [25.0 + math.sin(3 * a) for a in np.linspace(0, 2 * math.pi, 72, endpoint=False)]
    right, left = outline_points(radii, "right"), outline_points(radii, "left")
    assert left[:, 0] == pytest.approx(-right[:, 0])
    assert left[:, 1] == pytest.approx(right[:, 1])


def test_superellipse_of_exponent_two_is_the_ellipse():
    # Source: polar form of an ellipse, r(θ) = ab / √(b² cos²θ + a² sin²θ) (any analytic-geometry text).
    a, b = 26.0, 19.0
    angles = np.arange(360) * 2 * math.pi / 360
    expected = a * b / np.sqrt((b * np.cos(angles)) ** 2 + (a * np.sin(angles)) ** 2)
    assert superellipse_radii(a, b, 2.0) == pytest.approx(expected)


@pytest.mark.parametrize("width, height, ed", [(52.0, 38.0, 56.0), (50.0, 35.0, 52.7), (54.0, 30.0, 57.0)])
def test_the_modelled_outline_has_the_stated_box_and_ed(width, height, ed):
    # Source: boxing definitions (ISO 8624): the box is the outline's width and height; ED twice its longest radius.
    shape = modelled_outline(width, height, ed)
    extent = outline_extent(shape.radii_mm)
    assert extent.width_mm == pytest.approx(width, abs=1e-6)
    assert extent.height_mm == pytest.approx(height, abs=1e-6)
    assert extent.effective_diameter_mm == pytest.approx(ed, abs=0.02)  # sampled at 1° steps


@settings(max_examples=100, deadline=None)
@given(a=st.floats(10.0, 40.0), b=st.floats(10.0, 40.0),
       m=st.one_of(st.sampled_from([2.0, 2.000001, 2.01, 60.0]), st.floats(2.0, 60.0)))
def test_the_longest_radius_is_the_superellipse_s_farthest_point(a, b, m):
    # Source: the superellipse |x/a|^m + |y/b|^m = 1 in polar form, r(θ) = (|cos θ/a|^m + |sin θ/b|^m)^(−1/m),
    # sampled at 200 001 angles of the first quadrant (the curve is symmetric about both axes): the closed form
    # may not fall short of any sample, and the densest sample comes within the sampling's own error.
    angles = np.linspace(0.0, math.pi / 2.0, 200_001)
    sampled = float(np.max((np.abs(np.cos(angles) / a) ** m + np.abs(np.sin(angles) / b) ** m) ** (-1.0 / m)))
    assert sampled - 1e-9 <= longest_radius(a, b, m) <= sampled + 1e-7


def test_the_longest_radius_of_a_square_s_superellipse_is_at_its_diagonal():
    # Source: |x/a|^m + |y/a|^m = 1 meets the diagonal x = y at x = a·2^(−1/m), so r = a·2^(1/2 − 1/m); the ellipse
    # (m = 2) reaches no farther than its longer semi-axis.
    for m in (2.5, 4.0, 10.0, 60.0):
        assert longest_radius(20.0, 20.0, m) == pytest.approx(20.0 * 2.0 ** (0.5 - 1.0 / m), rel=1e-12)
    assert longest_radius(26.0, 19.0, 2.0) == 26.0
    assert longest_radius(19.0, 26.0, 2.0) == 26.0


def test_the_exponent_stays_within_ellipse_and_rectangle():
    # Source: an ED no larger than the longer box side is an ellipse at most; beyond the box diagonal nothing
    # inside the box reaches it (the superellipse tends to the rectangle).
    assert fitted_exponent(52.0, 38.0, 50.0) == 2.0
    assert fitted_exponent(52.0, 38.0, 70.0) == 60.0
    assert modelled_outline(52.0, 38.0, None).exponent == 4.0


@settings(max_examples=200, deadline=None)
@given(radius=st.floats(15.0, 35.0), count=st.sampled_from([36, 72, 100, 360]), along=st.floats(-0.99, 0.99))
def test_the_vertical_extent_of_a_round_outline_is_the_circle_s_chord(radius, count, along):
    # Source: the circle x² + y² = R² meets the vertical x = a at y = ±√(R² − a²); the outline is the polygon
    # through `count` points of it, whose every point lies at least R cos(π/count) from the centre, so the
    # polygon meets the vertical no nearer the centre than ±√(R² cos²(π/count) − a²).
    x_mm = along * radius
    low, high = vertical_extent_at(outline_points([radius] * count), x_mm)
    chord = math.sqrt(radius * radius - x_mm * x_mm)
    inner = math.sqrt(max(0.0, (radius * math.cos(math.pi / count)) ** 2 - x_mm * x_mm))
    assert -chord - 1e-9 <= low <= -inner + 1e-9 and inner - 1e-9 <= high <= chord + 1e-9


def test_the_vertical_extent_uses_the_side_that_closes_the_outline():
    # Source: plane geometry. The outline of 4 equal radii is a diamond (corners at 0°, 90°, 180°, 270°): x = 5
    # crosses the sides from 270° to 0° (the closing side, last point to first) and from 0° to 90°,
    # at y = ∓(20 − 5) mm; beyond the outline, none.
    assert vertical_extent_at(outline_points([20.0] * 4), 5.0) == pytest.approx((-15.0, 15.0))
    assert vertical_extent_at(outline_points([20.0] * 4), 21.0) is None
