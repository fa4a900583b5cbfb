"""ANSI Z80.1-2015 tolerances and the meridian comparison."""
from __future__ import annotations

import pytest

from lenslane.plugins.optics.power import power_matrix
from lenslane.plugins.optics.tolerance import (
    add_tolerance, axis_shift_deg, axis_tolerance, cylinder_tolerance, meridian_tolerance,
    principal_meridian_changes,
)


@pytest.mark.parametrize("power, tolerance", [
    (0.0, 0.13), (-2.0, 0.13), (6.5, 0.13), (-6.5, 0.13),
    (6.75, 0.135), (-8.0, 0.16), (10.0, 0.20), (-20.0, 0.40),
])
def test_sphere_meridian_tolerance(power, tolerance):
    # Source: ANSI Z80.1-2015 quick reference (as quoted in DOMAIN.md): sphere meridian ±0.13 D up to
    # ±6.50 D, ±2 % beyond (the percentages computed).
    assert meridian_tolerance(power) == pytest.approx(tolerance, abs=1e-12)


@pytest.mark.parametrize("cylinder, tolerance", [
    (0.0, 0.13), (-0.25, 0.13), (2.0, 0.13), (-2.25, 0.15), (4.5, 0.15), (-4.75, 0.19), (6.0, 0.24),
])
def test_cylinder_tolerance(cylinder, tolerance):
    # Source: ANSI Z80.1-2015 quick reference (DOMAIN.md): cylinder ±0.13 (≤ 2.00), ±0.15 (≤ 4.50), ±4 % above.
    assert cylinder_tolerance(cylinder) == pytest.approx(tolerance, abs=1e-12)


@pytest.mark.parametrize("cylinder, degrees", [
    (-0.12, 14.0), (0.25, 14.0), (-0.37, 7.0), (0.5, 7.0), (-0.62, 5.0), (0.75, 5.0),
    (-1.0, 3.0), (1.5, 3.0), (-1.75, 2.0), (4.0, 2.0),
])
def test_axis_tolerance_table(cylinder, degrees):
    # Source: ANSI Z80.1-2015 quick reference (DOMAIN.md): axis ±14° (0.12–0.25 D), ±7° (≤ 0.50), ±5° (≤ 0.75),
    # ±3° (≤ 1.50), ±2° above.
    assert axis_tolerance(cylinder) == degrees


def test_no_axis_tolerance_below_the_table():
    # Source: ANSI Z80.1-2015: the axis table starts at 0.12 D of cylinder.
    assert axis_tolerance(0.0) is None
    assert axis_tolerance(-0.10) is None


def test_boundaries_use_the_power_written_to_a_hundredth():
    # Policy: the ANSI Z80.1-2015 rows (DOMAIN.md) are read for powers written to 0.01 D, so 2.0000001 D belongs
    # to "≤ 2.00".
    assert cylinder_tolerance(-2.0000001) == 0.13
    assert axis_tolerance(1.5000000001) == 3.0


def test_add_tolerance():
    # Source: ANSI Z80.1-2015 quick reference (DOMAIN.md): add ±0.12 D up to +4.00 D.
    assert add_tolerance(1.0) == 0.12 and add_tolerance(4.0) == 0.12
    # From memory: ±0.18 D above +4.00 D (not in DOMAIN.md; orders carry adds up to +4.00 D only).
    assert add_tolerance(4.5) == 0.18


def test_meridian_changes_follow_the_principal_meridians_of_the_lens_before():
    # Source: meridian power by Euler's theorem on the power matrix (DOMAIN.md): −4.00 −1.00 × 30 has −4.00 along
    # 30° and −5.00 along 120°, −4.10 −1.30 × 30 has −4.10 and −5.40; Z80.1 sphere-meridian row ±0.13 D.
    first, second = principal_meridian_changes(power_matrix(-4.0, -1.0, 30), power_matrix(-4.1, -1.3, 30))
    assert first.direction_deg == pytest.approx(30.0) and second.direction_deg == pytest.approx(120.0)
    assert first.change == pytest.approx(-0.1, abs=1e-12)
    assert second.change == pytest.approx(-0.4, abs=1e-12)
    assert (first.tolerance, second.tolerance) == (0.13, 0.13)


def test_meridian_changes_of_a_sphere_use_the_meridians_after():
    # Source: Martin's formula (Jalie): a tilted sphere gains its cylinder across the tilt axis; every
    # meridian of a sphere is principal, so the new lens's meridians are the ones compared: −8.10 along 180°,
    # −8.40 along 90°; Z80.1 2 % of 8.00 D = ±0.16 D.
    first, second = principal_meridian_changes(power_matrix(-8.0), power_matrix(-8.1, -0.3, 180))
    assert {round(first.direction_deg) % 180, round(second.direction_deg) % 180} == {0, 90}
    assert sorted([round(first.change, 9), round(second.change, 9)]) == [-0.4, -0.1]
    assert first.tolerance == pytest.approx(0.16)


def test_axis_shift_wraps_at_180():
    # Common practice: an axis is a direction, so 178° and 3° are 5° apart.
    assert axis_shift_deg(178.0, 3.0) == pytest.approx(5.0)
    assert axis_shift_deg(3.0, 178.0) == pytest.approx(-5.0)
    assert axis_shift_deg(30.0, 33.5) == pytest.approx(3.5)
