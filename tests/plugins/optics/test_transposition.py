"""Transposition never changes the lens: the power matrix is the same in both cylinder forms."""
from __future__ import annotations

from hypothesis import given, settings
from hypothesis import strategies as st

from lenslane.plugins.optics.power import power_matrix, sphero_cylinder, transpose


@settings(max_examples=300, deadline=None)
@given(st.floats(-30.0, 30.0, allow_nan=False), st.floats(-12.0, 12.0, allow_nan=False),
       st.floats(0.0, 180.0, allow_nan=False))
def test_transposition_never_changes_the_power_matrix(sphere, cylinder, axis):
    # Source: the transposition rule (S, C, α) → (S + C, −C, α ± 90°) (DOMAIN.md; Jalie) and the power
    # matrix of Long (1976), which is the same for both forms of one lens.
    written = transpose(sphere, cylinder, axis)
    before, after = power_matrix(sphere, cylinder, axis), power_matrix(*written)
    assert max(abs(a - b) for a, b in zip(before, after)) < 1e-9


@settings(max_examples=200, deadline=None)
@given(st.floats(-30.0, 30.0, allow_nan=False), st.floats(-12.0, 12.0, allow_nan=False),
       st.floats(0.0, 180.0, allow_nan=False))
def test_both_forms_read_back_to_the_same_matrix(sphere, cylinder, axis):
    # Source: Long (1976): eigen-decomposition of F gives the sphero-cylinder in either form.
    matrix = power_matrix(sphere, cylinder, axis)
    for form in ("minus", "plus"):
        again = power_matrix(*sphero_cylinder(matrix, form))
        assert max(abs(a - b) for a, b in zip(matrix, again)) < 1e-9
