"""Prism base directions and the resultant of several components."""
from __future__ import annotations

import math

import pytest
from hypothesis import given
from hypothesis import strategies as st

from lenslane.plugins.optics.prism import base_direction, resultant_prism


def test_published_resultant_example_right_and_left():
    # Source: DOMAIN.md — Durham Technical Community College ophthalmic dispensing prism module:
    # 1.5Δ up + 2Δ in → 2.5Δ; the angles are computed from atan2 (36.9° right eye, 143.1° left eye).
    right = resultant_prism([(1.5, "up"), (2.0, "in")], "right")
    left = resultant_prism([(1.5, "up"), (2.0, "in")], "left")
    assert right.amount == pytest.approx(2.5, abs=0.005)
    assert right.base_deg == pytest.approx(36.9, abs=0.05)
    assert left.amount == pytest.approx(2.5, abs=0.005)
    assert left.base_deg == pytest.approx(143.1, abs=0.05)


def test_base_words_in_the_standard_notation():
    # Source: ISO 8429 standard notation as stated in ORDER_FORMAT.md: right eye in = 0°, left eye in = 180°.
    assert [base_direction(w, "right") for w in ("in", "up", "out", "down")] == [0, 90, 180, 270]
    assert [base_direction(w, "left") for w in ("in", "up", "out", "down")] == [180, 90, 0, 270]


def test_opposite_components_cancel():
    # Common practice: equal base-in and base-out prism neutralise each other.
    assert resultant_prism([(2.0, "in"), (2.0, "out")], "right").amount == pytest.approx(0.0, abs=1e-12)


def test_degrees_are_taken_as_given_for_either_eye():
    # Source: ISO 8429 notation (DOMAIN.md, ORDER_FORMAT.md): a base in degrees is 0–360° alike for both eyes;
    # 360° is 0°.
    assert resultant_prism([(3.0, 300.0)], "left").base_deg == pytest.approx(300.0)
    assert resultant_prism([(3.0, 360.0)], "right").base_deg == pytest.approx(0.0)


@given(st.lists(st.tuples(st.floats(0.01, 15), st.floats(0, 360)), min_size=1, max_size=4))
def test_resultant_is_the_vector_sum(components):
    # Source: vector addition of prism (any dispensing text); compared with complex-number addition.
    total = sum(a * complex(math.cos(math.radians(b)), math.sin(math.radians(b))) for a, b in components)
    prism = resultant_prism(components, "right")
    assert prism.amount == pytest.approx(abs(total), abs=1e-9)
    assert 0 <= prism.base_deg < 360
    if abs(total) > 1e-6:
        diff = (prism.base_deg - math.degrees(math.atan2(total.imag, total.real))) % 360
        assert min(diff, 360 - diff) < 1e-6
