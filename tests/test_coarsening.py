"""Vertex clustering before the quadric simplification (engine.matching.coarsening, engine.matching.standin)."""

from __future__ import annotations

import numpy as np
import pytest

import engine.matching.standin as standin
from engine.intake.preparation import prepare_mesh
from engine.matching.closest_point import SurfaceLocator
from engine.matching.coarsening import cluster_mesh, drop_fins
from engine.spectra.shape import Shape
from tests.meshes import grid, icosphere
from tests.test_standin import HAVE_SIMPLIFIER, STRETCH, place, radius, sphere_sample

needs_simplifier = pytest.mark.skipif(not HAVE_SIMPLIFIER, reason="fast-simplification is not installed")


def _mean_edge(v, f):
    e = v[f] - v[np.roll(f, 1, axis=1)]
    return float(np.sqrt((e ** 2).sum(axis=2)).mean())


def test_two_sheets_closer_than_a_cell_stay_apart():
    v, f = icosphere(4)
    h = _mean_edge(v, f)
    inner = v * (1 - 0.2 * h)                       # a second sphere a fifth of an edge inside
    both_v = np.vstack([v, inner])
    both_f = np.vstack([f, f[:, ::-1] + len(v)])
    cv, cf = cluster_mesh(both_v, both_f, cell=3 * h)
    p = prepare_mesh(cv, cf)
    assert len(cv) < 0.5 * len(both_v)              # it did cluster
    assert p.n_components == 2                       # but no cluster took vertices of both spheres
    assert p.non_manifold_edges == 0 and p.non_manifold_vertices == 0 and p.n_boundary_loops == 0
    r = np.linalg.norm(cv, axis=1)
    # each cluster mean lies on (just inside, a mean of points on a unit sphere) one of the two spheres
    near = np.minimum(np.abs(r - 1), np.abs(r - (1 - 0.2 * h)))
    assert near.max() < 0.1 * h


def test_the_boundary_is_kept_edge_for_edge():
    v, f = grid(60, 30, jitter=0.2)
    h = _mean_edge(v, f)
    cv, cf = cluster_mesh(v, f, cell=3 * h)
    p_in, p_out = prepare_mesh(v, f), prepare_mesh(cv, cf)
    assert len(cv) < 0.5 * len(v)
    assert (p_out.n_components, p_out.n_boundary_loops, p_out.handles) == (1, 1, 0)
    assert p_in.n_boundary_loops == 1

    def boundary_edges(pv, pf):
        """Edges used by one triangle, as pairs of end positions (either order)."""
        e = np.sort(np.concatenate([pf[:, [0, 1]], pf[:, [1, 2]], pf[:, [2, 0]]]), axis=1)
        keys, counts = np.unique(e, axis=0, return_counts=True)
        return {frozenset((tuple(pv[a]), tuple(pv[b]))) for a, b in keys[counts == 1]}

    assert boundary_edges(cv, cf) == boundary_edges(v, f)


def test_repeated_triangles_go_in_pairs_with_their_unused_vertices():
    v = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1], [5, 5, 5], [6, 5, 5], [5, 6, 5]], dtype=float)
    f = np.array([[0, 2, 1], [0, 1, 3], [1, 2, 3], [0, 3, 2], [4, 5, 6], [4, 6, 5]])
    kv, kf = drop_fins(v, f)
    assert len(kf) == 4 and len(kv) == 4
    np.testing.assert_array_equal(kv, v[:4])
    np.testing.assert_array_equal(kf, f[:4])


@needs_simplifier
def test_simplifying_through_the_clustering_keeps_shape_and_topology(monkeypatch):
    p, f = sphere_sample(60000, seed=3)
    v = place(p)
    n = 800
    assert len(v) > standin.CLUSTER_ABOVE * standin.CLUSTER_CELLS * n     # the clustering runs
    out = {}
    for cluster in (True, False):
        sv, sf = standin.simplify_mesh(v, f, n, cluster=cluster)
        h = _mean_edge(sv, sf)
        # distance of the input's vertices from the simplified surface, in its edges
        d = SurfaceLocator(sv, sf).closest(v).distance / h
        # its vertices against the analytic surface: the radius along each vertex's direction
        u = sv / STRETCH
        r = np.linalg.norm(u, axis=1)
        off = np.abs(r - radius(u / r[:, None])) / h
        out[cluster] = (len(sv), d.mean(), d.max(), off.mean(), prepare_mesh(sv, sf))
    nv, mean_d, max_d, mean_off, prepared = out[True]
    assert abs(nv - n) < 0.05 * n
    assert standin.same_topology(prepared, prepare_mesh(v, f))
    assert mean_d < 0.05 and max_d < 0.5 and mean_off < 0.05
    # no worse than simplifying the whole mesh by quadrics, within a small margin
    assert mean_d < 1.5 * out[False][1] + 0.01
    assert mean_off < 1.5 * out[False][3] + 0.01


@needs_simplifier
def test_a_clustering_that_changes_the_topology_is_not_used(monkeypatch):
    p, f = sphere_sample(60000, seed=4)
    shape = Shape(place(p), f)

    def holed(vertices, faces, cell, boundary=True):
        return vertices, faces[1:]                    # a hole: not the same surface

    monkeypatch.setattr(standin, "cluster_mesh", holed)
    coarse = standin.simplified_shape(shape, 800)
    assert standin.same_topology(coarse.prepared, shape.prepared)
    assert coarse.prepared.n_boundary_loops == 0


@needs_simplifier
def test_a_stand_in_that_changed_the_surface_is_made_again_on_a_finer_grid(monkeypatch):
    """When the first grid's stand-in is not the same kind of surface (here: made to gain a
    non-manifold edge), the finer grid is tried before the whole-mesh simplification, and a
    good copy from it is kept. The topology is judged by the engine's cleaning, checked against
    Euler's formula V - E + F = 2 for a closed genus-0 surface (common practice)."""
    p, f = sphere_sample(8000, seed=5)
    shape = Shape(place(p), f)
    real = standin.simplify_mesh
    asked = []

    def first_grid_breaks(vertices, faces, n_vertices, **kw):
        asked.append((kw.get("cluster", True), kw.get("cells_per_vertex")))
        v, t = real(vertices, faces, n_vertices, **kw)
        if kw.get("cells_per_vertex") == standin.CLUSTER_CELLS:    # a third triangle on one edge
            t = np.vstack([t, [t[0, 0], t[0, 1], t[1:, :].max()]])
        return v, t

    monkeypatch.setattr(standin, "simplify_mesh", first_grid_breaks)
    coarse = standin.simplified_shape(shape, 100)       # 8000 > 3 x 20 x 100: both grids cluster it
    assert asked == [(True, standin.CLUSTER_CELLS), (True, standin.CLUSTER_RETRY_CELLS)]
    edges = np.unique(np.sort(np.concatenate([coarse.faces[:, [0, 1]], coarse.faces[:, [1, 2]],
                                              coarse.faces[:, [2, 0]]]), axis=1), axis=0)
    assert coarse.n_vertices - len(edges) + len(coarse.faces) == 2
    assert standin.same_topology(coarse.prepared, shape.prepared)
