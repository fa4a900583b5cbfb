"""Exact as-worn power of thick tilted lenses: against rayoptics, the thick-lens formula, Harris's thin-lens form,
Tscherning's ellipse and the check values of DOMAIN.md."""
from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from lenslane.plugins.optics.asworn import (
    GAZE_DIRECTIONS, WornLenses, asworn_vergence, best_form, coddington_vergence, exact_compensation, form_score, gaze_errors,
    largest_meridional_error, lens_direction, no_roll_rotation, off_axis_record, pencil_vergence, power_elements,
    worn_lenses,
)
from lenslane.plugins.optics.asworn import _through_lens
from lenslane.plugins.optics.front_curve import tscherning_front_curves
from lenslane.plugins.optics.power import PowerMatrix, power_matrix, sphero_cylinder
from lenslane.plugins.optics.surfaces import back_vertex_power, toric_back_surface
from lenslane.plugins.optics.thickness import LensShape, LensNotMakeable, solve_center_thickness
from lenslane.plugins.optics.tilt import exact_thin_factor, tilt_obliquity, tilted_power
from lenslane.plugins.optics.vertex import vertex_move
from raytrace_reference import chief_exit, vergence_matrix, worn_singlet


def _worn(front, surfacing: PowerMatrix, thickness, index, pantoscopic=0.0, face_form=0.0, eye="right"):
    theta, t = tilt_obliquity(pantoscopic, face_form, eye)
    return worn_lenses([front], [surfacing], thickness, index, theta, t)


def _sphero_cylinder(elements, form="minus"):
    sphere, cylinder, axis = sphero_cylinder(PowerMatrix(*elements), form)
    return round(sphere, 2), round(cylinder, 2), round(axis, 1)


# --------------------------------------------------------------------------
# The untilted lens: the thick-lens back vertex power
# --------------------------------------------------------------------------

surfacings = st.tuples(st.floats(-12.0, 12.0), st.floats(-4.0, 0.0), st.floats(0.0, 180.0))


@settings(max_examples=60, deadline=None)
@given(surfacings, st.floats(0.5, 10.0), st.floats(1.0, 12.0), st.sampled_from([1.498, 1.586, 1.665, 1.74]))
def test_untilted_lens_gives_its_back_vertex_power(power, front, thickness, index):
    # Source: the thick-lens back vertex power Fv = F₁/(1 − (t/n)F₁) + F₂ per principal meridian (Jalie, The
    # Principles of Ophthalmic Lenses); DOMAIN.md "Exact as-worn power": untilted, to 1e-9 D.
    surfacing = power_matrix(*power)
    back = toric_back_surface(front, surfacing, thickness, index)
    vergence = asworn_vergence(_worn(front, surfacing, thickness, index))[0]
    larger, smaller = np.linalg.eigvalsh(vergence)[::-1]
    assert larger == pytest.approx(back_vertex_power(front, back.power_a_d, thickness, index), abs=1e-9)
    assert smaller == pytest.approx(back_vertex_power(front, back.power_b_d, thickness, index), abs=1e-9)
    assert np.max(np.abs(power_elements(vergence) - np.array(surfacing))) < 1e-9


@settings(max_examples=60, deadline=None)
@given(surfacings, st.floats(0.5, 10.0), st.floats(0.0, 12.0), st.sampled_from([1.498, 1.586, 1.74]),
       st.floats(-5.0, 25.0), st.floats(-5.0, 35.0), st.sampled_from(["right", "left"]))
def test_generalised_coddington_equals_the_neighbouring_rays(power, front, thickness, index, p, w, eye):
    # Source: two published ways to the same pencil — the generalised Coddington equations along the chief ray
    # (Kneisly, JOSA 54:229, 1964) and exactly traced neighbouring rays (Spencer & Murty 1962), the latter checked
    # against rayoptics above; DOMAIN.md names both. They must agree to 1e-9 D over the contract's tilt ranges.
    lenses = _worn(front, power_matrix(*power), thickness, index, p, w, eye)
    assert np.max(np.abs(coddington_vergence(lenses) - asworn_vergence(lenses))) < 1e-9


