"""Ray–surface intersection and vector Snell's law, against Snell's law itself and rayoptics' surface profiles."""
from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from rayoptics.elem.profiles import YToroid

from lenslane.plugins.optics.raytrace import (
    RayMissedSurface, intersect_sphere, intersect_torus, refract, sphere_normal, torus_normal,
)

angles = st.floats(0.0, 80.0)
azimuths = st.floats(0.0, 360.0)
indices = st.floats(1.0, 2.0)


def _unit(v):
    v = np.asarray(v, dtype=float)
    return v / np.linalg.norm(v, axis=-1, keepdims=True)


@settings(max_examples=200, deadline=None)
@given(angles, azimuths, indices, indices)
def test_refraction_obeys_snells_law_in_the_plane_of_incidence(incidence, azimuth, n1, n2):
    # Source: Snell's law n sin I = n′ sin I′, the refracted ray in the plane of the incident ray and the normal
    # (any optics text; the vector form of Spencer & Murty 1962, JOSA 52:672).
    i, a = math.radians(incidence), math.radians(azimuth)
    d = np.array([[math.sin(i) * math.cos(a), math.sin(i) * math.sin(a), math.cos(i)]])
    normal = _unit([[0.3, -0.2, 1.0]])
    # Rotate the ray into the normal's frame: build it about the normal instead.
    e3 = normal[0]
    e1 = _unit(np.cross(e3, [1.0, 0.0, 0.0]))
    e2 = np.cross(e3, e1)
    d = (d[0, 0] * e1 + d[0, 1] * e2 + d[0, 2] * e3)[None]
    if n1 * math.sin(i) > n2:
        with pytest.raises(RayMissedSurface):
            refract(d, normal, n1, n2)
        return
    out = refract(d, normal, n1, n2)
    assert np.linalg.norm(out) == pytest.approx(1.0, abs=1e-14)
    sin_out = np.linalg.norm(np.cross(out[0], e3))
    assert n2 * sin_out == pytest.approx(n1 * math.sin(i), abs=1e-12)
    assert float(out[0] @ e3) > 0.0                       # carries on through the surface
    assert abs(np.dot(np.cross(d[0], e3), out[0])) < 1e-12  # coplanar with the ray and the normal


def test_refraction_with_the_normal_either_way_round():
    # Source: Spencer & Murty (1962), JOSA 52:672 — the refraction equations hold for either sense of the normal.
    d = _unit([[0.2, 0.1, 1.0]])
    n = _unit([[0.0, 0.1, 1.0]])
    assert np.allclose(refract(d, n, 1.0, 1.5), refract(d, -n, 1.0, 1.5), atol=1e-15)


@settings(max_examples=200, deadline=None)
@given(st.floats(-0.05, 0.05), st.floats(-10.0, 10.0), st.floats(-10.0, 10.0), st.floats(-0.3, 0.3),
       st.floats(-0.3, 0.3))
def test_sphere_intersection_lies_on_the_sphere_near_the_vertex(curvature, x, y, dx, dy):
    # Source: the sphere through the origin with its centre at (0, 0, 1/c), c(x² + y² + z²) = 2z (Spencer &
    # Murty 1962); the sag c ρ²/(1 + √(1 − c²ρ²)) (Jalie) picks the sheet through the vertex.
    start = np.array([[x, y, -10.0]])
    direction = _unit([[dx, dy, 1.0]])
    point = start + intersect_sphere(start, direction, curvature)[:, None] * direction
    rho2 = point[0, 0] ** 2 + point[0, 1] ** 2
    assert point[0, 2] == pytest.approx(curvature * rho2 / (1 + math.sqrt(1 - curvature ** 2 * rho2)), abs=1e-12)
    normal = sphere_normal(point, curvature)
    assert np.linalg.norm(normal) == pytest.approx(1.0, abs=1e-12)
    # The normal passes through the centre of curvature.
    if abs(curvature) > 1e-6:
        to_centre = np.array([0.0, 0.0, 1.0 / curvature]) - point[0]
        assert np.linalg.norm(np.cross(to_centre, normal[0])) < 1e-9 * np.linalg.norm(to_centre)


def test_a_ray_outside_a_sphere_misses_it():
    # Source: geometry of the sphere (radius 10 mm; a ray 20 mm off its axis cannot meet it).
    with pytest.raises(RayMissedSurface):
        intersect_sphere(np.array([[20.0, 0.0, -5.0]]), np.array([[0.0, 0.0, 1.0]]), 0.1)


@pytest.mark.parametrize("profile_r, sweep_r", [(60.0, 40.0), (80.0, 200.0), (50.0, 0.0), (-120.0, 90.0)])
@pytest.mark.parametrize("rotation_deg", [0.0, 35.0, 90.0])
def test_torus_intersection_matches_rayoptics_toroid_sag(profile_r, sweep_r, rotation_deg):
    # Source: rayoptics 0.9.8 YToroid (profile circle in the y section swept about an axis parallel to y at the
    # sweep radius): its sag at the found point's coordinates equals the point's z.
    toroid = YToroid(r=profile_r, rR=sweep_r)
    a = math.radians(rotation_deg)
    along = np.array([math.cos(a), math.sin(a)])
    rng = np.random.default_rng(7)
    starts = np.column_stack([rng.uniform(-15, 15, 50), rng.uniform(-15, 15, 50), np.full(50, -8.0)])
    directions = _unit(np.column_stack([rng.uniform(-0.3, 0.3, 50), rng.uniform(-0.3, 0.3, 50), np.ones(50)]))
    c_sweep = 0.0 if sweep_r == 0.0 else 1.0 / sweep_r
    points = starts + intersect_torus(starts, directions, 1.0 / profile_r, c_sweep, along)[:, None] * directions
    # In the toroid's own frame: y along the profile, x across it.
    u = points[:, 0] * along[0] + points[:, 1] * along[1]
    w = points[:, 1] * along[0] - points[:, 0] * along[1]
    sags = np.array([toroid.sag(wi, ui) for wi, ui in zip(w, u)])
    assert np.max(np.abs(sags - points[:, 2])) < 1e-11
    normals = torus_normal(points, 1.0 / profile_r, c_sweep, along)
    for point, normal, ui, wi in zip(points, normals, u, w):
        # rayoptics' normal in its frame, turned back into ours.
        n_ro = np.asarray(toroid.normal(np.array([wi, ui, point[2]])), dtype=float)
        n_ours = np.array([n_ro[1] * along[0] - n_ro[0] * along[1], n_ro[1] * along[1] + n_ro[0] * along[0],
                           n_ro[2]])
        n_ours /= np.linalg.norm(n_ours)
        assert abs(abs(float(n_ours @ normal)) - 1.0) < 1e-12


def test_a_torus_with_equal_curvatures_is_the_sphere():
    # Source: a circle swept about an axis through its own centre makes a sphere (geometry).
    rng = np.random.default_rng(3)
    starts = np.column_stack([rng.uniform(-20, 20, 100), rng.uniform(-20, 20, 100), np.full(100, -5.0)])
    directions = _unit(np.column_stack([rng.uniform(-0.4, 0.4, 100), rng.uniform(-0.4, 0.4, 100), np.ones(100)]))
    torus = intersect_torus(starts, directions, 0.0125, 0.0125, np.array([0.6, 0.8]))
    sphere = intersect_sphere(starts, directions, 0.0125)
    assert np.max(np.abs(torus - sphere)) < 1e-12
