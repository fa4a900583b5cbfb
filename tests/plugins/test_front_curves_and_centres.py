"""A technician's judgement in the geometry: makeable fronts, matched fronts, multifocal centres, hard limits."""
from __future__ import annotations

import pytest

from lenslane.config import ConfigError, parse_config
from lenslane.chain.host import start_host
from lenslane.plugins.optics.front_curve import (
    FRONT_CURVE_METHODS, FrontCurveMethod, FrontCurveRequest, front_curve, register_front_curve_method,
)
from tests.conftest import run_order


def host_with(toml: str = ""):
    return start_host(parse_config(toml))


def geometry(result, eye="right"):
    return result["lenses"][eye]["geometry"]


def change(result, eye="right"):
    [record] = [c for c in result["changes"] if c["field"] == f"lenses.{eye}.geometry"]
    return record


def back_surface(front_d, back_vertex_d, thickness_mm, index):
    """F₂ = Fv − F₁/(1 − (t/n)F₁), the thick-lens back vertex power solved for the back surface (DOMAIN.md)."""
    return back_vertex_d - front_d / (1.0 - thickness_mm / 1000.0 / index * front_d)


def codes(result, level=None):
    return [f["code"] for f in result["flags"] if level is None or f["level"] == level]


# --------------------------------------------------------------------------
# A front curve the lab can make
# --------------------------------------------------------------------------


def test_high_plus_beyond_the_stock_is_held_with_the_numbers_and_a_suggestion(default_host, order_dict):
    # The order: +12.00 −1.00 × 90 in resin-1.60, whose stock stops at 8.00 D. The back surface follows
    # F₂ = Fv − F₁/(1 − (t/n)F₁) (Jalie): with an 8.00 D front it would be convex. Held, never a silent biconvex lens.
    order_dict["lens"]["material"] = "resin-1.60"
    order_dict["rx"] = {"right": {"sphere": 12.0, "cylinder": -1.0, "axis": 90}}
    result = run_order(default_host, order_dict)
    assert result["status"] == "review"
    [flag] = [f for f in result["flags"] if f["code"] == "front-curve-not-makeable"]
    values = flag["values"]
    assert values["front_curve_d"] == 8.0 and values["steepest_stocked_d"] == 8.0
    # Source: F₂ = Fv − F₁/(1 − (t/n)F₁) (DOMAIN.md, thick lens) in the flatter back's meridian, Fv +12.00, F₁ 8.00,
    # n 1.600, t the published centre thickness (rounded to 0.1 mm, hence 0.01 D): 12 − 8/(1 − 0.0096/1.6 × 8)
    # = +3.60 D, a convex back.
    thickness = geometry(result)["center_thickness_mm"]
    assert values["back_flattest_d"] == pytest.approx(back_surface(8.0, 12.0, thickness, 1.6), abs=0.01)
    assert values["back_flattest_d"] > 0  # convex: biconvex lens
    # Source: the same formula solved for the front that leaves the back at −0.50 D (the lab's margin, from memory):
    # F₁/(1 − (t/n)F₁) = 12.50, F₁ = 12.5/(1 + (t/n)·12.5) = 11.63 D.
    assert values["front_needed_d"] == pytest.approx(12.5 / (1.0 + thickness / 1000.0 / 1.6 * 12.5), abs=0.01)
    assert "steeper base" in flag["message"] and "lenticular" in flag["message"] and "index" in flag["message"]


def test_an_almost_flat_back_is_not_accepted(default_host, order_dict):
    # The second order: +10.50 in resin-1.50 got a 10.00 D front and an almost flat back; the lab's
    # margin (0.50 D, from memory) asks for a back concave by at least that much.
    order_dict["rx"] = {"right": {"sphere": 10.5}}
    result = run_order(default_host, order_dict)
    [flag] = [f for f in result["flags"] if f["code"] == "front-curve-not-makeable"]
    assert -0.5 < flag["values"]["back_flattest_d"] <= 0.5
    # Source: F₂ = Fv − F₁/(1 − (t/n)F₁) (DOMAIN.md) with Fv +10.50, F₁ 10.00, n 1.498 and the published centre
    # thickness: −0.30 D.
    thickness = geometry(result)["center_thickness_mm"]
    assert flag["values"]["back_flattest_d"] == pytest.approx(back_surface(10.0, 10.5, thickness, 1.498), abs=0.01)


