"""Front (base) curve: Vogel's rule, Tscherning's ellipse, the method registry, the stocked bases."""
from __future__ import annotations

import pytest

from lenslane.plugins.optics.front_curve import (
    FRONT_CURVE_METHODS, NoBestForm, front_curve, front_curve_method, nearest_stocked_base, tscherning_front_curve,
    tscherning_front_curves, tscherning_limit_d, vogel_front_curve,
)
from tests.plugins.optics.lens_reference import seidel_astigmatism


@pytest.mark.parametrize("sphere, cylinder, expected", [
    (4.00, 0.0, 10.00), (0.0, 0.0, 6.00), (-4.00, 0.0, 4.00), (-2.00, -1.00, 4.75), (1.00, -1.00, 6.50),
])
def test_vogels_rule_values(sphere, cylinder, expected):
    # Source: Vogel's rule as given in Brooks & Borish (from memory, DOMAIN.md): SE + 6 for plus, SE/2 + 6
    # for minus; the values are computed from the rule, not printed.
    assert vogel_front_curve(sphere, cylinder) == pytest.approx(expected)


@pytest.mark.parametrize("power, flatter, steeper", [(0.0, 8.37, 19.37), (-5.0, 5.04, 17.70), (4.0, 11.90, 19.85)])
def test_tscherning_check_values(power, flatter, steeper):
    # Source: DOMAIN.md check values for Tscherning's ellipse (n 1.523, z 27 mm, distance), computed from the
    # published equation, not printed in a source.
    got = tscherning_front_curves(power, 1.523, 27.0)
    assert got == pytest.approx((flatter, steeper), abs=0.005)
    assert tscherning_front_curve(power, 0.0, 1.523) == pytest.approx(flatter, abs=0.005)


def test_tscherning_roots_solve_the_published_equation():
    # Source: the Tscherning equation as printed in DOMAIN.md, evaluated here term by term at the roots,
    # with a reading object vergence L = −2.5 D.
    n, f, big_l, w = 1.586, -3.0, -2.5, 1000.0 / 27.0
    for f1 in tscherning_front_curves(f, n, 27.0, big_l):
        residual = ((n + 2) * f1 ** 2 - ((n + 2) * f + 2 * (n ** 2 - 1) * (w + big_l)) * f1 + n * f ** 2
                    - (n - 2) * (n ** 2 - 1) * f * big_l + 2 * n * (n - 1) * f * w
                    + 2 * (n - 1) ** 2 * (n + 1) * big_l * w + n * (n - 1) ** 2 * w ** 2)
        assert residual == pytest.approx(0.0, abs=1e-8)


@pytest.mark.parametrize("power", [-5.0, 4.0])
def test_tscherning_flatter_form_has_no_seidel_astigmatism_in_rayoptics(power):
    # Source: rayoptics 0.9.8 third-order (Seidel) sums of a near-thin lens (0.01 mm) with the stop at the eye's
    # centre of rotation 27 mm behind it: the point-focal form is where the astigmatism sum S-III crosses zero.
    # The zero is found by bisection on rayoptics' values alone and compared with the engine's root.
    index = 1.523
    low, high = tscherning_front_curve(power, 0.0, index) - 1.0, tscherning_front_curve(power, 0.0, index) + 1.0
    s_low = seidel_astigmatism(low, power, index)
    assert s_low * seidel_astigmatism(high, power, index) < 0
    for _ in range(30):
        middle = 0.5 * (low + high)
        s_middle = seidel_astigmatism(middle, power, index)
        if s_middle * s_low > 0:
            low, s_low = middle, s_middle
        else:
            high = middle
    assert tscherning_front_curve(power, 0.0, index) == pytest.approx(0.5 * (low + high), abs=0.02)


def test_tscherning_has_no_solution_above_about_plus_7_2():
    # Source: DOMAIN.md, "No real root above about +7.2 D" (n 1.523, z 27 mm, distance); the limit is where the
    # discriminant of the published equation vanishes, +7.214 D by bisection on it by hand.
    assert tscherning_limit_d(1.523, 27.0) == pytest.approx(7.2, abs=0.05)
    tscherning_front_curves(7.0, 1.523)
    with pytest.raises(NoBestForm, match=r"\+7\.2"):
        tscherning_front_curves(7.5, 1.523)


def test_the_dispatcher_validates_the_method_name():
    # Policy: a registry of named methods; a misspelt name is refused, naming the known ones. The values: Vogel's
    # rule −4.00/2 + 6 = 4.00 D, and DOMAIN.md's Tscherning check value −5.00 → +5.04 (Sources as above).
    assert {"vogel", "tscherning"} <= set(FRONT_CURVE_METHODS)  # and those other modules register (exact_best_form)
    assert front_curve("vogel", -4.0) == pytest.approx(4.0)
    assert front_curve("tscherning", -5.0, 0.0, 1.523) == pytest.approx(5.04, abs=0.005)
    with pytest.raises(ValueError, match="tscherning, vogel"):
        front_curve_method("vogle")


def test_nearest_stocked_base_takes_the_flatter_on_a_tie():
    # Common practice: snap to the stocked base nearest the wanted curve. Policy: a tie goes to the flatter.
    stocked = [2.0, 4.0, 6.0, 8.0]
    assert nearest_stocked_base(4.75, stocked) == 4.0
    assert nearest_stocked_base(5.0, stocked) == 4.0
    assert nearest_stocked_base(5.1, stocked) == 6.0
    assert nearest_stocked_base(-1.0, stocked) == 2.0
    with pytest.raises(ValueError):
        nearest_stocked_base(4.0, [])
