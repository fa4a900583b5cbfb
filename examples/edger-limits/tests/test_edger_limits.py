"""Tests of the ``edger_limits`` plugin, written the way an integrator tests a plugin.

Install the plugin first (``pip install -e examples/edger-limits``), then run
``python -m pytest examples/edger-limits/tests``. They use lenslane's test
helpers: :func:`lenslane.testing.run_chain` starts the engine exactly as a lab
does (so it also proves the entry point is found) and runs one order through a
chain; the ``lenslane_lab`` fixture (from lenslane's pytest plugin) makes a
real lab folder to process orders in.
"""
from __future__ import annotations

import pytest

from lenslane.config import ConfigError
from lenslane.contract.models import validate_order
from lenslane.testing import ChainRun, run_chain, sample_order
from lenslane_edger_limits import effective_diameter_mm, estimated_blank_mm

# An invented practice and wearer code; frame PD 52 + 18 = 70 mm, PD 31.5 mm: decentred 3.5 mm inward.
ORDER = sample_order(
    order_id="EDGE-0001",
    rx={"right": {"sphere": -2.00}, "left": {"sphere": -2.25}},
    frame={"box_width_mm": 52.0, "box_height_mm": 36.0, "bridge_mm": 18.0, "effective_diameter_mm": 55.5},
    fit={"right": {"pd_mm": 31.5}, "left": {"pd_mm": 31.5}},
)


def run(order: dict, **limits) -> ChainRun:
    """One order through a chain ending in ``edger_limits`` with these limits."""
    return run_chain(order, ["normalize", "edger_limits"], stages={"edger_limits": limits})


def with_frame(**frame) -> dict:
    return sample_order(**{**ORDER, "frame": {**ORDER["frame"], **frame}})


def test_blank_estimate_adds_twice_the_decentration_and_the_allowance():
    # From memory: minimum blank size = ED + 2 × decentration + about 2 mm (dispensing texts,
    # e.g. Brooks & Borish, System for Ophthalmic Dispensing). Frame PD 52 + 18 = 70, PD 31.5:
    # decentration 35 − 31.5 = 3.5 mm, so 55.5 + 7 + 2 = 64.5 mm.
    assert estimated_blank_mm(55.5, 3.5, 2.0) == pytest.approx(64.5)
    assert estimated_blank_mm(55.5, -3.5, 2.0) == pytest.approx(64.5)  # outward counts the same


def test_without_an_effective_diameter_the_box_diagonal_bounds_it():
    # Pythagoras: a 52 × 36 mm box has a diagonal of √(52² + 36²) = 63.25 mm.
    order = sample_order(**ORDER)
    del order["frame"]["effective_diameter_mm"]
    frame = validate_order(order, materials=["resin-1.50"]).frame
    assert effective_diameter_mm(frame) == pytest.approx(63.245, abs=1e-3)


def test_a_frame_within_the_limits_is_edged_in_house():
    ran = run(ORDER, edger="bench edger 2")
    assert ran.lens("right")["lab"]["edging"] == {
        "edger": "bench edger 2", "bevel": "v-bevel", "blank_mm": 64.5, "in_house": True}
    assert [c["field"] for c in ran.changes(stage="edger_limits")] == [
        "lenses.right.lab.edging", "lenses.left.lab.edging"]
    assert ran.changes(stage="edger_limits")[0]["before"] is None
    assert ran.flags(stage="edger_limits") == []
    # Who made the change: the result names the plugin's distribution and version.
    [made_by] = [e for e in ran.result["engine"]["chain"] if e["stage"] == "edger_limits"]
    assert (made_by["distribution"], made_by["version"]) == ("lenslane-edger-limits", "1.0.0")


def test_a_lens_too_shallow_for_the_block_is_held_for_review():
    ran = run(with_frame(box_height_mm=22.0, effective_diameter_mm=53.0), min_box_height_mm=24.0)
    assert ran.status == "review"
    assert [f["code"] for f in ran.flags(level="review")] == ["edger-lens-too-shallow"]
    assert ran.lens("left")["lab"]["edging"]["in_house"] is False


def test_a_blank_too_large_for_the_chamber_is_flagged_per_eye():
    flagged = [(f["code"], f["eye"]) for f in run(ORDER, max_blank_diameter_mm=60.0).flags()]
    assert flagged == [("edger-blank-too-large", "right"), ("edger-blank-too-large", "left")]


def test_a_drilled_mount_needs_a_drilling_unit():
    assert [f["code"] for f in run(with_frame(mount="drilled")).flags()] == ["edger-no-drilling"]
    drilling = run(with_frame(mount="drilled"), drills=True)
    assert drilling.flags() == []
    assert drilling.lens("right")["lab"]["edging"]["bevel"] == "flat edge, drilled"


def test_an_unknown_limit_stops_the_engine_with_its_key():
    with pytest.raises(ConfigError, match="stages.edger_limits.max_lens_mm"):
        run(ORDER, max_lens_mm=70.0)


def test_in_a_lab_the_routing_is_published_recorded_and_explained(lenslane_lab):
    lab = lenslane_lab('[engine]\nchain = ["validate", "normalize", "prism", "edger_limits"]\n'
                       '[stages.edger_limits]\nedger = "bench edger 2"\n')
    lab.drop(ORDER)
    assert lab.process() == 0
    assert lab.result("EDGE-0001")["lenses"]["right"]["lab"]["edging"]["edger"] == "bench edger 2"
    logged = [c for r in lab.audit_records("EDGE-0001") for c in r.get("changes") or [] if c["stage"] == "edger_limits"]
    assert [r["field"] for r in logged] == ["lenses.right.lab.edging", "lenses.left.lab.edging"]
    assert "Stage 4 of 4: edger_limits (lenslane-edger-limits 1.0.0)" in lab.explain("EDGE-0001")