def test_generalised_coddington_gives_the_back_vertex_power_untilted():
    # Source: the thick-lens back vertex power (Jalie): DOMAIN.md example F₁ +10, F₂ −4, t 6 mm, n 1.5 → +6.417.
    surfacing = back_vertex_power(10.0, -4.0, 6.0, 1.5)
    assert round(surfacing, 3) == 6.417
    worn = coddington_vergence(_worn(10.0, power_matrix(surfacing), 6.0, 1.5))[0]
    assert np.max(np.abs(worn - surfacing * np.eye(2))) < 1e-9


# --------------------------------------------------------------------------
# DOMAIN.md check values
# --------------------------------------------------------------------------


def test_domain_thick_plus_lens_with_pantoscopic_tilt():
    # Source: DOMAIN.md check values (independent real-ray trace, vergence at the back-vertex plane):
    # +12.00 DS, n 1.586, front +9.00 D, centre 10.0 mm, pantoscopic 15° → +12.22 +0.81 × 180.
    worn = power_elements(asworn_vergence(_worn(9.0, power_matrix(12.0), 10.0, 1.586, pantoscopic=15.0)))[0]
    assert _sphero_cylinder(worn, "plus") == (12.22, 0.81, 180.0)
    # Martin's formula gives +12.25 +0.88 × 180 for the same lens (DOMAIN.md): the thickness is what differs.
    theta, t = tilt_obliquity(15.0, 0.0, "right")
    assert _sphero_cylinder(tilted_power(power_matrix(12.0), theta, t, 1.586), "plus") == (12.25, 0.88, 180.0)


def test_domain_thick_plus_lens_at_zero_thickness():
    # Source: DOMAIN.md check values — the same lens at zero thickness: +12.26 +0.88 × 180.
    worn = power_elements(asworn_vergence(_worn(9.0, power_matrix(12.0), 0.0, 1.586, pantoscopic=15.0)))[0]
    assert _sphero_cylinder(worn, "plus") == (12.26, 0.88, 180.0)


def test_domain_toric_lens_with_pantoscopic_tilt_and_face_form():
    # Source: DOMAIN.md check values: right lens −6.00 −2.00 × 30, n 1.600, front +3.00 D, centre 1.2 mm,
    # pantoscopic 10°, face form 15° → −6.84 −1.42 × 27.9.
    worn = power_elements(asworn_vergence(_worn(3.0, power_matrix(-6.0, -2.0, 30.0), 1.2, 1.6, 10.0, 15.0)))[0]
    assert _sphero_cylinder(worn) == (-6.84, -1.42, 27.9)


def test_domain_exact_compensation():
    # Source: DOMAIN.md check values: left lens, prescription +4.00 −1.00 × 90 refracted at 12 mm, n 1.498, front
    # +8.00 D, centre 4.5 mm, worn at 14 mm with pantoscopic 8° and face form 10° → surface +3.86 −0.99 × 85.9.
    wanted = vertex_move(power_matrix(4.0, -1.0, 90.0), 12.0, 14.0)
    theta, t = tilt_obliquity(8.0, 10.0, "left")
    solved = exact_compensation([wanted], 8.0, 1.498, theta, t, lambda surfacing: np.full(len(surfacing), 4.5))
    assert _sphero_cylinder(solved.surfacing[0]) == (3.86, -0.99, 85.9)
    assert solved.residual_d[0] < 1e-9
    assert solved.steps <= 4
    # The solution, traced afresh, is worn as the wanted power.
    again = asworn_vergence(worn_lenses([8.0], solved.surfacing, 4.5, 1.498, theta, t))[0]
    assert np.max(np.abs(power_elements(again) - np.array(wanted))) < 1e-9


# --------------------------------------------------------------------------
# Zero thickness: Harris's tilted thin lens with the exact factor
# --------------------------------------------------------------------------


@pytest.mark.parametrize("power", [(5.0, 0.0, 180.0), (-5.0, -2.0, 30.0), (8.0, -3.0, 120.0), (-10.0, -4.0, 75.0)])
@pytest.mark.parametrize("p, w, eye", [(10.0, 0.0, "right"), (15.0, 20.0, "right"), (0.0, 25.0, "left"),
                                       (20.0, 10.0, "left")])
