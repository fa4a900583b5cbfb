"""The lens pictures: drawn from a result's own numbers, to scale, in black and white."""
from __future__ import annotations

import copy
import json
import math
import re
import xml.etree.ElementTree as ET

import numpy as np
import pytest

from lenslane.report.pictures import (
    contour_segments, eye_pictures, lens_model, outline_picture, powers_picture, section, thickness_map_picture,
)
from tests.conftest import SAMPLES, run_order

SVG = "{http://www.w3.org/2000/svg}"
MINUS = "\u2212"


def sample_results(default_host):
    """Every sample order the engine publishes, as results of the default chain."""
    results = []
    for path in sorted(SAMPLES.glob("*.json")):
        if path.name.startswith("rejected-"):
            continue
        results.append(run_order(default_host, json.loads(path.read_text())))
    return results


def sag(power_d, index, y_mm):
    """The exact sag s = r − √(r² − y²), r = 1000 (n − 1) / F mm.

    Source: the sagitta formula and surface power F = (n − 1)/r, Jalie, The Principles of Ophthalmic Lenses
    (DOMAIN.md, "Surfaces, thickness, blank, weight").
    """
    if power_d == 0:
        return 0.0
    r = 1000.0 * (index - 1.0) / power_d
    return r - math.copysign(math.sqrt(r * r - y_mm * y_mm), r)


def spherical_result(sphere, front, index, centre_mm, radius_mm=25.0, prism=(0.0, 0.0), eye="right"):
    """A hand-made result: a spherical lens in a round outline, optical centre at the box centre."""
    lens = {"rx": {"sphere": sphere, "cylinder": 0.0, "axis": 180},
            "surfacing": {"sphere": sphere, "cylinder": 0.0, "axis": 180},
            "prism": {"amount": prism[0], "base_deg": prism[1]},
            "geometry": {"front_curve_d": front, "center_thickness_mm": centre_mm, "edge_min_mm": 0.0,
                         "edge_max_mm": 0.0, "blank_min_diameter_mm": 2 * radius_mm + 2, "weight_g": 1.0,
                         "optical_centre_mm": [0.0, 0.0]}}
    return {"order": {"lens": {"design": "single_vision", "material": "resin-1.50", "index": index},
                      "frame": {"box_width_mm": 2 * radius_mm, "box_height_mm": 2 * radius_mm, "bridge_mm": 18.0,
                                "outline_mm": [radius_mm] * 360},
                      "fit": {eye: {"pd_mm": 32.0}}},
            "lenses": {eye: lens}, "changes": []}


def test_the_pictures_thinnest_and_thickest_edge_are_the_results(default_host):
    # Worked again from the result's rounded surfacing power and centre thickness, the edges agree with
    # the published ones to their rounding: 0.05 mm each, and the centre thickness's own 0.05 mm.
    checked = 0
    for result in sample_results(default_host):
        for eye, lens in result["lenses"].items():
            model = lens_model(result, eye)
            if model is None:
                continue
            geometry = lens["geometry"]
            assert model.edge_mm[model.thinnest] == pytest.approx(geometry["edge_min_mm"], abs=0.11), result["order_id"]
            assert model.edge_mm[model.thickest] == pytest.approx(geometry["edge_max_mm"], abs=0.11), result["order_id"]
            assert model.center_thickness_mm == geometry["center_thickness_mm"]
            checked += 1
    assert checked >= 20


def test_the_thickness_map_labels_the_centre_and_the_edges_as_the_result_does(default_host):
    result = run_order(default_host, json.loads((SAMPLES / "progressive-minus-tilt-vertex-prism.json").read_text()))
    geometry = result["lenses"]["right"]["geometry"]
    text = thickness_map_picture(lens_model(result, "right"), "t").svg
    assert f"centre {geometry['center_thickness_mm']:.1f} mm" in text
    assert f"thinnest edge {geometry['edge_min_mm']:.1f} mm" in text
    assert f"thickest edge {geometry['edge_max_mm']:.1f} mm" in text


