"""The order contract (lens-order/1): every rule of ORDER_FORMAT.md, each with a clear message and field path."""
from __future__ import annotations

import json

import pytest

from lenslane.contract.intake import OrderRejected, read_order
from lenslane.contract.models import LensOrder, LensOrderResult
from lenslane.plugins.materials import DEFAULT_MATERIALS


def problems_of(data) -> list[dict[str, str]]:
    raw = data if isinstance(data, bytes) else json.dumps(data).encode()
    with pytest.raises(OrderRejected) as caught:
        read_order(raw, DEFAULT_MATERIALS)
    return caught.value.problems


def fields_of(data) -> set[str]:
    return {p["field"] for p in problems_of(data)}


def test_the_minimal_order_is_valid(order_dict):
    order, parsed = read_order(json.dumps(order_dict).encode(), DEFAULT_MATERIALS)
    assert order.rx.right.sphere == -1.0
    assert order.frame.mount == "full_rim"  # default from the contract
    assert order.rx.left.cylinder == 0.0  # default from the contract
    assert parsed == order_dict


def test_the_contract_example_is_valid():
    # Source: ORDER_FORMAT.md, the example order (outline shortened to the contract's 36-radius minimum).
    example = {
        "format": "lens-order/1", "order_id": "HB-20261130-0007", "placed_at": "2026-11-30T15:04:05Z",
        "account": "harbour-optics", "wearer": {"ref": "W-5521", "birth_year": 1984},
        "rx": {"right": {"sphere": -4.25, "cylinder": -1.25, "axis": 170, "add": 2.25,
                         "prism": [{"amount": 1.0, "base": "in"}, {"amount": 0.5, "base": "up"}]},
               "left": {"sphere": -3.75, "cylinder": -0.75, "axis": 10, "add": 2.25}, "vertex_mm": 12.0},
        "lens": {"design": "progressive", "material": "polycarbonate-1.59", "index": 1.586, "front_curve_d": 4.0},
        "frame": {"box_width_mm": 52.0, "box_height_mm": 36.0, "bridge_mm": 18.0,
                  "effective_diameter_mm": 55.5, "mount": "full_rim", "outline_mm": [26.0] * 36},
        "fit": {"right": {"pd_mm": 31.5, "height_mm": 20.0}, "left": {"pd_mm": 31.0, "height_mm": 20.0},
                "vertex_mm": 13.5, "pantoscopic_deg": 9.0, "face_form_deg": 6.0},
    }
    read_order(json.dumps(example).encode(), DEFAULT_MATERIALS)


@pytest.mark.parametrize("path, value, field", [
    (("format",), "lens-order/2", "format"),
    (("order_id",), ".hidden", "order_id"),
    (("order_id",), "../../etc/passwd", "order_id"),
    (("order_id",), "x" * 65, "order_id"),
    (("order_id",), "", "order_id"),
    (("account",), "", "account"),
    (("account",), "a" * 65, "account"),
    (("placed_at",), "yesterday", "placed_at"),
    (("placed_at",), "2026-13-40T25:00:00Z", "placed_at"),
    (("rx", "right", "sphere"), 30.25, "rx.right.sphere"),
    (("rx", "right", "sphere"), -30.25, "rx.right.sphere"),
    (("rx", "right", "cylinder"), -12.25, "rx.right.cylinder"),
    (("rx", "right", "axis"), 181, "rx.right.axis"),
    (("rx", "right", "axis"), 90.5, "rx.right.axis"),
    (("rx", "right", "add"), 0.25, "rx.right.add"),
    (("rx", "right", "add"), 4.25, "rx.right.add"),
    (("rx", "vertex_mm"), 26.0, "rx.vertex_mm"),
    (("lens", "design"), "trifocal", "lens.design"),
    (("lens", "index"), 1.3, "lens.index"),
    (("lens", "front_curve_d"), 14.5, "lens.front_curve_d"),
    (("frame", "mount"), "rimless", "frame.mount"),
    (("fit", "right", "pd_mm"), 19.5, "fit.right.pd_mm"),
    (("fit", "right", "pd_mm"), 42.5, "fit.right.pd_mm"),
    (("fit", "vertex_mm"), 4.0, "fit.vertex_mm"),
    (("fit", "pantoscopic_deg"), 26.0, "fit.pantoscopic_deg"),
    (("fit", "pantoscopic_deg"), -6.0, "fit.pantoscopic_deg"),
    (("fit", "face_form_deg"), 36.0, "fit.face_form_deg"),
    (("wearer",), {"ref": "W-1", "name": "someone"}, "wearer.name"),
])
def test_each_range_and_type_rule_names_its_field(order_dict, path, value, field):
    # Source: ORDER_FORMAT.md, the table of lens-order/1 fields and ranges.
    node = order_dict
    for key in path[:-1]:
        node = node[key]
    node[path[-1]] = value
    assert field in fields_of(order_dict)


@pytest.mark.parametrize("value", ["-1.00", True, None, [1.0]])
def test_strict_types_reject_strings_booleans_and_null_for_numbers(order_dict, value):
    order_dict["rx"]["right"]["sphere"] = value
    assert "rx.right.sphere" in fields_of(order_dict)


def test_unknown_fields_are_rejected_at_every_level(order_dict):
    order_dict["colour"] = "blue"
    order_dict["rx"]["right"]["tint"] = 1
    assert {"colour", "rx.right.tint"} <= fields_of(order_dict)


