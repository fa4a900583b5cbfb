"""The first built-in stages: validate, normalize, prism."""
from __future__ import annotations

import pytest

from tests.conftest import run_order


def flags(result, code=None):
    return [f for f in result["flags"] if code is None or f["code"] == code]


def test_normalize_writes_rx_and_the_starting_surfacing_in_minus_form(default_host, order_dict):
    # Source: DOMAIN.md transposition example (MRCOphth mock-exam station): −2.00 +1.50 × 90 = −0.50 −1.50 × 180.
    order_dict["rx"]["right"] = {"sphere": -2.00, "cylinder": 1.50, "axis": 90}
    result = run_order(default_host, order_dict)
    right = result["lenses"]["right"]
    assert right["rx"] == {"sphere": -0.50, "cylinder": -1.50, "axis": 180}
    [rx_change] = [c for c in result["changes"] if c["field"] == "lenses.right.rx"]
    assert rx_change["method"] == "transposition"
    assert rx_change["inputs"]["cylinder"] == 1.50


def test_normalize_to_a_plus_cylinder_lab(order_dict):
    from lenslane.config import parse_config
    from lenslane.chain.host import start_host

    # Source: DOMAIN.md transposition example (MRCOphth mock-exam station), the other way round.
    host = start_host(parse_config('[engine]\ncylinder_form = "plus"\n'))
    order_dict["rx"]["right"] = {"sphere": -0.50, "cylinder": -1.50, "axis": 180}
    assert run_order(host, order_dict)["lenses"]["right"]["rx"] == {"sphere": -2.00, "cylinder": 1.50, "axis": 90}


@pytest.mark.parametrize("axis, expected", [(0, 180), (180, 180), (1, 1)])
def test_axis_is_written_1_to_180(default_host, order_dict, axis, expected):
    # Source: ISO 8429 axis notation (DOMAIN.md), written 1–180 (ORDER_FORMAT.md): 0° and 180° are one meridian.
    order_dict["rx"]["right"]["axis"] = axis
    assert run_order(default_host, order_dict)["lenses"]["right"]["rx"]["axis"] == expected


def test_a_sphere_gets_axis_180_and_keeps_its_add(default_host, order_dict):
    order_dict["lens"]["design"] = "progressive"
    order_dict["rx"]["right"]["add"] = 2.0
    order_dict["rx"]["left"]["add"] = 2.0
    left = run_order(default_host, order_dict)["lenses"]["left"]
    # Policy: the contract's normalised rx (ORDER_FORMAT.md) writes a sphere as cylinder 0 at axis 180.
    assert left["rx"] == {"sphere": -1.25, "cylinder": 0.0, "axis": 180, "add": 2.0}


def test_prism_stage_resolves_words_and_degrees(default_host, order_dict):
    # Source: DOMAIN.md — Durham Technical Community College prism module: 1.5Δ up + 2Δ in → 2.5Δ,
    # 36.9° right, 143.1° left (angles computed from atan2).
    order_dict["rx"]["right"]["prism"] = [{"amount": 1.5, "base": "up"}, {"amount": 2.0, "base": "in"}]
    order_dict["rx"]["left"]["prism"] = [{"amount": 1.5, "base": 90}, {"amount": 2.0, "base": "in"}]
    lenses = run_order(default_host, order_dict)["lenses"]
    assert lenses["right"]["prism"] == {"amount": 2.5, "base_deg": 36.9}
    assert lenses["left"]["prism"] == {"amount": 2.5, "base_deg": 143.1}


def test_no_prism_is_written_as_zero(default_host, order_dict):
    # Policy: the contract writes an absent prism as 0Δ at 0°.
    assert run_order(default_host, order_dict)["lenses"]["right"]["prism"] == {"amount": 0.0, "base_deg": 0.0}


def test_a_mild_order_in_an_ordinary_frame_gets_no_flags_from_validate(default_host, order_dict):
    # Policy: no check of validate fires on a plain order.
    assert [f for f in flags(run_order(default_host, order_dict)) if f["stage"] == "validate"] == []


def test_fitting_height_outside_the_box_is_held(default_host, order_dict):
    # Policy: a fitting height above the box (no outline) cannot be made and is held.
    order_dict["fit"]["right"]["height_mm"] = 40.0  # box height 38
    result = run_order(default_host, order_dict)
    [flag] = flags(result, "fitting-height-outside-lens")
    assert flag["level"] == "review" and flag["eye"] == "right"
    assert result["status"] == "review"


def test_progressive_fitting_height_too_low(default_host, order_dict):
    order_dict["lens"]["design"] = "progressive"
    for eye in ("right", "left"):
        order_dict["rx"][eye]["add"] = 2.0
        order_dict["fit"][eye]["height_mm"] = 12.0
    # Policy: below the lab's least progressive fitting height (14 mm by default; common practice) in each eye.
    found = flags(run_order(default_host, order_dict), "fitting-height-low")
    assert [f["values"] for f in found] == [{"height_mm": 12.0, "minimum_mm": 14.0}] * 2


def test_large_decentration_and_pd_asymmetry(default_host, order_dict):
    # Source: DOMAIN.md boxing: decentration = (A + DBL)/2 − monocular PD = (52 + 18)/2 − 25 = 10 mm.
    order_dict["fit"]["right"]["pd_mm"] = 25.0
    result = run_order(default_host, order_dict)
    [flag] = flags(result, "decentration-large")
    assert flag["values"]["decentration_mm"] == pytest.approx(10.0)
    assert flag["values"]["frame_pd_mm"] == pytest.approx(70.0)  # Source: ISO 8624 frame PD = A + DBL = 52 + 18
    # Policy: monocular PDs 25 and 32 mm differ by more than the lab's 4 mm.
    assert flags(result, "pd-asymmetry")


def test_outline_inconsistent_with_the_box_is_held(default_host, order_dict):
    order_dict["frame"]["outline_mm"] = [22.0] * 72  # a 44 mm circle in a 52 × 38 box
    result = run_order(default_host, order_dict)
    found = flags(result, "outline-box-mismatch")
    assert {f["values"]["field"] for f in found} == {"frame.box_width_mm", "frame.box_height_mm"}
    # Source: ISO 8624 boxing (DOMAIN.md): a circle of radius 22 mm has a 44 × 44 mm box.
    assert [f["values"]["outline_mm"] for f in found] == [pytest.approx(44.0)] * 2
    assert result["status"] == "review"


def test_effective_diameter_smaller_than_the_box(default_host, order_dict):
    # Source: ISO 8624 (DOMAIN.md): ED is twice the longest radius from the box centre, so never less than the
    # box's width (52 mm) or height.
    order_dict["frame"]["effective_diameter_mm"] = 45.0
    assert flags(run_order(default_host, order_dict), "effective-diameter-small")
