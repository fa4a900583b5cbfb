"""What no spectacle lens can be is refused at intake; a bifocal order names its segment top."""
from __future__ import annotations

import json

import pytest

from lenslane.contract.intake import OrderRejected, read_order
from lenslane.plugins.materials import DEFAULT_MATERIALS


def problems_of(data) -> list[dict[str, str]]:
    with pytest.raises(OrderRejected) as caught:
        read_order(json.dumps(data).encode(), DEFAULT_MATERIALS)
    return caught.value.problems


def accepted(data):
    return read_order(json.dumps(data).encode(), DEFAULT_MATERIALS)[0]


def test_twenty_thousand_prism_components_are_refused_naming_the_field(order_dict):
    # Common practice: a prescription writes one or two prism components per eye; the contract allows four.
    order_dict["rx"]["right"]["prism"] = [{"amount": 15.0, "base": "in"}] * 20_000
    [problem] = problems_of(order_dict)
    assert problem["field"] == "rx.right.prism" and "at most 4" in problem["message"]


def test_four_components_are_accepted_and_five_are_not(order_dict):
    order_dict["rx"]["left"]["prism"] = [{"amount": 1.0, "base": base} for base in ("in", "up", "out", "down")]
    assert len(accepted(order_dict).rx.left.prism) == 4
    order_dict["rx"]["left"]["prism"].append({"amount": 1.0, "base": "in"})
    assert [p["field"] for p in problems_of(order_dict)] == ["rx.left.prism"]


def test_prism_components_adding_up_past_twenty_prism_dioptres_are_refused(order_dict):
    # Common practice: more than about 10Δ per eye is split between the eyes or made as a press-on prism;
    # 20Δ per eye bounds what any lab grinds.
    order_dict["rx"]["right"]["prism"] = [{"amount": 15.0, "base": "in"}, {"amount": 5.0, "base": "up"}]
    accepted(order_dict)
    order_dict["rx"]["right"]["prism"][1]["amount"] = 5.5
    [problem] = problems_of(order_dict)
    assert problem["field"] == "rx.right.prism" and "20.5Δ" in problem["message"]


def test_a_bifocal_needs_the_segment_height_of_each_eye(order_dict):
    # Source: ORDER_FORMAT.md, fit.<eye>.segment_height_mm "for bifocal".
    order_dict["lens"]["design"] = "bifocal"
    for eye in ("right", "left"):
        order_dict["rx"][eye]["add"] = 2.0
    order_dict["fit"]["left"]["segment_height_mm"] = 17.0
    [problem] = problems_of(order_dict)
    assert problem["field"] == "fit.right.segment_height_mm" and "bifocal" in problem["message"]
    order_dict["fit"]["right"]["segment_height_mm"] = 17.0
    assert accepted(order_dict).fit.right.segment_height_mm == 17.0


@pytest.mark.parametrize("height", [4.9, 40.1])
def test_a_segment_height_outside_5_to_40_mm_is_refused(order_dict, height):
    # Source: ORDER_FORMAT.md, segment_height_mm 5–40 mm.
    order_dict["fit"]["right"]["segment_height_mm"] = height
    assert [p["field"] for p in problems_of(order_dict)] == ["fit.right.segment_height_mm"]
