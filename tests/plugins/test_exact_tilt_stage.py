"""The tilt stage's ``exact`` method and the geometry stage's ``exact_best_form``, through the pipeline.

The published lens (surfacing power, front curve, centre thickness) is traced again with rayoptics, an
independent ray tracer, worn as the order says: it must give the eye the prescription carried to the
fitting distance, to within what the contract's rounding leaves.
"""
from __future__ import annotations

import copy
import json
import math

import numpy as np
import pytest

from lenslane.chain.host import start_host
from lenslane.config import LabConfig
from lenslane.plugins.optics.asworn import lens_direction, no_roll_axes, trace_chief_ray, worn_lens
from lenslane.plugins.optics.power import power_matrix, principal_powers
from lenslane.plugins.optics.surfaces import surface_radius_mm, toric_back_surface
from lenslane.plugins.optics.tilt import tilt_obliquity
from tests.conftest import run_order
from tests.plugins.optics.raytrace_reference import chief_exit, turn_about_z, vergence_matrix, worn_singlet

OBJECT_MM = 10.0

# An invented practice; a plus lens thick enough for its thickness to matter when tilted.
ORDER = {
    "format": "lens-order/1",
    "order_id": "TST-EX-0001",
    "account": "test-practice",
    "rx": {"right": {"sphere": 6.00, "cylinder": -1.00, "axis": 80}, "left": {"sphere": 5.50}, "vertex_mm": 12.0},
    "lens": {"design": "single_vision", "material": "resin-1.50"},
    "frame": {"box_width_mm": 52.0, "box_height_mm": 38.0, "bridge_mm": 18.0},
    "fit": {"right": {"pd_mm": 32.0}, "left": {"pd_mm": 32.0}, "vertex_mm": 14.0,
            "pantoscopic_deg": 12.0, "face_form_deg": 15.0},
}


def _run(stages, data=ORDER):
    return run_order(start_host(LabConfig(stages=stages)), data)


def _change(result, stage, field):
    return next(c for c in result["changes"] if c["stage"] == stage and c["field"] == field)


def _wanted(sphere, cylinder, axis):
    """The prescription at 12 mm carried to 14 mm, F (I − dF)⁻¹ with d = −2 mm, written out with numpy."""
    # Source: DOMAIN.md "Vertex distance", matrix form F′ = F (I − d F)⁻¹ (Jalie).
    a = math.radians(axis)
    f = np.array([[sphere + cylinder * math.sin(a) ** 2, -cylinder * math.sin(a) * math.cos(a)],
                  [-cylinder * math.sin(a) * math.cos(a), sphere + cylinder * math.cos(a) ** 2]])
    return f @ np.linalg.inv(np.eye(2) + 0.002 * f)


def _traced_by_rayoptics(surfacing, front_d, centre_mm, index, eye):
    """The published lens worn at the order's tilt, traced by rayoptics: vergence at the back-vertex plane."""
    matrix = power_matrix(surfacing["sphere"], surfacing["cylinder"], surfacing["axis"])
    back = toric_back_surface(front_d, matrix, centre_mm, index)
    theta, t = tilt_obliquity(ORDER["fit"]["pantoscopic_deg"], ORDER["fit"]["face_form_deg"], eye)
    rotation = np.array(no_roll_axes(lens_direction(theta, t))).T
    pose = rotation @ turn_about_z(back.meridian_a_deg - 90.0)  # the rayoptics toroid's profile lies along its y
    opm = worn_singlet(surface_radius_mm(front_d, index), surface_radius_mm(back.power_a_d, index, "back"),
                       surface_radius_mm(back.power_b_d, index, "back"), centre_mm, index, pose,
                       object_distance_mm=OBJECT_MM)
    # The chief ray leaves the back vertex along the line of sight: where it must enter (from our trace, which
    # only picks the ray; rayoptics traces it and its neighbours on its own and must find it leaving along z
    # through the back vertex).
    lens = worn_lens(front_d, matrix, centre_mm, index, theta, t)
    ray = trace_chief_ray(lens, (0.0, 0.0, 0.0), lens.to_lens((0.0, 0.0, 1.0)))
    back_vertex = pose[:, 2] * centre_mm                 # rayoptics puts the front vertex at the origin
    incoming = rotation @ np.array(ray.incoming)
    entry = rotation @ np.array(ray.front) + back_vertex
    start = entry - (entry[2] + OBJECT_MM) / incoming[2] * incoming
    exit_point, exit_direction = chief_exit(opm, start[:2], incoming)
    assert np.max(np.abs(exit_direction - [0.0, 0.0, 1.0])) < 1e-9
    assert np.max(np.abs(exit_point - back_vertex)) < 1e-9
    return vergence_matrix(opm, start=tuple(start[:2]), direction=tuple(incoming))


