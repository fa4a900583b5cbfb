"""Ray–surface intersection and vector Snell's law, against Snell's law itself and rayoptics' surface profiles."""
from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from rayoptics.elem.profiles import YToroid

from lenslane.plugins.optics.raytrace import (
    RayMissedSurface, intersect_sphere, intersect_torus, point_at, refract, sphere_normal, torus_curvature,
    torus_normal,
)

angles = st.floats(0.0, 80.0)
azimuths = st.floats(0.0, 360.0)
indices = st.floats(1.0, 2.0)


def _unit(v):
    v = np.asarray(v, dtype=float)
    return tuple(float(x) for x in v / np.linalg.norm(v))


@settings(max_examples=200, deadline=None)
@given(angles, azimuths, indices, indices)
def test_refraction_obeys_snells_law_in_the_plane_of_incidence(incidence, azimuth, n1, n2):
    # Source: Snell's law n sin I = n′ sin I′, the refracted ray in the plane of the incident ray and the normal
    # (any optics text; the vector form of Spencer & Murty 1962, JOSA 52:672).
    i, a = math.radians(incidence), math.radians(azimuth)
    normal = _unit([0.3, -0.2, 1.0])
    # The ray built about the normal.
    e3 = np.array(normal)
    e1 = np.array(_unit(np.cross(e3, [1.0, 0.0, 0.0])))
    e2 = np.cross(e3, e1)
    d = _unit(math.sin(i) * math.cos(a) * e1 + math.sin(i) * math.sin(a) * e2 + math.cos(i) * e3)
    if n1 * math.sin(i) > n2:
        with pytest.raises(RayMissedSurface):
            refract(d, normal, n1, n2)
        return
    out = np.array(refract(d, normal, n1, n2))
    assert np.linalg.norm(out) == pytest.approx(1.0, abs=1e-14)
    sin_out = np.linalg.norm(np.cross(out, e3))
    assert n2 * sin_out == pytest.approx(n1 * math.sin(i), abs=1e-12)
    assert float(out @ e3) > 0.0                       # carries on through the surface
    assert abs(np.dot(np.cross(d, e3), out)) < 1e-12   # coplanar with the ray and the normal


def test_refraction_with_the_normal_either_way_round():
    # Source: Spencer & Murty (1962), JOSA 52:672 — the refraction equations hold for either sense of the normal.
    d = _unit([0.2, 0.1, 1.0])
    n = _unit([0.0, 0.1, 1.0])
    assert np.allclose(refract(d, n, 1.0, 1.5), refract(d, tuple(-v for v in n), 1.0, 1.5), atol=1e-15)


@settings(max_examples=200, deadline=None)
@given(st.floats(-0.05, 0.05), st.floats(-10.0, 10.0), st.floats(-10.0, 10.0), st.floats(-0.3, 0.3),
       st.floats(-0.3, 0.3))
def test_sphere_intersection_lies_on_the_sphere_near_the_vertex(curvature, x, y, dx, dy):
    # Source: the sphere through the origin with its centre at (0, 0, 1/c), c(x² + y² + z²) = 2z (Spencer &
    # Murty 1962); the sag c ρ²/(1 + √(1 − c²ρ²)) (Jalie) picks the sheet through the vertex.
    start = (x, y, -10.0)
    direction = _unit([dx, dy, 1.0])
    try:
        distance = intersect_sphere(start, direction, curvature)
    except RayMissedSurface:  # only a line that passes farther from the centre than the radius misses it
        to_centre = np.array([0.0, 0.0, 1.0 / curvature]) - np.array(start)
        assert np.linalg.norm(np.cross(to_centre, direction)) > abs(1.0 / curvature) * (1 - 1e-12)
        return
    point = point_at(start, distance, direction)
    rho2 = point[0] ** 2 + point[1] ** 2
    assert point[2] == pytest.approx(curvature * rho2 / (1 + math.sqrt(1 - curvature ** 2 * rho2)), abs=1e-12)
    normal = np.array(sphere_normal(point, curvature))
    assert np.linalg.norm(normal) == pytest.approx(1.0, abs=1e-12)
    # The normal passes through the centre of curvature.
    if abs(curvature) > 1e-6:
        to_centre = np.array([0.0, 0.0, 1.0 / curvature]) - point
        assert np.linalg.norm(np.cross(to_centre, normal)) < 1e-9 * np.linalg.norm(to_centre)


def test_a_ray_outside_a_sphere_misses_it():
    # Source: geometry of the sphere (radius 10 mm; a ray 20 mm off its axis cannot meet it).
    with pytest.raises(RayMissedSurface):
        intersect_sphere((20.0, 0.0, -5.0), (0.0, 0.0, 1.0), 0.1)


def _rays(seed, count, spread, tilt, z):
    rng = np.random.default_rng(seed)
    for x, y, dx, dy in zip(rng.uniform(-spread, spread, count), rng.uniform(-spread, spread, count),
                            rng.uniform(-tilt, tilt, count), rng.uniform(-tilt, tilt, count)):
        yield (float(x), float(y), z), _unit([dx, dy, 1.0])


