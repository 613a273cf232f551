"""Matching and detail through stand-ins (engine.matching.standin, engine.carrying.large_detail).

Small meshes with the stand-in thresholds lowered, so the stand-in path runs
and can be compared with the full path on the same pair. Truth: both meshes
sample one analytic surface, a radius function over the unit sphere, so each
vertex's sphere parameter is known.
"""

from __future__ import annotations

import sys

import numpy as np
import pytest
from scipy.spatial import ConvexHull

import engine.matching.standin as standin
from engine.carrying.detail import vertex_normals
from engine.carrying.large_detail import band_vertices, local_fit
from engine.jobs.pair import Pair, Settings
from engine.matching.correspondence import correspond
from engine.spectra.shape import Shape

try:
    import fast_simplification  # noqa: F401
    HAVE_SIMPLIFIER = True
except ImportError:
    HAVE_SIMPLIFIER = False
needs_simplifier = pytest.mark.skipif(not HAVE_SIMPLIFIER, reason="fast-simplification is not installed "
                                      "(requirements/engine.txt)")

STRETCH = np.array([1.4, 1.0, 0.8])


def sphere_sample(n, seed):
    """Random unit vectors and the outward triangles of their convex hull."""
    p = np.random.default_rng(seed).standard_normal((n, 3))
    p /= np.linalg.norm(p, axis=1, keepdims=True)
    f = ConvexHull(p).simplices.astype(np.int64)
    nrm = np.cross(p[f[:, 1]] - p[f[:, 0]], p[f[:, 2]] - p[f[:, 0]])
    flip = (nrm * p[f].mean(axis=1)).sum(axis=1) < 0
    f[flip] = f[flip][:, [0, 2, 1]]
    return p, f


def radius(p):
    x, y, z = p.T
    return 1 + 0.15 * np.sin(3 * x + 1) * np.cos(2 * y) + 0.1 * np.sin(5 * z + 2 * x)


def bumps(p, amplitude=0.02, frequency=9.0):
    x, y, z = p.T
    return amplitude * np.sin(frequency * x + 0.3) * np.sin(frequency * y + 1.1) * np.sin(frequency * z + 0.7)


def place(p, extra=0.0):
    return p * (radius(p) + extra)[:, None] * STRETCH


def map_error(corr, p_source, p_target):
    """Angle (radians) between each target vertex's sphere parameter and its mapped point's."""
    q = np.einsum("ij,ijk->ik", corr.barycentric, p_source[corr.source.faces[corr.triangle]])
    q /= np.linalg.norm(q, axis=1, keepdims=True)
    return np.arccos(np.clip(np.einsum("ij,ij->i", q, p_target), -1, 1))


@pytest.fixture()
def small_standins(monkeypatch):
    """Stand-ins for every mesh over 2000 vertices, of 1500 vertices."""
    monkeypatch.setattr(standin, "STANDIN_ABOVE", 2000)
    monkeypatch.setattr(standin, "STANDIN_VERTICES", 1500)


def _pair(moved):
    ps, fs = sphere_sample(6000, 1)
    pt, ft = sphere_sample(1500, 2)
    vt = place(pt)
    if moved:   # rotated 40 degrees about z and shifted
        c, s = np.cos(0.7), np.sin(0.7)
        vt = vt @ np.array([[c, -s, 0], [s, c, 0], [0, 0, 1]]).T + np.array([2.0, 0.5, -1.0])
    return (ps, Shape(place(ps), fs)), (pt, Shape(vt, ft))


@needs_simplifier
@pytest.mark.parametrize("mode", ["aligned", "intrinsic"])
def test_standin_map_is_as_accurate_as_the_full_map(mode, monkeypatch):
    (ps, S), (pt, T) = _pair(moved=mode == "intrinsic")
    full = correspond(S, T, match=mode)
    assert "stand-in" not in full.reason
    monkeypatch.setattr(standin, "STANDIN_ABOVE", 2000)
    monkeypatch.setattr(standin, "STANDIN_VERTICES", 1500)
    through = correspond(S, T, match=mode)
    assert "stand-ins of" in through.reason and through.mode == mode
    assert through.stats["standin"]["source_standin_vertices"] < 2000
    e_full, e_std = map_error(full, ps, pt), map_error(through, ps, pt)
    h = S.mean_edge / np.sqrt(S.area / (4 * np.pi))    # the source's edge, as an angle (roughly)
    # the lifted map sits on the full source; its median error stays within
    # a fifth of a source edge of the full path's, and the bulk stays small
    assert np.median(e_std) <= np.median(e_full) + 0.2 * h
    assert np.quantile(e_std, 0.9) <= max(1.5 * np.quantile(e_full, 0.9), 2 * h)
    # mapped points are on the full source's triangles with valid weights
    assert through.triangle.max() < len(S.faces)
    np.testing.assert_allclose(through.barycentric.sum(axis=1), 1.0, atol=1e-9)
    assert (through.barycentric >= -1e-12).all()
    assert through.confidence.shape == (T.n_vertices,) and np.isfinite(through.confidence).all()


