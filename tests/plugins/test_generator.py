"""Stage generator: the surfacing power on the lab's generator step, tiny cylinders dropped — each recorded."""
from __future__ import annotations

import math

import pytest

from lenslane.chain.host import start_host
from lenslane.config import LabConfig
from tests.conftest import run_order


def host(**generator):
    return start_host(LabConfig(stages={"generator": generator}))


def generator_changes(result, eye="right"):
    return [c for c in result["changes"] if c["stage"] == "generator" and c["field"] == f"lenses.{eye}.surfacing"]


def tilted_plus_one(order_dict):
    # A +1.00 sphere worn with 20° of face form and 4° of pantoscopic tilt picks up about a tenth of cylinder.
    order_dict["rx"] = {"right": {"sphere": 1.0}, "left": {"sphere": 1.0}}
    order_dict["fit"].update({"pantoscopic_deg": 4.0, "face_form_deg": 20.0})
    return order_dict


def test_a_cylinder_below_the_minimum_is_dropped_keeping_the_spherical_equivalent(order_dict):
    # Common practice: a dropped cylinder leaves the spherical equivalent S + C/2, so each meridian moves by
    # half the cylinder. The lab's minimum is set to 0.25 D here so that the tilt's cylinder falls under it.
    result = run_order(host(minimum_cylinder_d=0.25), tilted_plus_one(order_dict))
    [tilt] = [c for c in result["changes"] if c["stage"] == "tilt" and c["field"] == "lenses.right.surfacing"]
    dropped, *rest = generator_changes(result)
    assert dropped["method"].startswith("cylinder below the minimum dropped")
    before = dropped["inputs"]["before"]
    # Source: DOMAIN.md tilt compensation F_lens = S⁻ᵀ F_w S⁻¹ / k (Harris 2002), F_w = +1.00·I, n 1.498,
    # cos θ = cos 4° · cos 20°: principal powers 1/k along the tilt axis and cos²θ/k across it, so sphere
    # 1/k = +0.961, cylinder −sin²θ/k = −0.117, axis 90° + atan2(sin 4°, sin 20°) = 101.53°.
    cos_theta = math.cos(math.radians(4.0)) * math.cos(math.radians(20.0))
    sin2 = 1.0 - cos_theta ** 2
    k = 1.0 + sin2 / (2.0 * 1.498)
    assert before["sphere"] == pytest.approx(1.0 / k, abs=1e-9)
    assert before["cylinder"] == pytest.approx(-sin2 / k, abs=1e-9)
    assert before["axis"] == pytest.approx(90.0 + math.degrees(math.atan2(math.sin(math.radians(4.0)),
                                                                         math.sin(math.radians(20.0)))), abs=1e-6)
    assert 0 < abs(before["cylinder"]) < 0.25
    assert dropped["after"]["cylinder"] == 0.0
    assert result["lenses"]["right"]["surfacing"]["cylinder"] == 0.0
    # Source: DOMAIN.md, the spherical equivalent S + C/2 = 1/k − sin²θ/(2k) = +0.903, on the 0.01 D step.
    assert result["lenses"]["right"]["surfacing"]["sphere"] == pytest.approx(
        before["sphere"] + before["cylinder"] / 2.0, abs=0.005)
    assert tilt["after"]["cylinder"] != 0.0


def test_the_default_keeps_a_cylinder_the_lab_can_make(default_host, order_dict):
    # The default minimum (0.06 D, from memory) keeps the tenths of a dioptre tilt compensation is for.
    order_dict["rx"] = {"right": {"sphere": 6.0}, "left": {"sphere": 6.0}}
    order_dict["fit"].update({"pantoscopic_deg": 12.0})
    result = run_order(default_host, order_dict)
    assert abs(result["lenses"]["right"]["surfacing"]["cylinder"]) >= 0.06
    # Source: DOMAIN.md tilt compensation (Harris 2002) for +6.00·I at 12°, n 1.498: cylinder −6 sin²θ/k = −0.26 D,
    # axis 180 (the pantoscopic tilt axis).
    sin2 = math.sin(math.radians(12.0)) ** 2
    expected = -6.0 * sin2 / (1.0 + sin2 / (2.0 * 1.498))
    assert result["lenses"]["right"]["surfacing"]["cylinder"] == pytest.approx(expected, abs=0.005)
    assert result["lenses"]["right"]["surfacing"]["axis"] == 180
    assert not any(c["method"].startswith("cylinder below") for c in generator_changes(result))


def test_the_surfacing_power_is_rounded_once_to_the_generator_step(order_dict):
    # Policy: a generator working in 0.25 D steps (the lab's setting) gets sphere and cylinder on that step, each
    # the nearest step to the compensated power, in one change.
    order_dict["rx"] = {"right": {"sphere": -4.25, "cylinder": -1.25, "axis": 170},
                        "left": {"sphere": -3.75, "cylinder": -0.75, "axis": 10}}
    order_dict["fit"].update({"vertex_mm": 14.0, "pantoscopic_deg": 9.0})
    result = run_order(host(step_d=0.25), order_dict)
    for eye in ("right", "left"):
        [rounded] = generator_changes(result, eye)
        assert rounded["inputs"]["step_d"] == 0.25
        surfacing = result["lenses"][eye]["surfacing"]
        for key in ("sphere", "cylinder"):
            assert surfacing[key] / 0.25 == pytest.approx(round(surfacing[key] / 0.25), abs=1e-9)
            assert surfacing[key] == pytest.approx(rounded["inputs"]["before"][key], abs=0.125 + 1e-9)


def test_a_power_already_on_the_step_is_not_touched(default_host, order_dict):
    # Policy: a plain order without compensation is on the 0.01 D step already, so no record.
    result = run_order(default_host, order_dict)
    assert generator_changes(result, "right") == generator_changes(result, "left") == []
    assert result["lenses"]["right"]["surfacing"] == result["lenses"]["right"]["rx"]


@pytest.mark.parametrize("key, value", [("step_d", 0.0), ("step_d", 0.5), ("minimum_cylinder_d", -0.1)])
def test_a_bad_generator_setting_stops_the_engine_at_start(key, value):
    # Policy: a step of zero or coarser than 0.25 D, or a negative minimum, is refused at start.
    from lenslane.config import ConfigError
    with pytest.raises(ConfigError, match=f"stages.generator.{key}"):
        host(**{key: value})