@pytest.mark.parametrize("token", ["NaN", "Infinity", "-Infinity", "1e999"])
def test_nan_and_infinities_are_rejected(order_dict, token):
    raw = json.dumps(order_dict).replace('"sphere": -1.0', f'"sphere": {token}').encode()
    assert token.encode() in raw
    problems = problems_of(raw)
    assert problems and all(p["message"] for p in problems)


def test_cylinder_without_axis_is_rejected_at_the_axis(order_dict):
    del order_dict["rx"]["right"]["axis"]
    [problem] = problems_of(order_dict)
    assert problem["field"] == "rx.right.axis"
    assert "cylinder" in problem["message"]


def test_axis_zero_is_accepted_as_180(order_dict):
    order_dict["rx"]["right"]["axis"] = 0
    order, _ = read_order(json.dumps(order_dict).encode(), DEFAULT_MATERIALS)
    assert order.rx.right.axis == 0


def test_multifocal_needs_an_add_per_eye(order_dict):
    order_dict["lens"]["design"] = "progressive"
    order_dict["rx"]["right"]["add"] = 2.0
    assert fields_of(order_dict) == {"rx.left.add"}


def test_at_least_one_eye(order_dict):
    order_dict["rx"] = {"vertex_mm": 12.0}
    [problem] = problems_of(order_dict)
    assert problem["field"] == "rx" and "at least one eye" in problem["message"]


def test_one_eye_is_enough_and_needs_only_its_own_pd(order_dict):
    del order_dict["rx"]["left"]
    order_dict["fit"] = {"right": {"pd_mm": 32.0}}
    read_order(json.dumps(order_dict).encode(), DEFAULT_MATERIALS)


def test_a_pd_per_eye_made(order_dict):
    del order_dict["fit"]["left"]
    [problem] = problems_of(order_dict)
    assert problem["field"] == "fit.left.pd_mm"


def test_unknown_material_names_the_lab_table(order_dict):
    order_dict["lens"]["material"] = "unobtainium-2.0"
    [problem] = problems_of(order_dict)
    assert problem["field"] == "lens.material"
    assert "resin-1.50" in problem["message"]


@pytest.mark.parametrize("base", ["in", "out", "up", "down", 0, 45.5, 360])
def test_prism_bases_in_words_or_degrees(order_dict, base):
    order_dict["rx"]["right"]["prism"] = [{"amount": 1.0, "base": base}]
    read_order(json.dumps(order_dict).encode(), DEFAULT_MATERIALS)


@pytest.mark.parametrize("prism, field", [
    ({"amount": 0, "base": "in"}, "rx.right.prism.0.amount"),
    ({"amount": 15.5, "base": "in"}, "rx.right.prism.0.amount"),
    ({"amount": 1.0, "base": "left"}, "rx.right.prism.0.base"),
    ({"amount": 1.0, "base": 361}, "rx.right.prism.0.base"),
])
def test_prism_limits(order_dict, prism, field):
    order_dict["rx"]["right"]["prism"] = [prism]
    assert field in fields_of(order_dict)


def test_outline_length_limits(order_dict):
    order_dict["frame"]["outline_mm"] = [25.0] * 35
    assert "frame.outline_mm" in fields_of(order_dict)
    order_dict["frame"]["outline_mm"] = [25.0] * 1001
    assert "frame.outline_mm" in fields_of(order_dict)


def test_every_problem_is_listed_not_only_the_first(order_dict):
    order_dict["rx"]["right"]["sphere"] = 99.0
    order_dict["fit"]["right"]["pd_mm"] = 5.0
    order_dict["lens"]["design"] = "monofocal"
    assert {"rx.right.sphere", "fit.right.pd_mm", "lens.design"} <= fields_of(order_dict)


def test_messages_say_what_was_given(order_dict):
    order_dict["rx"]["right"]["sphere"] = 31.0
    [problem] = problems_of(order_dict)
    assert "30" in problem["message"] and "31" in problem["message"]


@pytest.mark.parametrize("raw, words", [
    (b"", "empty"),
    (b"[1, 2]", "object"),
    (b"null", "object"),
    (b'{"format": "lens-order/1", "format": "x"}', "duplicate key"),
    (b"\xef\xbb\xbf{}", "byte-order mark"),
    (b'{"a": "\xff"}', "UTF-8"),
    (b'{"a": 1,}', "line 1, column"),
    (b"[" * 100_000 + b"]" * 100_000, "nested"),
    (b'{"a": ' + b"9" * 5000 + b"}", "digits"),
])
def test_hostile_files_get_a_plain_reason(raw, words):
    [problem] = problems_of(raw)
    assert words in problem["message"]


def test_the_schemas_are_published_from_the_models():
    order_schema = LensOrder.model_json_schema()
    assert order_schema["title"] == "lens-order/1"
    assert order_schema["additionalProperties"] is False
    assert set(order_schema["required"]) == {"format", "order_id", "account", "rx", "lens", "frame", "fit"}
    result_schema = LensOrderResult.model_json_schema()
    assert result_schema["title"] == "lens-order-result/1"
    assert {"lenses", "changes", "flags", "engine", "status"} <= set(result_schema["required"])


@pytest.mark.parametrize("model, name", [(LensOrder, "lens-order-1.schema.json"),
                                         (LensOrderResult, "lens-order-result-1.schema.json")])
def test_the_published_schema_files_match_the_models(model, name):
    from tests.conftest import REPO

    published = json.loads((REPO / "schema" / name).read_text())
    assert published == model.model_json_schema(), f"regenerate schema/{name} with `lenslane schema`"
