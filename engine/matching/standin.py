"""Stand-ins: matching a huge mesh through a simplified copy of it.

A sculpt or a scan of a million vertices carries the same *shape* as a copy
of it with a few thousand: the eigenfunctions a functional map uses, the
heat and wave kernel signatures, the non-rigid alignment and the product
embedding all live at wavelengths far above a sculpt's pore detail. So a mesh
with more than :data:`STANDIN_ABOVE` vertices is matched through a stand-in of
:data:`STANDIN_VERTICES` vertices (quadric edge-collapse simplification, which
keeps the surface within a fraction of the stand-in's edge length of the
original), and the map is then lifted to full resolution:

1. each full-resolution target vertex finds its closest point on the target's
   stand-in (or is a stand-in vertex, when the target was not simplified),
   and takes the barycentric blend of the mapped source points of that
   triangle's corners: a point on (or, across a curved triangle, just inside)
   the source's stand-in, in source coordinates;
2. the local correction: that point's closest point on the full-resolution
   source surface, a triangle and barycentric weights of the real mesh.

In aligned mode the correction is the target vertex's own closest point on
the full source wherever the stand-in match kept its closest point (the
surfaces coincide there, so the closest point is the partner by
construction), and the lifted point only where the product-embedding check
moved it. Both steps are closest-point searches, so the full-resolution work
is near-linear in the vertex count.

The stand-in's size is a property of the shape's detail the matcher reads (it
resolves ``k`` = 60-100 eigenfunctions and the product embedding with tens of
vertices per wavelength), not of the input: a 1M and a 30k sculpt of one shape
get stand-ins of the same size. Measurements: docs/measurements.md,
"Sculpt-scale meshes".
"""

from __future__ import annotations

import weakref
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray
from scipy.spatial import cKDTree

from ..intake.preparation import PreparedMesh
from ..spectra.shape import Shape
from .aligned import vertices_on_surface
from .closest_point import SurfaceLocator, SurfacePoints, closest_points_on_triangles, near_degenerate
from .coarsening import cluster_mesh, drop_fins

__all__ = ["STANDIN_VERTICES", "STANDIN_ABOVE", "SimplifierMissing", "simplify_mesh", "simplified_shape",
           "CLUSTER_CELLS", "CLUSTER_RETRY_CELLS", "CLUSTER_ABOVE", "grid_clusters",
           "same_topology", "needs_standin",
           "StandIn", "make_standin", "standin_landmarks", "LIFT_NEIGHBOURS", "NearbyLocator", "LiftedMap",
           "lift_map"]

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.int64]

STANDIN_VERTICES = 12000
"""Vertices of a stand-in (about twice as many triangles)."""

CLUSTER_CELLS = 10
"""Grid cells per wanted vertex when a huge mesh is clustered before the quadric simplification:
a cell is about a third of the simplified mesh's edge."""

CLUSTER_RETRY_CELLS = 20
"""The finer grid tried when the first grid's stand-in changed the surface's kind (pieces,
holes, handles, non-manifold edges), before the slower whole-mesh simplification."""

CLUSTER_ABOVE = 3
"""A mesh is clustered first when it has more than this many vertices per grid cell."""

CLUSTER_AREA_SAMPLE = 100000
"""Triangles (every so many) whose mean area sizes the clustering's grid."""

STANDIN_ABOVE = 40000
"""Meshes with more vertices than this are matched through a stand-in; at or
below it they are matched as they are (a stand-in would save little time and
the map would lose the mesh's own resolution)."""


class SimplifierMissing(RuntimeError):
    """The mesh simplifier (the ``fast-simplification`` package) is not installed."""