@pytest.mark.parametrize("index", [1.498, 1.74])
def test_zero_thickness_limit_is_the_tilted_thin_lens(power, p, w, eye, index):
    # Source: Harris, "Tilted power of thin lenses", Optom Vis Sci 2002 (power-matrix form k SᵀFS with the
    # tilt matrix S = I + (sec θ − 1) t tᵀ), with the exact oblique factor (√(n² − sin²θ) − cos θ)/(n − 1) of
    # Coddington's thin-lens equations in place of Martin's k (DOMAIN.md: a zero-thickness trace agrees).
    # Here it agrees to 1e-9 D for spheres and sphero-cylinders alike; the front curve must not matter.
    surfacing = power_matrix(*power)
    theta, t = tilt_obliquity(p, w, eye)
    martin = np.array(tilted_power(surfacing, theta, t, index))
    harris = martin * exact_thin_factor(theta, index) / (1.0 + math.sin(theta) ** 2 / (2.0 * index))
    for front in (2.0, 8.0):
        traced = power_elements(asworn_vergence(_worn(front, surfacing, 0.0, index, p, w, eye)))[0]
        assert np.max(np.abs(traced - harris)) < 1e-9


# --------------------------------------------------------------------------
# Against rayoptics: tilted, decentred, toric lenses
# --------------------------------------------------------------------------


def _turn_about_z(degrees):
    a = math.radians(degrees)
    return np.array([[math.cos(a), -math.sin(a), 0.0], [math.sin(a), math.cos(a), 0.0], [0.0, 0.0, 1.0]])


CASES = {
    # front r, back profile r, back sweep r (0: cylinder), thickness, index, pantoscopic, face form, eye,
    # toric roll (degrees), decentration (mm), measured how far beyond the exit point (mm)
    "toric, tilted both ways, decentred": (80.0, 60.0, 40.0, 3.0, 1.6, 10.0, 15.0, "right", 30.0, (1.0, -2.0), 0.0),
    "thick plus-ish meniscus, strong pantoscopic": (120.0, 50.0, 70.0, 8.0, 1.5, 20.0, 0.0, "right", 0.0, (0.0, 0.0),
                                                    0.0),
    "cylindrical back, wrap, left eye": (200.0, 90.0, 0.0, 2.0, 1.74, 5.0, 25.0, "left", 75.0, (-3.0, 2.0), 12.0),
    "high plus, decentred up": (45.0, 400.0, 150.0, 9.0, 1.586, 12.0, 8.0, "left", 120.0, (0.0, 4.0), 5.0),
}


@pytest.mark.parametrize("case", sorted(CASES))
def test_vergence_matches_rayoptics(case):
    # Source: rayoptics 0.9.8 real-ray trace (sequential model, YToroid back, coordinate breaks posing the lens),
    # vergence from finite differences of its exit rays — an independent implementation; to 1e-6 D.
    front_r, back_r, sweep_r, thickness, index, p, w, eye, roll, decenter, behind = CASES[case]
    theta, t = tilt_obliquity(p, w, eye)
    pose = no_roll_rotation(lens_direction(theta, t))[0] @ _turn_about_z(roll)
    reference = worn_singlet(front_r, back_r, sweep_r, thickness, index, pose, decenter)
    expected = vergence_matrix(reference, behind_mm=behind)
    curvature = [0.0 if r == 0.0 else 1.0 / r for r in (front_r, back_r, sweep_r)]
    # The same lens in our model; its own y axis (the torus profile's direction) turned by the roll.
    lens = WornLenses(np.array(curvature[:1]), np.array(curvature[1:2]), np.array(curvature[2:]),
                      np.array([[0.0, 1.0]]), np.array([thickness]), np.array([index]), pose[None])
    # rayoptics' frame has the front vertex at the decentration; ours has the back vertex at the origin.
    shift = np.array([decenter[0], decenter[1], 0.0]) + pose[:, 2] * thickness
    start = np.array([[0.0, 0.0, -5.0]]) - shift
    exit_point, direction = _through_lens(lens, start @ pose, np.array([[0.0, 0.0, 1.0]]) @ pose, backward=False)
    exit_point, direction = exit_point @ pose.T, direction @ pose.T
    assert np.max(np.abs(direction[0] - chief_exit(reference)[1])) < 1e-12
    across = np.array([1.0, 0.0, 0.0]) - direction[0, 0] * direction[0]
    across /= np.linalg.norm(across)
    frame = np.array([[across, np.cross(direction[0], across)]])
    ours = pencil_vergence(lens, exit_point + behind * direction, direction, frame)[0]
    assert np.max(np.abs(ours - expected)) < 1e-6
    assert np.max(np.abs(ours)) > 1.0  # a real power was compared


