"""Closest points on triangles, checked by hand and against libigl."""

import numpy as np
import pytest

from engine.matching.closest_point import SurfaceLocator, closest_points_on_triangles
from tests.meshes import icosphere, noisy_sphere

import igl  # noqa: E402  reference library, test environment only


def test_one_triangle_by_hand():
    # unit right triangle in z=0; regions worked by hand (Ericson 2005, 5.1.5)
    a, b, c = np.array([[0, 0, 0.]]), np.array([[1, 0, 0.]]), np.array([[0, 1, 0.]])
    cases = {(0.2, 0.2, 1.0): [0.6, 0.2, 0.2], (-1, -1, 0): [1, 0, 0], (2, -0.5, 0): [0, 1, 0],
             (0.5, -1, 0): [0.5, 0.5, 0], (1, 1, 0): [0, 0.5, 0.5]}
    for q, w in cases.items():
        got, pts = closest_points_on_triangles(np.array([q], float), a, b, c)
        np.testing.assert_allclose(got[0], w, atol=1e-12)


def test_random_triangles_against_dense_sampling():
    rng = np.random.default_rng(0)
    a, b, c, q = (rng.normal(size=(100, 3)) for _ in range(4))
    _, p = closest_points_on_triangles(q, a, b, c)
    s = np.linspace(0, 1, 120)
    U, V = np.meshgrid(s, s)
    keep = U + V <= 1
    U, V = U[keep], V[keep]
    for i in range(100):
        grid = a[i] + U[:, None] * (b[i] - a[i]) + V[:, None] * (c[i] - a[i])
        assert np.linalg.norm(p[i] - q[i]) <= np.linalg.norm(grid - q[i], axis=1).min() + 1e-9


@pytest.mark.parametrize("mesh", ["icosphere", "noisy"])
def test_matches_libigl_point_mesh_distance(mesh):
    v, f = icosphere(4) if mesh == "icosphere" else noisy_sphere(4, 0.01)
    rng = np.random.default_rng(1)
    q = v[rng.integers(0, len(v), 4000)] + rng.normal(size=(4000, 3)) * 0.05
    sp = SurfaceLocator(v, f).closest(q)
    d2, _, _ = igl.point_mesh_squared_distance(q, v, f)   # libigl reference
    np.testing.assert_allclose(sp.distance, np.sqrt(d2), atol=1e-9)
    np.testing.assert_allclose(sp.barycentric.sum(axis=1), 1.0)
    pts = np.einsum("ij,ijk->ik", sp.barycentric, v[f[sp.triangle]])
    np.testing.assert_allclose(pts, sp.points, atol=1e-12)


def test_bad_queries():
    v, f = icosphere(1)
    loc = SurfaceLocator(v, f)
    with pytest.raises(ValueError, match="shape"):
        loc.closest(np.zeros((3, 2)))
    with pytest.raises(ValueError, match="finite"):
        loc.closest(np.array([[np.nan, 0, 0]]))


def _fan_capped_cylinder(around=64, rings=20, height=4.0):
    """Unit-radius cylinder whose caps are fans of long thin triangles round one centre vertex."""
    th = np.linspace(0, 2 * np.pi, around, endpoint=False)
    ring = np.column_stack([np.cos(th), np.sin(th)])
    v = np.vstack([np.column_stack([ring, np.full(around, z)]) for z in np.linspace(0, height, rings)]
                  + [[[0.0, 0.0, 0.0]], [[0.0, 0.0, height]]])
    i = np.arange(around)
    j = (i + 1) % around
    sides = [np.column_stack(t) for r in range(rings - 1)
             for t in ((r * around + i, r * around + j, (r + 1) * around + j),
                       (r * around + i, (r + 1) * around + j, (r + 1) * around + i))]
    top = (rings - 1) * around
    caps = [np.column_stack([np.full(around, len(v) - 2), j, i]),
            np.column_stack([np.full(around, len(v) - 1), top + i, top + j])]
    return v, np.vstack(sides + caps)


@pytest.mark.xfail(strict=True, reason="the locator returns a farther point than the closest for "
                   "about 0.3% of queries near fan caps (up to 0.08 of the radius); issue 9")
def test_fan_caps_match_libigl():
    v, f = _fan_capped_cylinder()
    q = np.random.default_rng(0).uniform([-1.5, -1.5, -0.5], [1.5, 1.5, 4.5], (20000, 3))
    d2, _, _ = igl.point_mesh_squared_distance(q, v, f)   # libigl reference
    np.testing.assert_allclose(SurfaceLocator(v, f).closest(q).distance, np.sqrt(d2), atol=1e-9)