def test_a_band_may_stock_its_own_bases(order_dict):
    # A lab that stocks steep resin-1.60 bases for high plus (a power band of its own): +9.00 is in the band and
    # gets its stock.
    host = host_with('[[stages.geometry.front_curve_bands]]\nmaterials = ["resin-1.60"]\nfrom_d = 6.0\n'
                     'base_curves_d = [10.0, 12.0, 13.0, 14.0]\n')
    order_dict["lens"]["material"] = "resin-1.60"
    order_dict["rx"] = {"right": {"sphere": 9.0}}
    order_dict["frame"].update({"box_width_mm": 44.0, "box_height_mm": 32.0, "bridge_mm": 20.0})
    result = run_order(host, order_dict)
    inputs = change(result)["inputs"]["front_curve_d"]
    assert inputs["band"] == 0 and inputs["stocked_d"] == [10.0, 12.0, 13.0, 14.0]
    # Source: Vogel's rule (DOMAIN.md; Brooks & Borish, from memory): plus, SE + 6.00 = 9.00 + 6.00 = 15.00 D,
    # whose nearest stocked base in the band is 14 D.
    assert inputs["computed_d"] == pytest.approx(15.0)
    assert geometry(result)["front_curve_d"] == 14.0 and "nearest_stocked_d" not in inputs
    # Source: F₂ = Fv − F₁/(1 − (t/n)F₁) (DOMAIN.md), n 1.600: 9 − 14/(1 − 0.0053/1.6 × 14) = −5.68 D, concave.
    thickness = geometry(result)["center_thickness_mm"]
    assert inputs["back_flattest_d"] == pytest.approx(back_surface(14.0, 9.0, thickness, 1.6), abs=0.01)
    assert "front-curve-not-makeable" not in codes(result)


def test_a_steeper_stocked_base_is_taken_when_the_nearest_leaves_the_back_convex(order_dict):
    # Source: F₂ = Fv − F₁/(1 − (t/n)F₁) (DOMAIN.md): a front as strong as a plus lens's power leaves the back
    # convex at any thickness (F₁/(1 − (t/n)F₁) > F₁ = Fv). A rule that asks for that front, +6.00 in resin-1.60:
    # the nearest stocked 6 D leaves the back convex, so the next steeper stocked base, 7 D, is used.
    name = "test_front_as_strong_as_the_lens"
    register_front_curve_method(FrontCurveMethod(name, lambda request: request.sphere, "the lens's power", "Test only"))
    try:
        order_dict["lens"]["material"] = "resin-1.60"
        order_dict["rx"] = {"right": {"sphere": 6.0}}
        result = run_order(host_with(f'[stages.geometry]\nfront_curve_method = "{name}"\n'), order_dict)
    finally:
        del FRONT_CURVE_METHODS[name]  # the registry is the process's: leave it as found
    inputs = change(result)["inputs"]["front_curve_d"]
    assert inputs["computed_d"] == 6.0 and inputs["nearest_stocked_d"] == 6.0
    assert geometry(result)["front_curve_d"] == 7.0
    assert "The nearest stocked base, 6.00 D" in change(result)["reason"]
    # Source: the same formula, Fv +6.00, F₁ 7.00, n 1.600: 6 − 7/(1 − (t/1.6)·7) ≈ −1.1 D, concave beyond the
    # lab's 0.50 D margin (from memory).
    thickness = geometry(result)["center_thickness_mm"]
    assert inputs["back_flattest_d"] == pytest.approx(back_surface(7.0, 6.0, thickness, 1.6), abs=0.01)
    assert inputs["back_flattest_d"] <= -0.5
    assert "front-curve-not-makeable" not in codes(result)


def test_a_band_may_name_its_own_rule(order_dict):
    # The lab's rule per power band: Tscherning's best form for minus lenses in resin-1.50 (the −5.00 D check
    # value +5.04 D of DOMAIN.md, computed from the equation at n 1.523; here at the material's n 1.498).
    host = host_with('[[stages.geometry.front_curve_bands]]\nto_d = 0.0\nmethod = "tscherning"\n')
    order_dict["rx"] = {"right": {"sphere": -5.0}, "left": {"sphere": 2.0}}
    result = run_order(host, order_dict)
    assert "Tscherning" in change(result, "right")["method"]
    assert "Vogel" in change(result, "left")["method"]
    # Source: Tscherning's equation (DOMAIN.md) solved by hand, F −5.00, w = 1000/27, L 0: at n 1.523 the flatter
    # root is +5.04 (DOMAIN.md's check value); at n 1.498 it is +4.63.
    assert change(result, "right")["inputs"]["front_curve_d"]["computed_d"] == pytest.approx(4.632, abs=0.001)
    # Source: Vogel's rule (DOMAIN.md; Brooks & Borish, from memory): +2.00 + 6.00 = 8.00 D.
    assert change(result, "left")["inputs"]["front_curve_d"]["computed_d"] == pytest.approx(8.0)