@pytest.mark.parametrize("eye", ["right", "left"])
def test_the_published_lens_traced_by_rayoptics_gives_the_prescription(eye):
    # Source: DOMAIN.md "Exact as-worn power" (the lens is right when its vergence at the back-vertex plane equals
    # the vertex-compensated wanted power), checked with rayoptics 0.9.8 on the published numbers. The contract
    # rounds the surfacing power to 0.01 D and the axis to 1°, the thickness to 0.1 mm: the published lens may
    # differ from the wanted power by about that, 0.02 D; Martin's lens differs by more (0.05 D and over).
    result = _run({"tilt": {"method": "exact"}})
    tilt = _change(result, "tilt", f"lenses.{eye}.surfacing")
    geometry = result["lenses"][eye]["geometry"]
    assert tilt["inputs"]["front_curve_d"] == geometry["front_curve_d"]
    assert round(tilt["inputs"]["center_thickness_mm"], 1) == geometry["center_thickness_mm"]  # published to 0.1 mm
    rx = result["lenses"][eye]["rx"]
    wanted = _wanted(rx["sphere"], rx.get("cylinder", 0.0), rx.get("axis", 180))
    traced = _traced_by_rayoptics(result["lenses"][eye]["surfacing"], geometry["front_curve_d"],
                                  geometry["center_thickness_mm"], 1.498, eye)
    assert np.max(np.abs(np.linalg.eigvalsh(traced - wanted))) < 0.02
    martin = _run({})
    martin_geometry = martin["lenses"][eye]["geometry"]
    traced_martin = _traced_by_rayoptics(martin["lenses"][eye]["surfacing"], martin_geometry["front_curve_d"],
                                         martin_geometry["center_thickness_mm"], 1.498, eye)
    assert np.max(np.abs(np.linalg.eigvalsh(traced_martin - wanted))) > 0.05


def test_the_exact_change_record_carries_martins_value_the_residual_and_the_off_axis_errors():
    # Policy (issue 16): the record carries the as-worn residual and Martin's value; the off-axis errors at 20°
    # and 30° in four directions. Martin's value must be what the martin method publishes for the same order.
    exact = _run({"tilt": {"method": "exact"}})
    martin = _run({})
    for eye in ("right", "left"):
        inputs = _change(exact, "tilt", f"lenses.{eye}.surfacing")["inputs"]
        published_martin = martin["lenses"][eye]["surfacing"]
        assert {k: round(v, 2) if k != "axis" else round(v) for k, v in inputs["martin_surfacing"].items()} == \
            published_martin
        assert inputs["asworn_residual_d"] < 1e-9
        assert inputs["published_asworn_residual_d"] < 0.02
        assert 1 <= inputs["solution_rounds"] <= 4
        off_axis = inputs["off_axis"]
        assert off_axis["gaze_angles_deg"] == [20.0, 30.0]
        for direction in ("up", "down", "nasal", "temporal"):
            assert len(off_axis[direction]["mean_d"]) == 2 and len(off_axis[direction]["cylinder_d"]) == 2
        assert _change(exact, "tilt", f"lenses.{eye}.surfacing")["method"].startswith("the surfacing power whose")


def test_martin_stays_the_default_and_naming_it_changes_nothing():
    # Policy: martin (ORDER_FORMAT.md's compensation model) is the default; a lab that names it gets the very
    # same result, config hash included.
    assert json.dumps(_run({})) == json.dumps(_run({"tilt": {"method": "martin"}}))
    assert json.dumps(_run({})) != json.dumps(_run({"tilt": {"method": "exact"}}))


def test_an_unknown_tilt_method_is_refused_with_its_path():
    # Policy: a bad config value stops the engine with a clear error naming the field path.
    from lenslane.config import ConfigError
    with pytest.raises(ConfigError, match="stages.tilt.method"):
        start_host(LabConfig(stages={"tilt": {"method": "coddington"}}))