def test_the_traced_pose_is_the_contracts_tilt():
    # Source: DOMAIN.md "Exact as-worn power" — one rotation by θ about the axis in the frontal plane perpendicular
    # to t, no roll: the lens axis leans to (sin θ t, cos θ), and the lens's own x axis stays in the plane of x and
    # the axis of rotation (no twist about z). Rodrigues' formula; checked on the rotation itself.
    theta, t = tilt_obliquity(12.0, 18.0, "right")
    rotation = no_roll_rotation(lens_direction(theta, t))[0]
    assert np.allclose(rotation @ rotation.T, np.eye(3), atol=1e-15)
    assert np.allclose(rotation[:, 2], [math.sin(theta) * t[0], math.sin(theta) * t[1], math.cos(theta)], atol=1e-15)
    tilt_axis = np.array([-t[1], t[0], 0.0])
    assert np.allclose(rotation @ tilt_axis, tilt_axis, atol=1e-15)


# --------------------------------------------------------------------------
# Exact compensation with the thickness coupled
# --------------------------------------------------------------------------

RING = [[27.0 * math.cos(a), 27.0 * math.sin(a)] for a in np.linspace(0.0, 2.0 * math.pi, 72, endpoint=False)]


def _thickness_of(front, index, minimum_centre=2.0, minimum_edge=1.0):
    def thickness_of(surfacing):
        return np.array([solve_center_thickness(RING, LensShape(front, PowerMatrix(*s), index), minimum_centre,
                                                minimum_edge).center_mm for s in np.asarray(surfacing)])
    return thickness_of


@pytest.mark.parametrize("rx, front, index, p, w, eye", [
    ((10.0, -1.0, 90.0), 12.0, 1.498, 12.0, 20.0, "right"),
    ((-8.0, -2.0, 15.0), 2.0, 1.586, 8.0, 25.0, "left"),
    ((4.0, 0.0, 180.0), 8.0, 1.74, 20.0, 0.0, "right"),
])
def test_exact_compensation_with_the_lens_geometry(rx, front, index, p, w, eye):
    # Source: DOMAIN.md "Exact as-worn power" (the lens is right when its traced as-worn power equals the wanted
    # power) and the thickness model of Jalie (thickness from the back vertex power): the solved lens, at the
    # thickness its own surfacing power gives, is worn as the wanted power to 1e-9 D.
    wanted = power_matrix(*rx)
    theta, t = tilt_obliquity(p, w, eye)
    thickness_of = _thickness_of(front, index)
    solved = exact_compensation([wanted], front, index, theta, t, thickness_of)
    centre = thickness_of(solved.surfacing)[0]
    assert solved.center_mm[0] == centre
    worn = asworn_vergence(worn_lenses([front], solved.surfacing, centre, index, theta, t))[0]
    assert np.max(np.abs(power_elements(worn) - np.array(wanted))) < 1e-9
    assert solved.residual_d[0] < 1e-9
    assert solved.steps <= 6


def test_exact_compensation_of_several_lenses_at_once_equals_one_by_one():
    # Source: the method is per lens (Newton's method on each lens's own equations); batching must not mix lenses.
    wanted = [power_matrix(-3.0, -1.0, 40.0), power_matrix(6.0, -2.0, 100.0)]
    fronts, indices = [4.0, 9.0], [1.6, 1.498]
    thetas, tangentials = zip(*(tilt_obliquity(10.0, 12.0, eye) for eye in ("right", "left")))
    together = exact_compensation(wanted, fronts, indices, thetas, tangentials, lambda s: np.full(len(s), 3.0))
    for i in range(2):
        alone = exact_compensation([wanted[i]], fronts[i], indices[i], thetas[i], tangentials[i],
                                   lambda s: np.full(len(s), 3.0))
        assert np.max(np.abs(alone.surfacing[0] - together.surfacing[i])) < 1e-9