def test_a_band_with_an_unknown_rule_stops_the_engine():
    # Policy: a band names only a registered method; anything else stops the engine at start.
    with pytest.raises(ConfigError, match="front_curve_bands"):
        host_with('[[stages.geometry.front_curve_bands]]\nmethod = "guess"\n')


# --------------------------------------------------------------------------
# Matched fronts
# --------------------------------------------------------------------------


def test_a_three_dioptre_anisometropia_gets_one_base_for_both_eyes(default_host, order_dict):
    # The issue: R 6 / L 4 for a 3 D anisometropia.
    order_dict["rx"] = {"right": {"sphere": -0.5}, "left": {"sphere": -3.5}}
    result = run_order(default_host, order_dict)
    # Common practice (DOMAIN.md): the same base for both eyes where the powers allow.
    assert geometry(result, "right")["front_curve_d"] == geometry(result, "left")["front_curve_d"]
    record = change(result, "right")
    # Source: Vogel's rule (DOMAIN.md; Brooks & Borish, from memory), minus SE/2 + 6.00: −0.50 → 5.75, nearest
    # stocked 6; −3.50 → 4.25, nearest stocked 4.
    assert record["inputs"]["front_curve_d"]["own_choice_d"] == {"right": 6.0, "left": 4.0}
    assert "serves both" in record["reason"] and "matched fronts" in record["reason"]


def test_antimetropia_keeps_the_fronts_within_two_dioptres(default_host, order_dict):
    # The issue: antimetropia got R 8.00 / L 5.00.
    order_dict["rx"] = {"right": {"sphere": 3.0}, "left": {"sphere": -3.0}}
    result = run_order(default_host, order_dict)
    right, left = geometry(result, "right")["front_curve_d"], geometry(result, "left")["front_curve_d"]
    # Source: Vogel's rule (DOMAIN.md; from memory): +3.00 → 9.00 D, −3.00 → 4.50 D, each eye's own curve.
    assert change(result, "left")["inputs"]["front_curve_d"]["own_choice_d"]["right"] == 9.0
    assert abs(right - left) <= 2.0  # Common practice (DOMAIN.md): fronts at most about 2 D apart
    for eye in ("right", "left"):
        assert change(result, eye)["inputs"]["front_curve_d"]["back_flattest_d"] <= -0.5


def test_the_lab_sets_the_largest_difference(order_dict):
    # Policy: matched_front_max_difference_d replaces the 2 D of common practice.
    order_dict["rx"] = {"right": {"sphere": 3.0}, "left": {"sphere": -3.0}}
    result = run_order(host_with("[stages.geometry]\nmatched_front_max_difference_d = 1.0\n"), order_dict)
    assert abs(geometry(result, "right")["front_curve_d"] - geometry(result, "left")["front_curve_d"]) <= 1.0


# --------------------------------------------------------------------------
# Multifocal centres
# --------------------------------------------------------------------------


def bifocal(order_dict, **fit):
    order_dict["lens"]["design"] = "bifocal"
    for eye in ("right", "left"):
        order_dict["rx"][eye]["add"] = 2.25
        order_dict["fit"][eye].update(fit)
    return order_dict


def test_a_bifocal_distance_centre_sits_above_the_segment_top(default_host, order_dict):
    # DOMAIN.md: the distance centre belongs at the pupil, a few millimetres above the segment top (default
    # 4 mm, from memory). Box height 38 mm: segment top 18 mm → centre at 22 mm, 3 mm above the box centre.
    result = run_order(default_host, bifocal(order_dict, segment_height_mm=18.0))
    assert geometry(result)["optical_centre_mm"][1] == pytest.approx(22.0 - 19.0)  # From memory (4 mm above)
    assert change(result)["inputs"]["optical_centre_mm"]["segment_height_mm"] == 18.0


def test_a_bifocal_fit_height_is_the_distance_centre(default_host, order_dict):
    # Policy: ORDER_FORMAT.md, height_mm on a bifocal is the distance optical centre at the pupil; the centre is
    # given from the box centre, half the 38 mm box height up from the bottom.
    result = run_order(default_host, bifocal(order_dict, segment_height_mm=17.0, height_mm=23.0))
    assert geometry(result)["optical_centre_mm"][1] == pytest.approx(23.0 - 19.0)


def test_a_progressive_centre_is_the_prism_reference_point_below_the_fitting_cross(default_host, order_dict):
    # DOMAIN.md: the prism reference point lies a few millimetres below the fitting cross (often about 4 mm).
    order_dict["lens"]["design"] = "progressive"
    for eye in ("right", "left"):
        order_dict["rx"][eye]["add"] = 1.0
        order_dict["fit"][eye]["height_mm"] = 22.0
    result = run_order(default_host, order_dict)
    # Common practice (DOMAIN.md, design-dependent): 4 mm below the 22 mm fitting cross, from the 19 mm box centre.
    assert geometry(result)["optical_centre_mm"][1] == pytest.approx(22.0 - 4.0 - 19.0)