def test_a_section_front_follows_the_sag_formula_and_the_back_the_thick_lens_power():
    # −4.00 DS on a +4.00 D front, n 1.5, centre 2.0 mm, round outline of radius 25 mm.
    result = spherical_result(-4.0, 4.0, 1.5, 2.0)
    cut = section(lens_model(result, "right"), horizontal=True)
    assert cut.along_mm[0] == pytest.approx(-25.0, abs=0.01) and cut.along_mm[-1] == pytest.approx(25.0, abs=0.01)
    for along, front in zip(cut.along_mm[::40], cut.front_mm[::40]):
        assert front == pytest.approx(sag(4.0, 1.5, along), abs=1e-9)
    # Source: back vertex power Fv = F1/(1 − (t/n)F1) + F2 solved for F2 (Jalie), then the sag formula:
    # thickness at 25 mm = t − s(F1) + s(−F2 as a concave back).
    f2 = -4.0 - 4.0 / (1.0 - (2.0 / 1000.0 / 1.5) * 4.0)
    edge = 2.0 - sag(4.0, 1.5, 25.0) + sag(-f2, 1.5, 25.0)
    assert cut.back_mm[-1] - cut.front_mm[-1] == pytest.approx(edge, abs=1e-6)
    assert cut.back_mm[SECTION_MIDDLE] - cut.front_mm[SECTION_MIDDLE] == pytest.approx(2.0, abs=1e-9)


SECTION_MIDDLE = 120  # the optical centre: the middle of SECTION_POINTS = 241 points


def test_the_sag_formula_checks_against_its_worked_example():
    # Source: DOMAIN.md worked example — F +6, n 1.5, y 25 mm → exact sag 3.838 mm.
    assert sag(6.0, 1.5, 25.0) == pytest.approx(3.838, abs=5e-4)
    result = spherical_result(0.0, 6.0, 1.5, 3.0)
    model = lens_model(result, "right")
    assert float(model.front_sag_at(25.0)) == pytest.approx(3.838, abs=5e-4)


def test_thinning_prism_joins_the_prescribed_prism_in_the_wedge():
    # 3Δ base out (180°) prescribed and 4Δ base down (270°) thinning prism: one resultant of 5Δ
    # (Source: vector addition of prisms, P = √(H² + V²), as in the optics package's resultant_prism docs: 3-4-5).
    result = spherical_result(0.0, 0.0, 1.5, 4.0, prism=(3.0, 180.0))
    result["lenses"]["right"]["geometry"]["thinning_prism"] = {"amount": 4.0, "base_deg": 270.0}
    model = lens_model(result, "right")
    assert model.shape.prism_delta == pytest.approx(5.0)
    vertical = section(model, horizontal=False)
    thickness = vertical.back_mm - vertical.front_mm
    # Source: Jalie, g = P d / (100 (n − 1)): 4Δ down over the 50 mm vertical chord at n 1.5 → 4.0 mm.
    assert thickness[0] - thickness[-1] == pytest.approx(4.0, abs=1e-6)


def test_prism_makes_the_section_a_wedge_of_the_published_size():
    # A plano lens with plano surfaces and 3Δ base out (0° for the right eye is base in; 180° base out):
    # Source: Jalie — thickness difference g = P d / (100 (n − 1)); 3Δ over 50 mm at n 1.5 → 3.0 mm.
    result = spherical_result(0.0, 0.0, 1.5, 4.0, prism=(3.0, 180.0))
    cut = section(lens_model(result, "right"), horizontal=True)
    thickness = cut.back_mm - cut.front_mm
    assert thickness[0] - thickness[-1] == pytest.approx(3.0, abs=1e-6)  # thicker at −x, toward the base