# --------------------------------------------------------------------------
# Off-axis: the eye turning behind the lens
# --------------------------------------------------------------------------


def test_best_form_of_a_thin_minus_lens_is_tscherning_at_small_angles():
    # Source: Tscherning's ellipse (third-order theory: Jalie; Atchison 1992, Applied Optics 31:3579) and DOMAIN.md
    # check value −5.00 D, n 1.523, z 27 mm → Ostwalt form +5.04 D. At 2° of gaze third-order theory holds, so the
    # front curve free of astigmatic error by exact trace must lie within 0.01 D of it; at 30° the exact form is
    # flatter (DOMAIN.md: third-order forms come out steeper than exact-trace forms).
    fronts = np.linspace(4.8, 5.3, 501)
    surfacing = np.tile(power_matrix(-5.0), (fronts.size, 1))

    def least_astigmatism(angle):
        lenses = worn_lenses(fronts, surfacing, 0.0, 1.523, 0.0, (0.0, 1.0))
        return fronts[np.argmin(gaze_errors(lenses, surfacing, ["right"] * fronts.size, 27.0, (angle,))
                                .cylinder_d[:, 0, 0])]

    expected = tscherning_front_curves(-5.0, 1.523, 27.0)[0]
    assert round(expected, 2) == 5.04
    assert least_astigmatism(2.0) == pytest.approx(expected, abs=0.01)
    wide = np.linspace(3.0, 5.3, 231)
    lenses = worn_lenses(wide, np.tile(power_matrix(-5.0), (wide.size, 1)), 0.0, 1.523, 0.0, (0.0, 1.0))
    errors = gaze_errors(lenses, np.tile(power_matrix(-5.0), (wide.size, 1)), ["right"] * wide.size, 27.0, (30.0,))
    assert wide[np.argmin(errors.cylinder_d[:, 0, 0])] < expected - 0.3


def test_gaze_errors_of_an_untilted_sphere_are_the_same_in_every_direction():
    # Source: rotational symmetry of a spherical lens about its axis through the centre of rotation (geometry).
    lenses = _worn(6.0, power_matrix(-4.0), 2.0, 1.6)
    errors = gaze_errors(lenses, [power_matrix(-4.0)], ["right"])
    for a in range(2):
        assert np.ptp(errors.mean_d[0, a]) < 1e-9 and np.ptp(errors.cylinder_d[0, a]) < 1e-9
    assert np.all(errors.cylinder_d[0, 1] > errors.cylinder_d[0, 0])  # worse at 30° than at 20°


def test_gaze_errors_mirror_between_the_eyes():
    # Source: ORDER_FORMAT.md — face form tilts the two lenses in mirror image (t = (±sin w, sin p)); mirror-image
    # lenses (axis α ↔ 180° − α) seen by mirror-image eyes give the same errors, nasal for nasal.
    right = _worn(5.0, power_matrix(-3.0, -1.5, 20.0), 2.0, 1.6, 8.0, 15.0, "right")
    left = _worn(5.0, power_matrix(-3.0, -1.5, 160.0), 2.0, 1.6, 8.0, 15.0, "left")
    e_right = gaze_errors(right, [power_matrix(-3.0, -1.5, 20.0)], ["right"])
    e_left = gaze_errors(left, [power_matrix(-3.0, -1.5, 160.0)], ["left"])
    assert np.allclose(e_right.mean_d, e_left.mean_d, atol=1e-9)
    assert np.allclose(e_right.cylinder_d, e_left.cylinder_d, atol=1e-9)
    assert tuple(GAZE_DIRECTIONS) == e_right.directions