def test_thinning_prism_follows_the_labs_rule_and_is_recorded(default_host, order_dict):
    # Common practice (DOMAIN.md): yoked base-down thinning prism of about half to two-thirds of the add on
    # plus and high-add progressives; the lab's default is half the add.
    order_dict["lens"]["design"] = "progressive"
    order_dict["rx"] = {"right": {"sphere": 2.0, "add": 2.0}, "left": {"sphere": 2.0, "add": 2.0}}
    result = run_order(default_host, order_dict)
    for eye in ("right", "left"):
        # Common practice: half the 2.00 D add = 1.0Δ, base down = 270° (ISO 8429 notation, DOMAIN.md).
        assert geometry(result, eye)["thinning_prism"] == {"amount": 1.0, "base_deg": 270.0}
        assert "thinning_prism" in change(result, eye)["method"]
    off = run_order(host_with("[stages.geometry.thinning_prism]\nfraction_of_add = 0.0\n"), order_dict)
    assert "thinning_prism" not in geometry(off)
    # The wedge is ground into the lens the thickness is worked out for (the model takes the distance power over
    # the whole lens, so the near zone the prism balances is not in it: the edges move, either way).
    assert change(result)["inputs"]["edge_max_mm"]["prism_base_deg"] == 270.0
    assert change(result)["inputs"]["edge_max_mm"]["prism_amount"] == pytest.approx(1.0)
    assert geometry(result)["edge_max_mm"] != geometry(off)["edge_max_mm"]


def test_a_mild_minus_progressive_with_a_low_add_gets_no_thinning_prism(default_host, order_dict):
    # Policy (common practice, DOMAIN.md): thinning prism is for plus and high-add progressives only.
    order_dict["lens"]["design"] = "progressive"
    for eye in ("right", "left"):
        order_dict["rx"][eye]["add"] = 1.5
    assert "thinning_prism" not in geometry(run_order(default_host, order_dict))


# --------------------------------------------------------------------------
# Beyond any lab's making
# --------------------------------------------------------------------------


def test_a_lens_past_the_hard_limits_is_never_ready(default_host, order_dict):
    # Issue: fuzzed orders thicker than 50 mm or heavier than 1 kg were published ready. +20.00 in a large
    # frame, resin-1.50: far past the 15 mm centre limit (from memory).
    order_dict["rx"] = {"right": {"sphere": 20.0}}
    order_dict["frame"].update({"box_width_mm": 62.0, "box_height_mm": 50.0, "bridge_mm": 14.0})
    order_dict["fit"]["right"]["pd_mm"] = 26.0
    result = run_order(default_host, order_dict)
    assert result["status"] == "review"
    [flag] = [f for f in result["flags"] if f["code"] == "lens-beyond-limits"]
    assert "center_thickness_mm" in flag["values"]["over"]
    assert flag["values"]["center_thickness_mm"] == geometry(result)["center_thickness_mm"] > 15.0  # From memory


def test_the_hard_limits_are_the_labs(default_host, order_dict):
    # Policy: a lab's own hard limit (a 5 g weight) holds a −4.00 D pair the default limits let through.
    order_dict["rx"] = {"right": {"sphere": -4.0}, "left": {"sphere": -4.0}}
    assert "lens-beyond-limits" not in codes(run_order(default_host, order_dict))
    strict = host_with("[stages.geometry.hard_limits]\nweight_g = 5.0\n")
    result = run_order(strict, order_dict)
    assert result["status"] == "review" and "lens-beyond-limits" in codes(result, "review")


# --------------------------------------------------------------------------
# The method registry
# --------------------------------------------------------------------------


def test_a_registered_method_can_be_named_in_the_config(order_dict):
    # Policy: a method plugs in by name; the config is validated against the registry.
    name = "test_plano_plus_seven"
    register_front_curve_method(FrontCurveMethod(name, lambda request: 7.0, "a fixed 7 D front", "Test only"))
    try:
        assert front_curve(name, FrontCurveRequest(-2.0)) == 7.0
        result = run_order(host_with(f'[stages.geometry]\nfront_curve_method = "{name}"\n'), order_dict)
        assert geometry(result)["front_curve_d"] == 7.0 and "a fixed 7 D front" in change(result)["method"]
        with pytest.raises(ValueError, match="registered already"):
            register_front_curve_method(FrontCurveMethod(name, lambda request: 6.0, "again", "Test only"))
    finally:
        del FRONT_CURVE_METHODS[name]  # the registry is the process's: leave it as found