def test_exact_best_form_chooses_the_least_error_base_and_records_it():
    # Source: Atchison (1992), Applied Optics 31:3579 (from memory); policy (issue 16): among the stocked bases, the one whose lens has
    # the least off-axis error, with the numbers recorded; with the exact tilt, the tilt stage solved the lens
    # for the very front the geometry stage then chose.
    result = _run({"tilt": {"method": "exact"}, "geometry": {"front_curve_method": "exact_best_form"}})
    for eye in ("right", "left"):
        geometry = _change(result, "geometry", f"lenses.{eye}.geometry")
        front = geometry["inputs"]["front_curve_d"]
        scores = {c["base_d"]: c["score_d"] for c in front["candidates"]}
        assert geometry["after"]["front_curve_d"] == min(scores, key=scores.get)
        assert len(scores) >= 5 and max(scores.values()) > 2 * min(scores.values())
        assert set(front["off_axis"]) == {"gaze_angles_deg", "up", "down", "nasal", "temporal"}
        assert "least RMS of the largest meridional error" in geometry["method"]
        tilt = _change(result, "tilt", f"lenses.{eye}.surfacing")
        assert tilt["inputs"]["front_curve_d"] == geometry["after"]["front_curve_d"]


def test_exact_best_form_says_when_no_stocked_base_makes_the_lens():
    # Common practice: a strong plus lens in a high index may be steeper than every stocked base allows; with no
    # lens to judge, the best form gives way to Vogel's rule with a note saying why, never a wrong reason.
    data = copy.deepcopy(ORDER)
    data["rx"] = {"right": {"sphere": 9.0}, "left": {"sphere": 9.0}, "vertex_mm": 12.0}
    data["lens"]["material"] = "resin-1.74"
    result = _run({"geometry": {"front_curve_method": "exact_best_form"}}, data)
    notes = [f for f in result["flags"] if f["code"] == "front-curve-no-best-form"]
    assert {f["eye"] for f in notes} == {"right", "left"}
    for note in notes:
        assert note["message"].startswith("the exact best form has no lens to judge: no stocked base gives a lens "
                                          "that can be made; Vogel's rule is used instead.")
    geometry = _change(result, "geometry", "lenses.right.geometry")
    assert "Vogel's rule" in geometry["method"] and "candidates" not in geometry["inputs"]["front_curve_d"]


def test_exact_falls_back_to_martin_with_a_warning_when_no_lens_can_be_made():
    # Source: DOMAIN.md "Surfaces, thickness": a front curve steeper than the lens is wide makes no lens; the
    # exact method needs the lens's shape, so it says so and keeps Martin's compensation.
    data = copy.deepcopy(ORDER)
    data["lens"]["front_curve_d"] = 14.0
    data["frame"].update({"box_width_mm": 62.0, "box_height_mm": 50.0})
    data["fit"]["right"]["pd_mm"] = 26.0
    data["fit"]["left"]["pd_mm"] = 26.0
    exact = _run({"tilt": {"method": "exact"}}, data)
    martin = _run({}, data)
    flags = [f for f in exact["flags"] if f["code"] == "tilt-exact-not-possible"]
    assert flags and all("Martin's formula is used instead" in f["message"] for f in flags)
    assert exact["lenses"]["right"]["surfacing"] == martin["lenses"]["right"]["surfacing"]


def test_rayoptics_tracer_sees_a_principal_power_per_meridian():
    # Source: thick-lens back vertex power (Jalie) — the test's own tracer set-up, checked untilted: rayoptics gives
    # back the surfacing power of a toric lens built by toric_back_surface, so its use above measures the lens.
    surfacing = {"sphere": -3.0, "cylinder": -1.5, "axis": 30}
    back = toric_back_surface(5.0, power_matrix(-3.0, -1.5, 30), 2.0, 1.6)
    opm = worn_singlet(surface_radius_mm(5.0, 1.6), surface_radius_mm(back.power_a_d, 1.6, "back"),
                       surface_radius_mm(back.power_b_d, 1.6, "back"), 2.0, 1.6,
                       turn_about_z(back.meridian_a_deg - 90.0))
    larger, smaller, direction = principal_powers(power_matrix(surfacing["sphere"], surfacing["cylinder"], 30))
    eig = np.linalg.eigvalsh(vergence_matrix(opm))
    assert eig[1] == pytest.approx(larger, abs=1e-6) and eig[0] == pytest.approx(smaller, abs=1e-6)