def test_the_vertex_sphere_at_zero_gaze_is_the_back_vertex_plane():
    # Source: DOMAIN.md — the vertex sphere is about the centre of rotation through the back vertex: at 0° of gaze
    # the off-axis measure is the as-worn power itself.
    lenses = _worn(4.0, power_matrix(-6.0, -2.0, 30.0), 1.5, 1.6, 10.0, 15.0)
    wanted = np.array([power_matrix(-6.0, -2.0, 30.0)])
    errors = gaze_errors(lenses, wanted, ["right"], angles_deg=(0.0,))
    error = power_elements(asworn_vergence(lenses))[0] - wanted[0]
    assert np.allclose(errors.mean_d[0, 0], 0.5 * (error[0] + error[2]), atol=1e-12)


def test_largest_meridional_error_and_score():
    # Source: Thibos, Wheeler & Horner (1997), Optom Vis Sci 74:367: M = (E₁₁ + E₂₂)/2, J₀ = (E₁₁ − E₂₂)/2,
    # J₄₅ = E₁₂; the largest meridional error |M| + √(J₀² + J₄₅²) is the larger principal error's size.
    error = np.array([0.30, 0.10, -0.10])
    assert float(largest_meridional_error(error)) == pytest.approx(np.max(np.abs(np.linalg.eigvalsh(
        [[0.30, 0.10], [0.10, -0.10]]))), abs=1e-15)


def test_best_form_chooses_the_least_error_among_stocked_bases():
    # Source: Atchison (1992), Applied Optics 31:3579 — a form judged by its errors at 20°–35° of gaze; for a
    # +8 D lens in 1.67 a steep front is far better off axis than an 8 D front (issue 16's trace: at 30° the 8 D
    # front leaves over 1 D of mean power error). The chooser must return the candidate of least score.
    index, surfacing = 1.665, power_matrix(8.0)
    theta, t = tilt_obliquity(0.0, 0.0, "right")

    def thickness_of(base):
        return solve_center_thickness(RING, LensShape(base, surfacing, index), 1.3, 1.0).center_mm

    chosen = best_form(surfacing, index, theta, t, "right", [6.0, 8.0, 10.0, 12.0, 14.0], thickness_of)
    assert chosen.base_d == chosen.bases_d[int(np.argmin(chosen.score_d))]
    assert chosen.base_d > 8.0
    eight = chosen.bases_d.index(8.0)
    assert abs(chosen.errors.mean_d[eight, 1]).max() > 1.0
    assert form_score(chosen.errors)[eight] > 2 * chosen.score_d.min()


def test_best_form_leaves_out_bases_that_make_no_lens():
    # Source: the thickness model (Jalie): a front too steep for the lens's width makes no lens.
    def thickness_of(base):
        if base > 10.0:
            raise LensNotMakeable("too steep")
        return 2.0

    chosen = best_form(power_matrix(-2.0), 1.5, 0.0, (0.0, 1.0), "left", [2.0, 6.0, 12.0], thickness_of)
    assert chosen.bases_d == (2.0, 6.0)
    with pytest.raises(ValueError):
        best_form(power_matrix(-2.0), 1.5, 0.0, (0.0, 1.0), "left", [12.0], thickness_of)


def test_a_pencil_that_misses_the_lens_is_recorded_as_missing():
    # Source: geometry of the sphere — a front of radius 10 mm (n 1.6: +60 D) on a plano back cannot be met where
    # the 30° gaze through a centre of rotation 27 mm behind the back vertex crosses the back, 15.6 mm off the
    # axis; the error there is unknown (NaN, None in the record), the 5° gaze keeps its numbers, and the form's
    # score is infinite. The back vertex power of that lens: Fv = F₁/(1 − (t/n)F₁) (Jalie).
    surfacing = power_matrix(back_vertex_power(60.0, 0.0, 3.0, 1.6))
    lenses = _worn(60.0, surfacing, 3.0, 1.6)
    errors = gaze_errors(lenses, [surfacing], ["right"], angles_deg=(5.0, 30.0))
    assert np.all(np.isfinite(errors.mean_d[0, 0])) and np.all(np.isnan(errors.mean_d[0, 1]))
    record = off_axis_record(errors)
    assert record["up"]["mean_d"][1] is None and isinstance(record["up"]["mean_d"][0], float)
    assert form_score(errors)[0] == np.inf
