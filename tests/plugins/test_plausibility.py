"""Stage validate: implausible orders get a clear, documented outcome; a plain mild order gets no warning."""
from __future__ import annotations

import json

import pytest

from lenslane.chain.host import start_host
from lenslane.config import LabConfig
from tests.conftest import SAMPLES, run_order


def host(**validate):
    return start_host(LabConfig(stages={"validate": validate}))


def flags(result, code):
    return [f for f in result["flags"] if f["code"] == code]


def test_a_plain_mild_order_gets_no_warning(default_host, order_dict):
    # Issue 15: the new checks leave a plain order alone (−1.00 −0.50 × 90 / −1.25, resin-1.50, 52/18).
    order_dict["wearer"] = {"ref": "W-T11", "birth_year": 1984}
    order_dict["placed_at"] = "2026-11-30T15:04:05Z"
    order_dict["fit"]["right"]["height_mm"] = order_dict["fit"]["left"]["height_mm"] = 21.0
    result = run_order(default_host, order_dict)
    # Policy: an order every check passes is ready and carries no warning.
    assert result["status"] == "ready"
    assert [f for f in result["flags"] if f["level"] != "info"] == []


@pytest.mark.parametrize("field, value", [("sphere", -2.13), ("cylinder", -0.37)])
def test_a_value_off_the_quarter_dioptre_step_is_held(default_host, order_dict, field, value):
    # Common practice (DOMAIN.md): prescriptions are written in steps of 0.25 D; the issue's −2.13 and −0.37.
    order_dict["rx"]["right"].update({field: value, "axis": 90})
    result = run_order(default_host, order_dict)
    [flag] = flags(result, "rx-off-step")
    assert flag["level"] == "review" and flag["values"][field] == value and flag["eye"] == "right"
    assert result["status"] == "review"


def test_a_lab_that_allows_eighths_takes_two_twelve(order_dict):
    # Common practice (DOMAIN.md): some places write 0.12/0.125 D steps; 2.12 is 2.125 written to two decimals.
    order_dict["rx"]["right"] = {"sphere": -2.12, "cylinder": -0.37, "axis": 90}
    assert flags(run_order(host(prescription_step_d=0.12), order_dict), "rx-off-step") == []
    order_dict["rx"]["right"]["sphere"] = -2.10
    assert flags(run_order(host(prescription_step_d=0.125), order_dict), "rx-off-step")


def test_the_off_step_outcome_is_the_labs(order_dict):
    # Policy: the lab's off_step_level sets the flag's level.
    order_dict["rx"]["right"]["sphere"] = -2.13
    [flag] = flags(run_order(host(off_step_level="warning"), order_dict), "rx-off-step")
    assert flag["level"] == "warning"


def test_an_add_on_a_single_vision_order_is_held_and_not_surfaced(default_host, order_dict):
    # Common practice (DOMAIN.md): an add belongs to multifocal designs only.
    order_dict["rx"]["right"]["add"] = 2.0
    result = run_order(default_host, order_dict)
    [flag] = flags(result, "add-on-single-vision")
    assert flag["level"] == "review"
    assert "add" not in result["lenses"]["right"]["surfacing"]
    assert result["lenses"]["right"]["rx"]["add"] == 2.0  # as received, normalised


def test_an_index_contradicting_the_material_is_held(default_host, order_dict):
    # The issue: resin-1.60 with index 1.74.
    order_dict["lens"].update({"material": "resin-1.60", "index": 1.74})
    [flag] = flags(run_order(default_host, order_dict), "index-contradicts-material")
    # Source: DOMAIN.md's materials table (handbook values, from memory), resin 1.60 n_d 1.600.
    assert flag["level"] == "review" and flag["values"]["material_index"] == 1.6
    # Policy: within the lab's 0.01 index tolerance, a rounding of the same material.
    order_dict["lens"]["index"] = 1.605
    assert flags(run_order(default_host, order_dict), "index-contradicts-material") == []


def test_a_birth_year_after_the_order_date_is_held_and_no_negative_age_is_told(default_host, order_dict):
    order_dict["placed_at"] = "2026-11-30T10:00:00Z"
    order_dict["wearer"] = {"ref": "W-T12", "birth_year": 2030}
    result = run_order(default_host, order_dict)
    # Policy: a birth year after the order's year is held, and no age is worked out from it.
    [flag] = flags(result, "birth-year-after-order")
    assert flag["level"] == "review" and flag["values"] == {"birth_year": 2030, "order_year": 2026}
    assert flags(result, "impact-resistance-minor") == []


def test_a_fitting_height_outside_the_outline_below_the_pupil_is_held(default_host, order_dict):
    # The sample outline: the lens is lower at the pupil's position than its box; a height inside the box but
    # above the outline there cannot be made.
    sample = json.loads((SAMPLES / "sv-frame-outline.json").read_text())
    order_dict["frame"] = sample["frame"]
    order_dict["fit"]["right"] = {"pd_mm": 20.0, "height_mm": sample["frame"]["box_height_mm"] - 0.2}  # 14 mm in
    result = run_order(default_host, order_dict)
    [flag] = flags(result, "fitting-height-outside-lens")
    assert flag["values"]["lens_top_mm"] < flag["values"]["height_mm"]
    # Source: ISO 8624 (DOMAIN.md) decentration (50 + 18)/2 − 20 = 14 mm toward the nose (+x for the right lens);
    # the outline's radii at equal angles from 0° (ORDER_FORMAT.md), joined by chords, cross x = 14 mm at
    # 17.04 mm above and 17.04 mm below the box centre: 34.54 and 0.46 mm above the box bottom (B/2 = 17.5 mm).
    # The engine gives them to 0.1 mm.
    assert flag["values"]["lens_top_mm"] == pytest.approx(34.54, abs=0.05)
    assert flag["values"]["lens_bottom_mm"] == pytest.approx(0.46, abs=0.05)


def test_a_segment_height_outside_the_lens_is_held(default_host, order_dict):
    order_dict["lens"]["design"] = "bifocal"
    for eye in ("right", "left"):
        order_dict["rx"][eye]["add"] = 2.0
        order_dict["fit"][eye]["segment_height_mm"] = 17.0
    order_dict["fit"]["left"]["segment_height_mm"] = 39.0  # box height 38
    result = run_order(default_host, order_dict)
    # Policy: a segment top above the lens (no outline: its box) is held.
    [flag] = flags(result, "segment-height-outside-lens")
    assert flag["eye"] == "left" and result["status"] == "review"
