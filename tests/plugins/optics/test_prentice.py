"""Prentice's rule in matrix form, vertical imbalance at the reading level, transverse chromatic aberration."""
from __future__ import annotations

import math

import pytest
from hypothesis import given
from hypothesis import strategies as st

from lenslane.plugins.optics.power import power_matrix
from lenslane.plugins.optics.prentice import (
    prentice_prism, prentice_prism_vector, transverse_chromatic_aberration, vertical_imbalance,
)


def test_prentice_published_example_base_down():
    # Source: DOMAIN.md Prentice example, −4.00 −2.00 × 180, 5 mm below the optical centre → 3.0Δ base down
    # (computed from the rule P = cF in the vertical meridian, −6.00 D × 0.5 cm).
    prism = prentice_prism(power_matrix(-4.00, -2.00, 180), 0.0, -5.0)
    assert prism.amount == pytest.approx(3.0)
    assert prism.base_deg == pytest.approx(270.0)


def test_vertical_imbalance_published_example():
    # Source: an opticianry training page on vertical imbalance (DOMAIN.md): +1.00 / +4.00 at 10 mm → 3.0Δ.
    assert vertical_imbalance(power_matrix(1.00), power_matrix(4.00), 10.0) == pytest.approx(3.0)


def test_vertical_imbalance_uses_the_vertical_meridian():
    # Source: |F90,R − F90,L| × c (DOMAIN.md): −2.00 −1.00 × 180 has −3.00 vertically, −3.00 −1.00 × 90 has −3.00.
    assert vertical_imbalance(power_matrix(-2.0, -1.0, 180), power_matrix(-3.0, -1.0, 90)) == pytest.approx(0.0)


def test_transverse_chromatic_aberration_published_example():
    # Source: an opticianry exam-preparation guide (DOMAIN.md): 5Δ in polycarbonate (V 30) → 0.17Δ.
    assert transverse_chromatic_aberration(5.0, 30.0) == pytest.approx(0.17, abs=0.005)


def test_a_point_on_the_cylinder_axis_has_only_the_sphere_prism():
    # Source: a cylinder has no power along its axis (definition); Prentice's rule with the sphere alone.
    h, v = prentice_prism_vector(power_matrix(0.0, -2.0, 45), 10.0 * math.cos(math.radians(45)),
                                 10.0 * math.sin(math.radians(45)))
    assert (h, v) == pytest.approx((0.0, 0.0), abs=1e-12)


@given(st.floats(-20, 20), st.floats(-30, 30), st.floats(-30, 30))
def test_matrix_form_reduces_to_prentices_rule_for_a_sphere(sphere, x, y):
    # Source: Prentice (1890), P = c F with c in cm; base toward the edge for minus, toward the centre for plus.
    prism = prentice_prism_vector(power_matrix(sphere), x, y)
    assert math.hypot(*prism) == pytest.approx(math.hypot(x, y) / 10.0 * abs(sphere), abs=1e-9)
    assert prism[0] * x + prism[1] * y == pytest.approx(-sphere * (x * x + y * y) / 10.0, abs=1e-9)
