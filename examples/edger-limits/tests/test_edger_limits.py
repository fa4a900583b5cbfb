"""Tests of the ``edger_limits`` plugin, written the way an integrator tests a plugin.

Install the plugin first (``pip install -e examples/edger-limits``), then run
``python -m pytest examples/edger-limits/tests``. The chain tests start the
engine exactly as a lab does, so they also prove the entry point is found.
"""
from __future__ import annotations

import json

import pytest

from lenslane.config import ConfigError, LabConfig
from lenslane.chain.host import start_host
from lenslane.contract.intake import read_order
from lenslane.contract.models import validate_order
from lenslane.chain.pipeline import Pipeline
from lenslane_edger_limits import effective_diameter_mm, estimated_blank_mm

# An invented practice and wearer code.
ORDER = {
    "format": "lens-order/1", "order_id": "EDGE-0001", "account": "test-practice",
    "rx": {"right": {"sphere": -2.00}, "left": {"sphere": -2.25}},
    "lens": {"design": "single_vision", "material": "resin-1.50"},
    "frame": {"box_width_mm": 52.0, "box_height_mm": 36.0, "bridge_mm": 18.0, "effective_diameter_mm": 55.5},
    "fit": {"right": {"pd_mm": 31.5}, "left": {"pd_mm": 31.5}},
}


def run(order: dict, **limits) -> dict:
    """The result of one order through a chain ending in ``edger_limits`` with these limits."""
    config = LabConfig.model_validate({"engine": {"chain": ["normalize", "edger_limits"]},
                                       "stages": {"edger_limits": limits}})
    host = start_host(config)
    validated, parsed = read_order(json.dumps(order).encode(), host.settings.materials)
    return Pipeline(host).run(validated, parsed).result


def with_frame(**frame) -> dict:
    order = json.loads(json.dumps(ORDER))
    order["frame"].update(frame)
    return order


def test_blank_estimate_adds_twice_the_decentration_and_the_allowance():
    # From memory: minimum blank size = ED + 2 × decentration + about 2 mm (dispensing texts,
    # e.g. Brooks & Borish, System for Ophthalmic Dispensing). Frame PD 52 + 18 = 70, PD 31.5:
    # decentration 35 − 31.5 = 3.5 mm, so 55.5 + 7 + 2 = 64.5 mm.
    assert estimated_blank_mm(55.5, 3.5, 2.0) == pytest.approx(64.5)
    assert estimated_blank_mm(55.5, -3.5, 2.0) == pytest.approx(64.5)  # outward counts the same


def test_without_an_effective_diameter_the_box_diagonal_bounds_it():
    # Pythagoras: a 52 × 36 mm box has a diagonal of √(52² + 36²) = 63.25 mm.
    order = json.loads(json.dumps(ORDER))
    del order["frame"]["effective_diameter_mm"]
    frame = validate_order(order, materials=["resin-1.50"]).frame
    assert effective_diameter_mm(frame) == pytest.approx(63.245, abs=1e-3)


def test_a_frame_within_the_limits_is_edged_in_house():
    result = run(ORDER, edger="bench edger 2")
    edging = result["lenses"]["right"]["lab"]["edging"]
    assert edging == {"edger": "bench edger 2", "bevel": "v-bevel", "blank_mm": 64.5, "in_house": True}
    assert [c["field"] for c in result["changes"] if c["stage"] == "edger_limits"] == [
        "lenses.right.lab.edging", "lenses.left.lab.edging"]
    assert not [f for f in result["flags"] if f["stage"] == "edger_limits"]


def test_a_lens_too_shallow_for_the_block_is_held_for_review():
    result = run(with_frame(box_height_mm=22.0, effective_diameter_mm=53.0), min_box_height_mm=24.0)
    assert result["status"] == "review"
    assert [f["code"] for f in result["flags"]] == ["edger-lens-too-shallow"]
    assert result["lenses"]["left"]["lab"]["edging"]["in_house"] is False


def test_a_blank_too_large_for_the_chamber_is_flagged_per_eye():
    result = run(ORDER, max_blank_diameter_mm=60.0)
    flagged = [(f["code"], f["eye"]) for f in result["flags"]]
    assert flagged == [("edger-blank-too-large", "right"), ("edger-blank-too-large", "left")]


def test_a_drilled_mount_needs_a_drilling_unit():
    assert [f["code"] for f in run(with_frame(mount="drilled"))["flags"]] == ["edger-no-drilling"]
    assert run(with_frame(mount="drilled"), drills=True)["flags"] == []
    assert run(with_frame(mount="drilled"), drills=True)["lenses"]["right"]["lab"]["edging"]["bevel"] == (
        "flat edge, drilled")


def test_an_unknown_limit_stops_the_engine_with_its_key():
    with pytest.raises(ConfigError, match="stages.edger_limits.max_lens_mm"):
        run(ORDER, max_lens_mm=70.0)
