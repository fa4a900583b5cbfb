"""Sphero-cylinders, the power matrix and transposition."""
from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from lenslane.plugins.optics.power import (in_form, meridian_power, power_matrix, principal_powers, sphero_cylinder,
                                  spherical_equivalent, transpose)

powers = st.floats(min_value=-30, max_value=30, allow_nan=False)
cylinders = st.floats(min_value=-12, max_value=12, allow_nan=False)
axes = st.floats(min_value=0.0, max_value=180.0, allow_nan=False)


def matrix_close(a, b, tol=1e-9):
    return all(abs(x - y) <= tol for x, y in zip(a, b))


def test_published_transposition_example():
    # Source: DOMAIN.md, transposition example from an MRCOphth refraction mock-exam station:
    # −2.00 +1.50 × 90 = −0.50 −1.50 × 180.
    assert transpose(-2.00, 1.50, 90) == pytest.approx((-0.50, -1.50, 180.0))
    assert in_form(-2.00, 1.50, 90, "minus") == pytest.approx((-0.50, -1.50, 180.0))
    assert in_form(-0.50, -1.50, 180, "plus") == pytest.approx((-2.00, 1.50, 90.0))


def test_power_matrix_against_the_published_definition_with_numpy():
    # Source: Long (1976), F = S·I + C·[[sin²α, −sinα cosα], [−sinα cosα, cos²α]]; built here independently
    # as S·I + C·n nᵀ with n the unit normal to the cylinder axis, n = (−sin α, cos α).
    for sphere, cylinder, axis in [(-4.25, -1.25, 170), (2.0, 3.5, 33), (0.0, -6.0, 90)]:
        a = math.radians(axis)
        normal = np.array([-math.sin(a), math.cos(a)])
        expected = sphere * np.eye(2) + cylinder * np.outer(normal, normal)
        got = power_matrix(sphere, cylinder, axis)
        assert got == pytest.approx((expected[0, 0], expected[0, 1], expected[1, 1]), abs=1e-12)


def test_minus_cylinder_axis_meridian_carries_the_sphere():
    # Source: definition of the cylinder axis: the power along the axis meridian is the sphere,
    # at 90° to it sphere + cylinder.
    matrix = power_matrix(-4.00, -2.00, 180)
    assert meridian_power(matrix, 0) == pytest.approx(-4.00)
    assert meridian_power(matrix, 90) == pytest.approx(-6.00)


def test_principal_powers_match_numpy_eigenvalues():
    # Source: the principal powers are the eigenvalues of F (Harris); numpy.linalg.eigh as the reference.
    matrix = power_matrix(1.75, -2.25, 37)
    expected, vectors = np.linalg.eigh(np.array([[matrix.xx, matrix.xy], [matrix.xy, matrix.yy]]))
    larger, smaller, axis = principal_powers(matrix)
    assert (smaller, larger) == pytest.approx(tuple(expected))
    # Source: DOMAIN.md (Long 1976): the axis is the direction of the larger power's eigenvector, 37° here.
    assert (larger, smaller) == pytest.approx((1.75, -0.50))
    direction = math.degrees(math.atan2(vectors[1, 1], vectors[0, 1])) % 180.0
    assert axis % 180.0 == pytest.approx(direction) and direction == pytest.approx(37.0)


@given(powers, cylinders, axes)
def test_transposition_never_changes_the_power_matrix(sphere, cylinder, axis):
    # Source: DOMAIN.md, plus- and minus-cylinder forms are the same lens (Long 1976: the same power matrix).
    assert matrix_close(power_matrix(sphere, cylinder, axis), power_matrix(*transpose(sphere, cylinder, axis)))


@given(powers, cylinders, axes)
def test_transposing_twice_is_the_identity(sphere, cylinder, axis):
    # Source: DOMAIN.md transposition (S, C, ax) → (S + C, −C, ax ± 90°), applied twice gives back (S, C, ax).
    back = transpose(*transpose(sphere, cylinder, axis))
    assert back.sphere == pytest.approx(sphere, abs=1e-9)
    assert back.cylinder == pytest.approx(cylinder, abs=1e-12)
    assert matrix_close(power_matrix(*back), power_matrix(sphere, cylinder, axis))


@given(powers, cylinders, axes, st.sampled_from(["minus", "plus"]))
def test_matrix_to_sphero_cylinder_round_trip(sphere, cylinder, axis, form):
    # Source: DOMAIN.md (Long 1976; Harris): (S, C, α) from the eigenvalues of F gives back F; the spherical
    # equivalent S + C/2 is half the trace of F, the same in either form; the axis is written 1–180 (ORDER_FORMAT.md).
    written = sphero_cylinder(power_matrix(sphere, cylinder, axis), form)
    assert matrix_close(power_matrix(*written), power_matrix(sphere, cylinder, axis), tol=1e-8)
    assert 0 < written.axis <= 180
    if form == "minus":
        assert written.cylinder <= 0
    else:
        assert written.cylinder >= 0
    assert spherical_equivalent(*written[:2]) == pytest.approx(spherical_equivalent(sphere, cylinder), abs=1e-9)


def test_spherical_lens_keeps_the_asked_axis():
    # Policy: a sphere has no axis of its own, so the one asked for is written.
    assert sphero_cylinder(power_matrix(-2.0), axis_if_spherical=90) == (-2.0, 0.0, 90.0)