def simplify_mesh(vertices: FloatArray, faces: IntArray, n_vertices: int, *,
                  cluster: bool = True, boundary: bool = True,
                  cells_per_vertex: int = CLUSTER_CELLS) -> tuple[FloatArray, IntArray]:
    """Quadric edge-collapse simplification to about ``n_vertices`` vertices.

    A mesh of more than :data:`CLUSTER_ABOVE` times :data:`CLUSTER_CELLS` times
    ``n_vertices`` vertices is first clustered on a grid of that many cells of
    its area (:func:`engine.matching.coarsening.cluster_mesh`; ``cluster=False``
    skips it). Repeated triangles the collapses leave are dropped
    (:func:`engine.matching.coarsening.drop_fins`).

    Parameters
    ----------
    vertices : (n, 3) float64, faces : (m, 3) int64
        A cleaned triangle mesh.
    n_vertices : int
        Vertices wanted (a closed surface has about twice as many triangles).
    cluster : bool
        Cluster a huge mesh first.
    boundary : bool
        Whether the mesh may have a boundary (False: known to be closed).
    cells_per_vertex : int
        Grid cells per stand-in vertex (a finer grid clusters less and repairs more).

    Returns
    -------
    (n', 3) float64 vertices, (m', 3) int64 faces
    """
    try:
        import fast_simplification
    except ImportError as exc:   # pragma: no cover - depends on the installation
        raise SimplifierMissing(
            f"a mesh of {len(vertices)} vertices is matched through a simplified copy, which needs the "
            f"'fast-simplification' package (pip install fast-simplification); it is not installed") from exc
    if not 4 <= n_vertices < len(vertices):
        raise ValueError(f"cannot simplify {len(vertices)} vertices to {n_vertices}")
    cells = cells_per_vertex * n_vertices
    if cluster and grid_clusters(len(vertices), n_vertices, cells_per_vertex):
        some = faces[::max(1, len(faces) // CLUSTER_AREA_SAMPLE)]     # the area, near enough for a grid
        p0, p1, p2 = (vertices[some[:, i]] for i in range(3))
        area = 0.5 * float(np.linalg.norm(np.cross(p1 - p0, p2 - p0), axis=1).mean()) * len(faces)
        vertices, faces = cluster_mesh(vertices, faces, float(np.sqrt(area / cells)), boundary=boundary)
    target = int(round(len(faces) * n_vertices / len(vertices)))
    v, f = fast_simplification.simplify(np.ascontiguousarray(vertices, dtype=np.float64),
                                        np.ascontiguousarray(faces, dtype=np.int64), target_count=target)
    return drop_fins(np.asarray(v, dtype=np.float64), np.asarray(f, dtype=np.int64))


def needs_standin(shape: Shape) -> bool:
    """Whether ``shape`` is matched through a stand-in (more than :data:`STANDIN_ABOVE` vertices)."""
    return shape.n_vertices > STANDIN_ABOVE


@dataclass(frozen=True)
class StandIn:
    """A shape and the shape it is matched through (the same object when not simplified)."""

    full: Shape
    coarse: Shape
    missing: bool = False
    """The mesh wanted a stand-in but the simplifier is not installed."""

    @property
    def simplified(self) -> bool:
        return self.coarse is not self.full


def make_standin(shape: Shape) -> StandIn:
    """``shape`` itself, or its simplified copy when :func:`needs_standin` (``shape`` itself, flagged
    ``missing``, when the simplifier is not installed)."""
    if not needs_standin(shape):
        return StandIn(shape, shape)
    try:
        return StandIn(shape, simplified_shape(shape, STANDIN_VERTICES))
    except SimplifierMissing:      # slower, but the same job: match the mesh as it is
        return StandIn(shape, shape, missing=True)


_SIMPLIFIED: weakref.WeakKeyDictionary[Shape, dict[int, Shape]] = weakref.WeakKeyDictionary()


def simplified_shape(shape: Shape, n_vertices: int) -> Shape:
    """The :class:`Shape` of ``shape`` simplified to about ``n_vertices`` vertices, made once per
    shape and size and kept while the shape lives (matching and detail share it)."""
    kept = _SIMPLIFIED.setdefault(shape, {})
    if n_vertices not in kept:
        kept[n_vertices] = _simplified_checked(shape, n_vertices)
    return kept[n_vertices]


def grid_clusters(n_mesh: int, n_vertices: int, cells_per_vertex: int) -> bool:
    """Whether :func:`simplify_mesh` clusters a mesh of ``n_mesh`` vertices on a grid of
    ``cells_per_vertex`` cells per wanted vertex before its quadric simplification."""
    return n_mesh > CLUSTER_ABOVE * cells_per_vertex * n_vertices


def _simplified_checked(shape: Shape, n_vertices: int) -> Shape:
    """The stand-in through the grid clustering, on a finer grid when the first one's copy
    changed the surface's kind, and by the whole-mesh simplification when that did too (or
    when the mesh is not manifold to begin with)."""
    p = shape.prepared
    if not (p.non_manifold_edges or p.non_manifold_vertices):
        grids = [c for c in (CLUSTER_CELLS, CLUSTER_RETRY_CELLS) if grid_clusters(shape.n_vertices, n_vertices, c)]
        for cells in grids:
            coarse = Shape(*simplify_mesh(shape.vertices, shape.faces, n_vertices, cells_per_vertex=cells,
                                          boundary=p.n_boundary_loops > 0), cache=shape.cache)
            if same_topology(coarse.prepared, p):
                return coarse
    return Shape(*simplify_mesh(shape.vertices, shape.faces, n_vertices, cluster=False), cache=shape.cache)


def same_topology(a: PreparedMesh, b: PreparedMesh) -> bool:
    """Whether two cleaned meshes are the same kind of surface: as many pieces, boundary loops
    and handles, neither with non-manifold edges or vertices."""
    return (a.n_components, a.n_boundary_loops, a.handles) == (b.n_components, b.n_boundary_loops, b.handles) \
        and not (a.non_manifold_edges or a.non_manifold_vertices or b.non_manifold_edges or b.non_manifold_vertices)


def standin_landmarks(landmarks: tuple[IntArray, IntArray] | None, source: StandIn,
                      target: StandIn) -> NDArray[np.int64] | None:
    """Landmarks (cleaned vertices of the full meshes) as original vertex pairs of the stand-ins.

    A landmark vertex becomes the stand-in vertex nearest to it.
    """
    if landmarks is None:
        return None
    ends = []
    for side, idx in zip((source, target), landmarks):
        if side.simplified:
            near = cKDTree(side.coarse.vertices).query(side.full.vertices[idx])[1]
            idx = np.asarray(near, dtype=np.int64)
        ends.append(np.asarray(side.coarse.prepared.from_clean, dtype=np.int64)[idx])
    return np.column_stack(ends)


LIFT_NEIGHBOURS = 8
"""Full-resolution vertices around each lift query whose triangles are searched."""


class NearbyLocator:
    """Closest points on a huge mesh for queries near it.

    Each query gets the exact closest point on the triangles around its
    :data:`LIFT_NEIGHBOURS` nearest vertices, computed for those triangles
    only, so a million-vertex source is never indexed whole (only a tree of its
    vertices is built). For a query near the surface (within about an edge
    length, as the lift's are) the closest triangle is among them.
    """

    def __init__(self, shape: Shape) -> None:
        self.vertices, self.faces = shape.vertices, shape.faces
        self.tree = cKDTree(shape.vertices, balanced_tree=False)    # builds faster; the same neighbours

    def closest(self, query: FloatArray) -> SurfacePoints:
        """As :meth:`SurfaceLocator.closest`; ties go to the lowest triangle index."""
        qi, tri = self._candidates(query)
        f = self.faces[tri]
        a, b, c = self.vertices[f[:, 0]], self.vertices[f[:, 1]], self.vertices[f[:, 2]]
        w, p = closest_points_on_triangles(query[qi], a, b, c, near_degenerate(a, b, c))
        d = np.einsum("ij,ij->i", p - query[qi], p - query[qi])
        starts = np.flatnonzero(np.r_[True, qi[1:] != qi[:-1]])        # pairs come sorted by query
        nearest = np.repeat(np.minimum.reduceat(d, starts), np.diff(np.r_[starts, len(d)]))
        hit = np.flatnonzero(d == nearest)
        first = hit[np.r_[True, qi[hit][1:] != qi[hit][:-1]]]
        return SurfacePoints(tri[first], w[first], p[first], np.linalg.norm(p[first] - query, axis=1))

    def _candidates(self, query: FloatArray) -> tuple[IntArray, IntArray]:
        """(query, triangle) pairs, sorted and distinct: the triangles around each query's nearest vertices."""
        n, m = len(self.vertices), len(self.faces)
        _, near = self.tree.query(query, k=min(LIFT_NEIGHBOURS, n), workers=-1)
        near = np.asarray(near, dtype=np.int64).reshape(len(query), -1)
        wanted = np.zeros(n, dtype=bool)
        wanted[near.ravel()] = True
        touch = np.flatnonzero(wanted[self.faces].any(axis=1))
        v, t = self.faces[touch].ravel(), np.repeat(touch, 3)
        v, t = v[wanted[v]], t[wanted[v]]
        order = np.argsort(v, kind="stable")
        v, t = v[order], t[order]                      # triangles around each wanted vertex, in a row
        count = np.bincount(v, minlength=n)
        first = np.cumsum(count) - count
        c = count[near.ravel()]
        rep = np.repeat(np.arange(near.size), c)
        tri = t[np.repeat(first[near.ravel()], c) + np.arange(len(rep)) - np.repeat(np.cumsum(c) - c, c)]
        key = np.sort((rep // near.shape[1]) * np.int64(m) + tri)      # distinct, as np.unique (sorting is faster)
        key = key[np.r_[True, key[1:] != key[:-1]]]
        return key // m, key % m


@dataclass(frozen=True)
class LiftedMap:
    """The stand-in map at full resolution: per cleaned full target vertex."""

    triangle: IntArray
    barycentric: FloatArray
    confidence: FloatArray
    stats: dict[str, Any]


def lift_map(source: StandIn, target: StandIn, coarse_points: FloatArray, coarse_confidence: FloatArray,
             aligned: bool) -> LiftedMap:
    """Lift a stand-in map to the full meshes.

    Parameters
    ----------
    source, target : StandIn
    coarse_points : (n_t_coarse, 3) float64
        Mapped point on the source stand-in (source coordinates) per target stand-in vertex.
    coarse_confidence : (n_t_coarse,) float64
    aligned : bool
        The map is aligned: keep each full target vertex's own closest point on
        the full source where the stand-in kept its closest point.

    Returns
    -------
    LiftedMap
    """
    points, confidence = coarse_points, coarse_confidence
    if target.simplified:
        cp = SurfaceLocator(target.coarse.vertices, target.coarse.faces).closest(target.full.vertices)
        corners = target.coarse.faces[cp.triangle]
        points = np.einsum("ij,ijk->ik", cp.barycentric, coarse_points[corners])
        confidence = np.einsum("ij,ij->i", cp.barycentric, coarse_confidence[corners])
    if not source.simplified and not target.simplified:
        raise ValueError("nothing to lift: neither mesh was simplified")
    keep = np.zeros(len(points), dtype=bool)
    if aligned:     # the stand-in match kept the closest point (the same search as the match's own)
        coarse_direct = vertices_on_surface(target.full, source.coarse)
        keep = np.linalg.norm(coarse_direct.points - points, axis=1) <= 0.25 * source.coarse.mean_edge
    query = np.where(keep[:, None], target.full.vertices, points)
    found = NearbyLocator(source.full).closest(query)
    tri, bary = found.triangle, found.barycentric
    correction = found.distance[~keep]
    kept = int(keep.sum())
    h = source.coarse.mean_edge
    stats = {"source_standin_vertices": source.coarse.n_vertices,
             "target_standin_vertices": target.coarse.n_vertices,
             "lift_median_correction_over_h": float(np.median(correction) / h) if len(correction) else 0.0,
             "lift_max_correction_over_h": float(correction.max() / h) if len(correction) else 0.0,
             "aligned_kept_own_closest_point": kept}
    return LiftedMap(np.asarray(tri, dtype=np.int64), np.asarray(bary, dtype=np.float64),
                     np.clip(confidence, 0.0, 1.0), stats)