def test_the_outline_is_drawn_to_scale_in_millimetres(default_host):
    result = run_order(default_host, json.loads((SAMPLES / "progressive-minus-tilt-vertex-prism.json").read_text()))
    picture = outline_picture(lens_model(result, "right"))
    root = ET.fromstring(picture.svg)
    outlines = [p for p in root.iter(f"{SVG}polygon") if p.get("stroke-width") == "0.6"]
    points = np.array([[float(v) for v in pair.split(",")] for pair in outlines[0].get("points").split()])
    frame = result["order"]["frame"]
    # The boxing system: the outline's box is A × B (ISO 8624); one SVG unit is one millimetre.
    assert np.ptp(points[:, 0]) == pytest.approx(frame["box_width_mm"], abs=0.05)
    assert np.ptp(points[:, 1]) == pytest.approx(frame["box_height_mm"], abs=0.05)
    bar = root.find(f"{SVG}g[@class='scale-bar']")
    first = bar.find(f"{SVG}line")
    assert float(first.get("x2")) - float(first.get("x1")) == pytest.approx(10.0)
    texts = [t.text for t in root.iter(f"{SVG}text")]
    assert "10 mm" in texts and "A 52.0 mm × B 36.0 mm" in texts
    # DP-1000 right: (A + DBL)/2 − PD = (52 + 18)/2 − 31.5 = 3.5 mm in (ISO 8624). The fitting cross at the
    # order's height 20 mm; the optical centre at the progressive's prism reference point 4 mm below it
    # (Common practice: DOMAIN.md, "often about 4 mm"; the lab's default): 20 − 4 − B/2 = 2.0 mm down.
    assert "optical centre 3.5 mm in, 2.0 mm down from the box centre" in texts
    assert "fitting cross, height 20.0 mm" in texts
    assert "optical centre (prism reference point)" in texts


def test_the_left_lens_is_the_mirror_image_of_the_right():
    right = lens_model(spherical_result(-2.0, 4.0, 1.5, 2.0, eye="right"), "right")
    result = spherical_result(-2.0, 4.0, 1.5, 2.0, eye="left")
    result["order"]["frame"]["outline_mm"] = [25.0 + 3.0 * math.cos(math.radians(a)) for a in range(360)]
    left = lens_model(result, "left")
    assert left.outline_mm[0, 0] == pytest.approx(-28.0)  # the right lens's 0° radius points to −x on the left
    assert right.outline_mm[0, 0] == pytest.approx(25.0)


def test_a_bifocal_shows_its_segment_top():
    result = spherical_result(1.0, 6.0, 1.523, 2.5)
    result["order"]["lens"]["design"] = "bifocal"
    result["order"]["fit"]["right"]["segment_height_mm"] = 18.0
    svg = outline_picture(lens_model(result, "right")).svg
    assert "segment top 18.0 mm above the box bottom" in svg
    # 18 mm above the bottom of a 50 mm box is 7 mm below its centre: SVG y = +7.
    assert re.search(r'<line x1="-25" y1="7" x2="25" y2="7"', svg)


def test_marching_squares_finds_a_straight_contour_where_it_is():
    # f(x, y) = x on a grid: the contour f = 0.3 is the line x = 0.3 (linear interpolation is exact here).
    xs = ys = np.linspace(-1.0, 1.0, 11)
    field = np.tile(xs, (len(ys), 1))
    segments = contour_segments(field, xs, ys, 0.3)
    assert len(segments) == len(ys) - 1
    for a, b in segments:
        assert a[0] == pytest.approx(0.3) and b[0] == pytest.approx(0.3)
    field[5, 6] = np.nan  # x = 0.2, a corner of the cells the line crosses
    assert len(contour_segments(field, xs, ys, 0.3)) < len(ys) - 1  # cells touching NaN draw nothing


def test_the_power_cross_shows_the_principal_meridians():
    # Source: a sphero-cylinder S C × α has power S in the axis meridian and S + C at 90° to it
    # (the power cross; Jalie, The Principles of Ophthalmic Lenses).
    svg = powers_picture({"sphere": -4.25, "cylinder": -1.25, "axis": 170},
                         {"sphere": -4.2, "cylinder": -1.12, "axis": 173}, "right").svg
    assert f"{MINUS}4.25 @ 170°" in svg and f"{MINUS}5.50 @ 80°" in svg
    assert f"{MINUS}4.20 @ 173°" in svg and f"{MINUS}5.32 @ 83°" in svg


def test_an_uncompensated_lens_has_no_power_picture_and_a_lens_without_geometry_none_at_all():
    result = spherical_result(-2.0, 4.0, 1.5, 2.0)
    assert [p.title for p in eye_pictures(result, "right")] == ["Outline in the frame", "Thickness", "Cross-sections"]
    bare = copy.deepcopy(result)
    del bare["lenses"]["right"]["geometry"]
    assert eye_pictures(bare, "right") == []