@pytest.mark.parametrize("profile_r, sweep_r", [(60.0, 40.0), (80.0, 200.0), (50.0, 0.0), (-120.0, 90.0)])
@pytest.mark.parametrize("rotation_deg", [0.0, 35.0, 90.0])
def test_torus_intersection_matches_rayoptics_toroid_sag(profile_r, sweep_r, rotation_deg):
    # Source: rayoptics 0.9.8 YToroid (profile circle in the y section swept about an axis parallel to y at the
    # sweep radius): its sag at the found point's coordinates equals the point's z, and its normal is ours.
    toroid = YToroid(r=profile_r, rR=sweep_r)
    a = math.radians(rotation_deg)
    along = (math.cos(a), math.sin(a))
    c_sweep = 0.0 if sweep_r == 0.0 else 1.0 / sweep_r
    for start, direction in _rays(7, 50, 15.0, 0.3, -8.0):
        point = point_at(start, intersect_torus(start, direction, 1.0 / profile_r, c_sweep, along), direction)
        # In the toroid's own frame: y along the profile, x across it.
        u = point[0] * along[0] + point[1] * along[1]
        w = point[1] * along[0] - point[0] * along[1]
        assert abs(toroid.sag(w, u) - point[2]) < 1e-11
        # rayoptics' normal in its frame, turned back into ours.
        n_ro = np.asarray(toroid.normal(np.array([w, u, point[2]])), dtype=float)
        n_ours = np.array([n_ro[1] * along[0] - n_ro[0] * along[1], n_ro[1] * along[1] + n_ro[0] * along[0],
                           n_ro[2]])
        n_ours /= np.linalg.norm(n_ours)
        assert abs(abs(float(n_ours @ torus_normal(point, 1.0 / profile_r, c_sweep, along))) - 1.0) < 1e-12


def test_a_torus_with_equal_curvatures_is_the_sphere():
    # Source: a circle swept about an axis through its own centre makes a sphere (geometry), whose curvature
    # matrix is c I in any tangent basis.
    for start, direction in _rays(3, 100, 20.0, 0.4, -5.0):
        s = intersect_torus(start, direction, 0.0125, 0.0125, (0.6, 0.8))
        assert abs(s - intersect_sphere(start, direction, 0.0125)) < 1e-12
        point = point_at(start, s, direction)
        normal = np.array(torus_normal(point, 0.0125, 0.0125, (0.6, 0.8)))
        first = np.array(_unit(np.cross(normal, [0.3, 1.0, 0.2])))
        curvature = torus_curvature(point, (tuple(first), tuple(np.cross(normal, first))), 0.0125, 0.0125,
                                    (0.6, 0.8))
        assert np.allclose(curvature, 0.0125 * np.eye(2), atol=1e-15)


@pytest.mark.parametrize("profile_r, sweep_r", [(60.0, 40.0), (80.0, 200.0), (50.0, 0.0), (-120.0, 90.0),
                                                (45.0, -300.0)])
def test_torus_curvature_is_that_of_a_surface_of_revolution(profile_r, sweep_r):
    # Source: the principal curvatures of a surface of revolution (do Carmo, Differential Geometry of Curves and
    # Surfaces, 1976, section 3-3; from memory): along the meridian, the profile's curvature (here the circle's,
    # 1/profile_r); along the parallel, by Meusnier's theorem the parallel circle's curvature 1/ρ times the cosine
    # between its principal normal (toward the axis) and the surface normal. Here the axis of revolution runs
    # parallel to the profile's direction at the sweep radius from the vertex.
    a = math.radians(25.0)
    along = np.array([math.cos(a), math.sin(a), 0.0])
    across = np.array([-math.sin(a), math.cos(a), 0.0])
    c_profile, c_sweep = 1.0 / profile_r, (0.0 if sweep_r == 0.0 else 1.0 / sweep_r)
    for start, direction in _rays(11, 40, 18.0, 0.3, -6.0):
        point = point_at(start, intersect_torus(start, direction, c_profile, c_sweep, tuple(along[:2])), direction)
        normal = np.array(torus_normal(point, c_profile, c_sweep, tuple(along[:2])))
        p = np.array(point)
        # The parallel through the point: a circle about the axis {w = 0, z = sweep_r}, in the plane across `along`.
        if c_sweep:
            from_axis = (p @ across) * across + (p[2] - sweep_r) * np.array([0.0, 0.0, 1.0])
            rho = np.linalg.norm(from_axis)
            parallel_curvature = -(from_axis / rho) @ normal / rho
            parallel = np.cross(along, from_axis / rho)
        else:  # a cylinder: the parallels are straight lines across the profile
            parallel_curvature, parallel = 0.0, across
        parallel = parallel - (parallel @ normal) * normal
        parallel /= np.linalg.norm(parallel)
        meridian = np.cross(normal, parallel)
        curvature = np.array(torus_curvature(point, (tuple(parallel), tuple(meridian)), c_profile, c_sweep,
                                             tuple(along[:2])))
        assert curvature[0, 0] == pytest.approx(parallel_curvature, abs=1e-12)
        assert curvature[1, 1] == pytest.approx(c_profile, abs=1e-12)
        assert abs(curvature[0, 1]) < 1e-12 and curvature[0, 1] == curvature[1, 0]