@needs_simplifier
def test_landmarks_reach_the_standin(small_standins):
    (ps, S), (pt, T) = _pair(moved=True)
    i_t = 10
    i_s = int(np.argmax(ps @ pt[i_t]))          # the source vertex nearest in parameter
    c = correspond(S, T, match="intrinsic", landmarks=[(i_s, i_t)])
    assert "stand-ins of" in c.reason and c.stats["sizes"]["landmarks"] == 1


def test_local_fit_is_exact_for_quadratic_fields_and_ignores_the_normal_offset():
    # analytic: on the plane z = 0 a quadratic field of (x, y) is reproduced
    # exactly at any query, wherever it sits above or below the plane
    rng = np.random.default_rng(3)
    pts = np.column_stack([rng.uniform(-1, 1, (400, 2)), np.zeros(400)])
    normals = np.tile([0.0, 0.0, 1.0], (400, 1))

    def fields(p):
        x, y = p[:, 0], p[:, 1]
        return np.column_stack([2 * x - y + 0.5, 3 * y, 1 + x * x - 2 * x * y + 0.5 * y * y])

    q = np.column_stack([rng.uniform(-0.7, 0.7, (50, 2)), rng.uniform(-0.05, 0.05, 50)])
    got = local_fit(pts, normals, fields(pts), q)
    np.testing.assert_allclose(got, fields(q), atol=1e-9)


def test_band_vertices_follow_the_band_not_the_input():
    assert band_vertices(1.0, 0.5) == standin.STANDIN_VERTICES        # a wide band: the floor
    # (12 edges per wavelength) equilateral tiling: 2 A / (sqrt(3) e^2) vertices
    assert band_vertices(4.0, 0.05) == int(2 * 4.0 / (np.sqrt(3) * (0.05 / 12) ** 2))


def _recovered(pair, p_target, v_target, f_target, amplitude):
    """Fraction of the true bump displacement (taken along the target's normal) the carried one holds."""
    carried = pair.detail() - v_target
    radial = (p_target * bumps(p_target, amplitude)[:, None]) * STRETCH
    nrm = vertex_normals(v_target, f_target)
    truth = nrm * np.einsum("ij,ij->i", radial, nrm)[:, None]
    return float(np.sum(carried * truth) / np.sum(truth * truth))


@needs_simplifier
def test_detail_recovers_a_known_displacement_full_and_through_a_standin(monkeypatch):
    # source: the smooth shape plus bumps of wavelength 2 pi / 9 ~ 0.7 on the
    # unit sphere; the band (size 0.8: features under 0.8 sqrt(area) ~ 3)
    # keeps under a hundredth of such a bump in the base, so at least 90% of
    # it should arrive on the bump-free target.
    amplitude = 0.02
    ps, fs = sphere_sample(8000, 4)
    pt, ft = sphere_sample(3000, 5)
    vt = place(pt)
    S, T = Shape(place(ps, bumps(ps, amplitude)), fs), Shape(vt, ft)
    settings = Settings(match="aligned", detail_size=0.8)
    full = _recovered(Pair(S, T, settings), pt, vt, ft, amplitude)
    monkeypatch.setattr(standin, "STANDIN_ABOVE", 4000)
    monkeypatch.setattr(standin, "STANDIN_VERTICES", 2000)
    through = _recovered(Pair(S, T, settings), pt, vt, ft, amplitude)
    assert full >= 0.9 and through >= 0.9
    assert abs(through - full) <= 0.05


def test_missing_simplifier_is_a_clear_error(monkeypatch):
    monkeypatch.setitem(sys.modules, "fast_simplification", None)
    v, f = sphere_sample(500, 6)
    with pytest.raises(standin.SimplifierMissing, match="fast-simplification"):
        standin.simplify_mesh(place(v), f, 100)


def test_nearby_locator_agrees_with_the_whole_mesh_search():
    # the closest points found on the triangles around each query's nearest vertices are
    # those of the exact search over every triangle (closest_point.SurfaceLocator)
    from engine.matching.closest_point import SurfaceLocator

    p, f = sphere_sample(6000, 8)
    S = Shape(place(p, bumps(p)), f)
    q = place(sphere_sample(800, 9)[0]) * 1.01
    whole = SurfaceLocator(S.vertices, S.faces).closest(q)
    near = standin.NearbyLocator(S).closest(q)
    np.testing.assert_allclose(near.distance, whole.distance, atol=1e-12)
    np.testing.assert_allclose(near.points, whole.points, atol=1e-9)


def test_without_the_simplifier_a_large_mesh_is_matched_as_it_is(small_standins, monkeypatch):
    monkeypatch.setitem(sys.modules, "fast_simplification", None)
    (ps, S), (pt, T) = _pair(moved=False)
    c = correspond(S, T, match="aligned")
    assert "stand-ins of" not in c.reason and "'fast-simplification' package (not installed)" in c.reason
    assert "standin" not in c.stats and c.triangle.max() < len(S.faces)
    from engine.carrying.large_detail import lifted_layer
    assert lifted_layer(S, 2.0, np.arange(10)) is None          # a band wide enough to want a 1,500-vertex stand-in