_GREY = re.compile(r"#([0-9a-f]{2})\1\1")


def test_every_picture_is_black_white_and_grey_only(default_host):
    # Readable printed in black and white: no colour carries meaning; every fill and stroke is a grey,
    # white, black, none or a pattern.
    for result in sample_results(default_host)[:4]:
        for eye in result["lenses"]:
            for picture in eye_pictures(result, eye):
                root = ET.fromstring(picture.svg)
                for element in root.iter():
                    for attribute in ("fill", "stroke"):
                        value = element.get(attribute)
                        if value is None or value in ("none", "#fff", "#000") or value.startswith("url(#"):
                            continue
                        assert _GREY.fullmatch(value), (picture.title, attribute, value)


def test_the_off_axis_errors_of_the_exact_method_are_drawn_where_it_ran():
    # The record's numbers (as the exact tilt method writes them), each drawn at its gaze direction:
    # nasal toward the nose, which seen from the front is +x for the right lens and −x for the left (ISO 8429).
    off_axis = {"gaze_angles_deg": [20.0, 30.0],
                "up": {"mean_d": [0.05, 0.12], "cylinder_d": [0.10, 0.25]},
                "down": {"mean_d": [0.04, 0.10], "cylinder_d": [0.08, 0.20]},
                "nasal": {"mean_d": [0.03, 0.09], "cylinder_d": [0.07, 0.18]},
                "temporal": {"mean_d": [-0.02, -0.06], "cylinder_d": [0.06, 0.15]}}
    result = spherical_result(-2.0, 4.0, 1.5, 2.0)
    assert "Off-axis errors" not in [p.title for p in eye_pictures(result, "right")]
    result["changes"] = [{"field": "lenses.right.surfacing", "inputs": {"method": "exact", "off_axis": off_axis}}]
    picture = eye_pictures(result, "right")[-1]
    assert picture.title == "Off-axis errors"
    root = ET.fromstring(picture.svg)
    texts = {t.text: (float(t.get("x")), float(t.get("y"))) for t in root.iter(f"{SVG}text")}
    assert f"M {MINUS}0.06" in texts and "cyl 0.25" in texts and "M +0.12" in texts
    assert texts["nasal"][0] > 0 and texts["temporal"][0] < 0
    assert texts["M +0.09"][0] == pytest.approx(30.0)  # 30° of gaze, one millimetre a degree
    result["lenses"]["left"] = result["lenses"].pop("right")
    result["order"]["fit"]["left"] = result["order"]["fit"].pop("right")
    result["changes"][0]["field"] = "lenses.left.surfacing"
    left = ET.fromstring(eye_pictures(result, "left")[-1].svg)
    texts = {t.text: float(t.get("x")) for t in left.iter(f"{SVG}text")}
    assert texts["nasal"] < 0 and texts["M +0.09"] == pytest.approx(-30.0)


def test_a_gaze_whose_pencil_misses_the_lens_is_drawn_as_beyond_it():
    # The exact tilt method records null where a gaze's pencil does not get through the lens (beyond its edge or
    # totally reflected): the picture says so at that gaze instead of a number.
    off_axis = {"gaze_angles_deg": [20.0, 30.0],
                "up": {"mean_d": [0.05, None], "cylinder_d": [0.10, None]},
                "down": {"mean_d": [0.04, 0.10], "cylinder_d": [0.08, 0.20]},
                "nasal": {"mean_d": [0.03, 0.09], "cylinder_d": [0.07, 0.18]},
                "temporal": {"mean_d": [-0.02, -0.06], "cylinder_d": [0.06, 0.15]}}
    result = spherical_result(-2.0, 4.0, 1.5, 2.0)
    result["changes"] = [{"field": "lenses.right.surfacing", "inputs": {"method": "exact", "off_axis": off_axis}}]
    root = ET.fromstring(eye_pictures(result, "right")[-1].svg)
    texts = {t.text: (float(t.get("x")), float(t.get("y"))) for t in root.iter(f"{SVG}text")}
    assert "beyond" in texts and "the lens" in texts and "M +0.05" in texts
    assert texts["beyond"][1] == pytest.approx(-30.0 + 0.2)  # beside the 30° gaze up (y grows downward)
