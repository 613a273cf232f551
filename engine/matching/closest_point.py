"""Closest points on a triangle surface, vectorised and exact.

For each query point the exact closest point on every candidate triangle is
computed (Ericson, Real-Time Collision Detection, 2005, section 5.1.5, the
Voronoi-region test), and the nearest wins. Candidates come in two passes:

1. a ``cKDTree`` search: the triangles incident to the few nearest vertices
   and the triangles whose centroids are nearest. On ordinary meshes this
   already holds the closest triangle;
2. a bound that makes the answer exact: a triangle lies in the cylinder of
   radius ``r`` (its farthest corner from its centroid ``c``) around the axis
   through ``c`` along its normal, flat to its plane, so its distance from a
   query is at least the distance to that disc (and at least ``|q - c| - r``).
   Every triangle whose bound is below the distance pass 1 found is checked.
   A triangle left out of pass 1's centroid candidates lies at least as far
   from ``q`` as the farthest of them, so a query whose candidates already
   reach past ``found + r`` for every triangle needs nothing more. The others
   are searched by nearest centroids within groups of similar ``r`` (powers
   of two of the median, so a few long fan or sliver triangles do not widen
   the search among the ordinary ones), in rounds until the bound is passed;
   queries far from the surface (many near-ties) walk a hierarchy of triangle
   groups with bounding cylinders instead (:func:`bounding_hierarchy`).

A pass-2 triangle replaces the pass-1 answer only if it is nearer by more than
:data:`TIE_TOLERANCE` of the mesh's size, so ties keep pass 1's choice.
Degenerate triangles are handled as the union of their edges.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import sparse
from scipy.spatial import cKDTree

from ..intake.preparation import validate_mesh

__all__ = ["closest_points_on_triangles", "near_degenerate", "SurfaceLocator", "SurfacePoints",
           "incident_triangles", "barycentric_matrix"]

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.int64]

TIE_TOLERANCE = 1e-12
"""A pass-2 triangle wins only if nearer by this fraction of the bounding-box diagonal."""

NEAR_RANGE = 4.0
"""Pass 2 walks the hierarchy straight away for a query farther than this many
bounding radii (of a radius group) from the pass-1 answer."""

NEAR_CENTROIDS = (16, 64, 256, 1024)
"""Nearest centroids per radius group tried in pass 2, round by round, before the hierarchy is walked."""

PASS2_BLOCK = 2000
"""Queries per block of pass 2 (its frontier of query-group pairs stays in cache)."""


@dataclass(frozen=True)
class SurfacePoints:
    """Points on a triangle surface.

    Attributes
    ----------
    triangle : (q,) int64 array
        Index of the triangle holding each point.
    barycentric : (q, 3) float64 array
        Weights of the triangle's three corners, non-negative, summing to 1.
    points : (q, 3) float64 array
    distance : (q,) float64 array
        Distance from each query to its point.
    """

    triangle: IntArray
    barycentric: FloatArray
    points: FloatArray
    distance: FloatArray


def closest_points_on_triangles(query: ArrayLike, a: FloatArray, b: FloatArray, c: FloatArray,
                                flat: NDArray[np.bool_] | None = None) -> tuple[FloatArray, FloatArray]:
    """Closest point of each query on its own triangle (a, b, c).

    Degenerate triangles (corners on one line or coinciding) are the union of
    their edges and get the closest point on those.

    Parameters
    ----------
    query, a, b, c : (q, 3) float arrays
    flat : (q,) bool array, optional
        :func:`near_degenerate` of each row's triangle, if known.

    Returns
    -------
    barycentric : (q, 3) float64 array
    points : (q, 3) float64 array
    """
    p = np.asarray(query, float)
    ab, ac, ap = b - a, c - a, p - a
    d1 = np.einsum("ij,ij->i", ab, ap)
    d2 = np.einsum("ij,ij->i", ac, ap)
    bp = p - b
    d3 = np.einsum("ij,ij->i", ab, bp)
    d4 = np.einsum("ij,ij->i", ac, bp)
    cp = p - c
    d5 = np.einsum("ij,ij->i", ab, cp)
    d6 = np.einsum("ij,ij->i", ac, cp)
    va = d3 * d6 - d5 * d4
    vb = d5 * d2 - d1 * d6
    vc = d1 * d4 - d3 * d2
    # The Voronoi regions of the triangle in Ericson's order (Real-Time
    # Collision Detection, 5.1.5): the first region that holds the query wins,
    # which is what np.select does.
    with np.errstate(divide="ignore", invalid="ignore"):
        t_ab = d1 / (d1 - d3)
        t_ac = d2 / (d2 - d6)
        t_bc = (d4 - d3) / ((d4 - d3) + (d5 - d6))
        den = va + vb + vc
        v_ = vb / den
        w_ = vc / den
        u_ = 1 - v_ - w_
    regions = [(d1 <= 0) & (d2 <= 0),                                   # vertex a
               (d3 >= 0) & (d4 <= d3),                                  # vertex b
               (vc <= 0) & (d1 >= 0) & (d3 <= 0),                       # edge ab
               (d6 >= 0) & (d5 <= d6),                                  # vertex c
               (vb <= 0) & (d2 >= 0) & (d6 <= 0),                       # edge ac
               (va <= 0) & ((d4 - d3) >= 0) & ((d5 - d6) >= 0)]         # edge bc
    w = np.empty((len(p), 3))                                           # else: interior
    w[:, 0] = np.select(regions, [1.0, 0.0, 1 - t_ab, 0.0, 1 - t_ac, 0.0], u_)
    w[:, 1] = np.select(regions, [0.0, 1.0, t_ab, 0.0, 0.0, 1 - t_bc], v_)
    w[:, 2] = np.select(regions, [0.0, 0.0, 0.0, 1.0, t_ac, t_bc], w_)
    # Degenerate and near-degenerate triangles (sine of the angle at a below
    # 1e-5) can leave NaN or, by rounding, the wrong region: there the closest
    # point on the edges is taken if it is nearer.
    bad = (near_degenerate(a, b, c) if flat is None else flat) | ~np.isfinite(w).all(axis=1)
    w[bad] = np.nan_to_num(w[bad], nan=1.0, posinf=1.0, neginf=0.0)
    w = np.clip(w, 0.0, 1.0)
    w /= w.sum(axis=1, keepdims=True)
    if bad.any():
        w[bad] = _nearer(p[bad], w[bad], _closest_on_edges(p[bad], a[bad], b[bad], c[bad]), a[bad], b[bad], c[bad])
    pts = w[:, :1] * a + w[:, 1:2] * b + w[:, 2:] * c
    return w, pts


def near_degenerate(a: FloatArray, b: FloatArray, c: FloatArray) -> NDArray[np.bool_]:
    """Triangles whose angle at ``a`` has a sine below 1e-5 (or with coinciding corners)."""
    ab, ac = b - a, c - a
    aa, cc, x = (np.einsum("ij,ij->i", u, v) for u, v in ((ab, ab), (ac, ac), (ab, ac)))
    out: NDArray[np.bool_] = aa * cc - x * x <= 1e-10 * aa * cc      # |ab x ac|^2 against |ab|^2 |ac|^2
    return out


def _nearer(p: FloatArray, w1: FloatArray, w2: FloatArray, a: FloatArray, b: FloatArray,
            c: FloatArray) -> FloatArray:
    """Per row, whichever of the weights ``w1``, ``w2`` gives the point nearer to ``p``."""
    x1 = w1[:, :1] * a + w1[:, 1:2] * b + w1[:, 2:] * c
    x2 = w2[:, :1] * a + w2[:, 1:2] * b + w2[:, 2:] * c
    take = np.einsum("ij,ij->i", x2 - p, x2 - p) < np.einsum("ij,ij->i", x1 - p, x1 - p)
    return np.where(take[:, None], w2, w1)


def _closest_on_edges(p: FloatArray, a: FloatArray, b: FloatArray, c: FloatArray) -> FloatArray:
    """Barycentric weights of the closest point on the three edges of each triangle."""
    corners = (a, b, c)
    best_w = np.zeros((len(p), 3))
    best_d = np.full(len(p), np.inf)
    for i, j in ((0, 1), (1, 2), (2, 0)):
        e = corners[j] - corners[i]
        ee = np.einsum("ij,ij->i", e, e)
        t = np.einsum("ij,ij->i", p - corners[i], e) / np.where(ee > 0, ee, 1.0)
        t = np.clip(np.where(ee > 0, t, 0.0), 0.0, 1.0)
        x = corners[i] + t[:, None] * e
        d = np.einsum("ij,ij->i", x - p, x - p)
        take = d < best_d
        best_d[take] = d[take]
        best_w[take] = 0.0
        best_w[take, i] = 1 - t[take]
        best_w[take, j] = t[take]
    return best_w


class SurfaceLocator:
    """Answers closest-point queries on one triangle mesh.

    Parameters
    ----------
    vertices : (n, 3) float array
    faces : (m, 3) int array
    vertex_candidates : int
        How many nearest vertices contribute their incident triangles (pass 1).
    centroid_candidates : int
        How many nearest triangle centroids are tried as well (pass 1).
    """

    def __init__(self, vertices: ArrayLike, faces: ArrayLike, *, vertex_candidates: int = 3,
                 centroid_candidates: int = 8) -> None:
        self.vertices, self.faces = validate_mesh(vertices, faces)
        self.vertex_tree = cKDTree(self.vertices)
        corners = self.vertices[self.faces]
        centroids = corners.mean(axis=1)
        self.centroid_tree = cKDTree(centroids)
        self.vertex_candidates = int(min(vertex_candidates, len(self.vertices)))
        self.centroid_candidates = int(min(centroid_candidates, len(self.faces)))
        self.incident = incident_triangles(self.faces, len(self.vertices))
        self.triangle_bounds = triangle_bounds(self.vertices, self.faces)
        self.flat = near_degenerate(*(self.vertices[self.faces[:, i]] for i in range(3)))
        self.levels: list[Level] | None = None           # the hierarchy, built when first needed
        self.largest = float(self.triangle_bounds.radius.max())
        self.groups = radius_groups(self.triangle_bounds)
        self.size = float(np.linalg.norm(np.ptp(self.vertices, axis=0)))

    def candidates(self, query: FloatArray) -> IntArray:
        """Pass-1 candidate triangles per query, (q, c) int array padded with repeats."""
        return self._candidates(query)[0]

    def _candidates(self, query: FloatArray) -> tuple[IntArray, FloatArray]:
        """Pass-1 candidates and the distance to the farthest of the nearest centroids."""
        _, vi = self.vertex_tree.query(query, k=self.vertex_candidates, workers=-1)
        dt, ti = self.centroid_tree.query(query, k=self.centroid_candidates, workers=-1)
        vi = vi.reshape(len(query), -1)
        ti = ti.reshape(len(query), -1)
        reach = dt.reshape(len(query), -1)[:, -1]
        if self.centroid_candidates == len(self.faces):
            reach = np.full(len(query), np.inf)       # every triangle is a candidate already
        inc = self.incident[vi].reshape(len(query), -1)
        cand = np.concatenate([ti, inc], axis=1)
        return np.where(cand < 0, ti[:, :1], cand), reach

    def closest(self, query: ArrayLike, *, chunk: int = 20000) -> SurfacePoints:
        """Closest surface point to each query.

        Parameters
        ----------
        query : (q, 3) float array

        Returns
        -------
        SurfacePoints
        """
        query = np.asarray(query, dtype=np.float64)
        if query.ndim != 2 or query.shape[1] != 3:
            raise ValueError(f"query points must have shape (q, 3), got {query.shape}")
        if not np.isfinite(query).all():
            raise ValueError("query points must be finite")
        tri = np.empty(len(query), np.int64)
        bary = np.empty((len(query), 3))
        pts = np.empty((len(query), 3))
        for s in range(0, len(query), chunk):
            q = query[s:s + chunk]
            cand, reach = self._candidates(q)
            t, w, p = self._best(q, cand)
            self._improve(q, cand, reach, (t, w, p))
            tri[s:s + chunk], bary[s:s + chunk], pts[s:s + chunk] = t, w, p
        dist = np.linalg.norm(pts - query, axis=1)
        return SurfacePoints(tri, bary, pts, dist)

    def within(self, query: FloatArray, radius: float) -> NDArray[np.bool_]:
        """Per query point, whether the surface comes nearer than ``radius``: the same answer as
        ``closest(query).distance < radius``, without the exact search for queries whose first
        candidates are already near enough or that no triangle's bounding ball reaches."""
        query = np.asarray(query, dtype=np.float64)
        near = np.zeros(len(query), dtype=bool)
        # a triangle within radius has its centroid within radius + its bounding radius
        reach, _ = self.centroid_tree.query(query, distance_upper_bound=radius + self.largest, workers=-1)
        rows = np.flatnonzero(np.isfinite(reach))
        if len(rows):
            _, _, pts = self._best(query[rows], self._candidates(query[rows])[0])
            near[rows] = np.linalg.norm(pts - query[rows], axis=1) < radius
            rest = rows[~near[rows]]
            if len(rest):
                near[rest] = self.closest(query[rest]).distance < radius
        return near

    def _best(self, q: FloatArray, cand: IntArray) -> tuple[IntArray, FloatArray, FloatArray]:
        """The nearest of each row's candidate triangles (the first of equals, in the row's order),
        its barycentric weights and point. A candidate repeated in its row (the padding, triangles
        shared by the nearest vertices' fans) is computed once."""
        nq, nc = cand.shape
        first = _first_occurrences(cand)
        at = np.flatnonzero(first)
        rows = at // nc
        t = cand.ravel()[at]
        f = self.faces[t]
        w, p = closest_points_on_triangles(q[rows], self.vertices[f[:, 0]], self.vertices[f[:, 1]],
                                           self.vertices[f[:, 2]], self.flat[t])
        d = np.full(nq * nc, np.inf)
        d[at] = np.einsum("ij,ij->i", p - q[rows], p - q[rows])
        flat = np.arange(nq) * nc + np.argmin(d.reshape(nq, nc), axis=1)
        pick = np.searchsorted(at, flat)
        return cand.ravel()[flat], w[pick], p[pick]

    def _improve(self, q: FloatArray, cand: IntArray, reach: FloatArray,
                 answer: tuple[IntArray, FloatArray, FloatArray]) -> None:
        """Pass 2, in place on the pass-1 ``answer`` (triangle, barycentric, points):
        every triangle whose bound beats the pass-1 distance is checked."""
        found = np.linalg.norm(answer[2] - q, axis=1)
        rows = np.flatnonzero(reach < found + self.largest)    # pass 1 may not have reached far enough
        qi, t, rest = self._near_unchecked(q, (found, reach), rows)
        self._replace(q, found, (qi, t), cand, answer)
        for s in range(0, len(rest), PASS2_BLOCK):
            self._replace(q, found, self._unchecked(q, found, rest[s:s + PASS2_BLOCK]), cand, answer)

    def _replace(self, q: FloatArray, found: FloatArray, pairs: tuple[IntArray, IntArray], cand: IntArray,
                 answer: tuple[IntArray, FloatArray, FloatArray]) -> None:
        """The (query, triangle) ``pairs`` checked: a triangle nearer than pass 1's ``found``
        replaces the pass-1 answer."""
        tri, bary, pts = answer
        qi, t = pairs
        new = ~(cand[qi] == t[:, None]).any(axis=1)            # pass 1 checked the others
        qi, t = qi[new], t[new]
        f = self.faces[t]
        w, p = closest_points_on_triangles(q[qi], self.vertices[f[:, 0]], self.vertices[f[:, 1]],
                                           self.vertices[f[:, 2]], self.flat[t])
        d = np.linalg.norm(p - q[qi], axis=1)
        order = np.lexsort((d, qi))                      # per query, nearest first
        first = order[np.r_[True, qi[order][1:] != qi[order][:-1]]] if len(qi) else order
        tol = TIE_TOLERANCE * (self.size + found[qi[first]])
        win = first[d[first] < found[qi[first]] - tol]
        tri[qi[win]], bary[qi[win]], pts[qi[win]] = t[win], w[win], p[win]

    def _near_unchecked(self, q: FloatArray, distances: tuple[FloatArray, FloatArray],
                        rows: IntArray) -> tuple[IntArray, IntArray, IntArray]:
        """(query, triangle) pairs of ``rows`` whose lower bound is below ``found``, from the
        nearest centroids of each radius group (:data:`NEAR_CENTROIDS`, then more); and the
        rows for which those did not reach far enough (left to :meth:`_unchecked`)."""
        found, reach = distances
        qs, ts, rest = [], [], []
        for g in self.groups:
            sel = rows[reach[rows] < found[rows] + g.radius]
            far = found[sel] > NEAR_RANGE * g.radius      # many candidates: the hierarchy prunes better
            rest.append(sel[far])
            sel = sel[~far]
            done = 0
            for k in NEAR_CENTROIDS:
                k = min(k, len(g.triangles))
                dist, idx = g.tree.query(q[sel], k=k, workers=-1)
                dist, idx = dist.reshape(len(sel), k)[:, done:], idx.reshape(len(sel), k)[:, done:]
                bound = found[sel, None] + g.radius
                r_i, c_i = np.nonzero(dist < bound)
                t = g.triangles[idx[r_i, c_i]]
                ball = dist[r_i, c_i] - self.triangle_bounds.radius[t] < found[sel[r_i]]   # cheap test first
                r_i, t = r_i[ball], t[ball]
                keep = self.triangle_bounds.lower(q[sel[r_i]], t) < found[sel[r_i]]
                qs.append(sel[r_i[keep]])
                ts.append(t[keep])
                sel = sel[dist[:, -1] < bound[:, 0]] if k < len(g.triangles) else sel[:0]
                done = k
                if not len(sel):
                    break
            rest.append(sel)
        return np.concatenate(qs), np.concatenate(ts), np.unique(np.concatenate(rest))

    def _unchecked(self, q: FloatArray, found: FloatArray, rows: IntArray) -> tuple[IntArray, IntArray]:
        """(query, triangle) pairs of ``rows`` whose lower bound is below ``found``, top-down
        through the bounding hierarchy."""
        if self.levels is None:
            self.levels = bounding_hierarchy(self.vertices, self.faces, self.triangle_bounds)
        top = len(self.levels[0].bounds.radius) if self.levels else len(self.faces)
        qi = np.repeat(rows, top)
        node = np.tile(np.arange(top), len(rows))
        for level in self.levels:
            keep = level.bounds.lower(q[qi], node) < found[qi]
            qi, node = qi[keep], node[keep]
            counts = level.start[node + 1] - level.start[node]
            offsets = np.cumsum(counts) - counts
            at = np.arange(int(counts.sum())) - np.repeat(offsets - level.start[node], counts)
            qi, node = np.repeat(qi, counts), level.children[at]
        keep = self.triangle_bounds.lower(q[qi], node) < found[qi]
        return qi[keep], node[keep]


def _first_occurrences(cand: IntArray) -> NDArray[np.bool_]:
    """(q, c) mask of the entries of each row not seen earlier in that row."""
    order = np.argsort(cand, axis=1, kind="stable")
    ranked = np.take_along_axis(cand, order, axis=1)
    new = np.ones(cand.shape, dtype=bool)
    new[:, 1:] = ranked[:, 1:] != ranked[:, :-1]
    out = np.empty(cand.shape, dtype=bool)
    np.put_along_axis(out, order, new, axis=1)
    return out


@dataclass(frozen=True)
class Bounds:
    """Bounding cylinders of groups of triangles: every triangle of group ``i``
    lies within ``radius[i]`` of ``centre[i]`` and within ``thickness[i]`` of
    the plane through ``centre[i]`` normal to ``axis[i]`` (a zero axis: no
    plane, the bound is the ball's)."""

    centre: FloatArray
    axis: FloatArray
    radius: FloatArray
    thickness: FloatArray

    def lower(self, q: FloatArray, ids: IntArray) -> FloatArray:
        """Lower bound of the distance from each ``q`` to the triangles of group ``ids``:
        the distance to the cylinder ``{in-plane distance <= radius, |height| <= thickness}``."""
        d = q - self.centre[ids]
        axis = self.axis[ids]
        h = np.einsum("ij,ij->i", d, axis)
        rho = np.linalg.norm(d - h[:, None] * axis, axis=1)
        out: FloatArray = np.hypot(np.maximum(np.abs(h) - self.thickness[ids], 0.0),
                                   np.maximum(rho - self.radius[ids], 0.0))
        return out


@dataclass(frozen=True)
class Level:
    """One level of the bounding hierarchy: its groups' bounds and, per group
    ``i``, its children (groups of the level below, or triangles at the
    bottom) ``children[start[i]:start[i + 1]]``."""

    bounds: Bounds
    start: IntArray
    children: IntArray


@dataclass(frozen=True)
class RadiusGroup:
    """Triangles of similar bounding radius: their ids, the largest radius, a tree on their centroids."""

    triangles: IntArray
    radius: float
    tree: cKDTree


def radius_groups(bounds: Bounds) -> list[RadiusGroup]:
    """Triangles grouped by bounding radius in powers of two of the median radius."""
    radius = bounds.radius
    ref = float(np.median(radius))
    if not ref > 0:
        ref = float(radius.max()) if radius.max() > 0 else 1.0
    level = np.floor(np.log2(np.maximum(radius, ref) / ref)).astype(np.int64)
    groups = []
    for lv in np.unique(level):
        ids = np.flatnonzero(level == lv).astype(np.int64)
        groups.append(RadiusGroup(ids, float(radius[ids].max()), cKDTree(bounds.centre[ids])))
    return groups


def triangle_bounds(vertices: FloatArray, faces: IntArray) -> Bounds:
    """Bounds of every triangle: centroid, unit normal, farthest corner from the centroid, no thickness."""
    corners = vertices[faces]
    centre = corners.mean(axis=1)
    normal = np.cross(corners[:, 1] - corners[:, 0], corners[:, 2] - corners[:, 0])
    length = np.linalg.norm(normal, axis=1)
    axis = np.where(length[:, None] > 0, normal / np.where(length > 0, length, 1.0)[:, None], 0.0)
    radius = np.linalg.norm(corners - centre[:, None, :], axis=2).max(axis=1)
    return Bounds(centre, axis, radius, np.zeros(len(faces)))


def bounding_hierarchy(vertices: FloatArray, faces: IntArray, triangles: Bounds, branching: int = 8) -> list[Level]:
    """A hierarchy of groups over the triangles (with bounds ``triangles``), top level first.

    Each level groups the one below by nearest seed (``1 / branching`` of its
    centres, a fixed random choice); a group's bounds cover all its triangles'
    corners, so the hierarchy is valid whatever the grouping.
    """
    corners = vertices[faces]
    normal = np.cross(corners[:, 1] - corners[:, 0], corners[:, 2] - corners[:, 0])
    owner = np.arange(len(faces))                    # triangle -> group of the current level
    points = triangles.centre
    rng = np.random.default_rng(0)
    levels = []
    while len(points) > branching:
        seeds = points[np.sort(rng.choice(len(points), -(-len(points) // branching), replace=False))]
        _, parent = cKDTree(seeds).query(points)
        _, parent = np.unique(parent, return_inverse=True)       # drop seeds that took nothing
        owner = parent[owner]
        bounds = _group_bounds(corners, triangles, normal, owner, int(parent.max()) + 1)
        start = np.concatenate([[0], np.cumsum(np.bincount(parent))]).astype(np.int64)
        levels.append(Level(bounds, start, np.argsort(parent, kind="stable").astype(np.int64)))
        points = bounds.centre
    return levels[::-1]


def _group_bounds(corners: FloatArray, triangles: Bounds, normal: FloatArray, owner: IntArray, n: int) -> Bounds:
    """Bounds of the groups ``owner`` puts the triangles in."""
    count = np.bincount(owner, minlength=n)
    centre = np.column_stack([np.bincount(owner, weights=triangles.centre[:, a], minlength=n)
                              for a in range(3)]) / count[:, None]
    radius = np.zeros(n)
    np.maximum.at(radius, owner, np.linalg.norm(triangles.centre - centre[owner], axis=1) + triangles.radius)
    summed = np.column_stack([np.bincount(owner, weights=normal[:, a], minlength=n) for a in range(3)])
    length = np.linalg.norm(summed, axis=1)
    axis = np.where(length[:, None] > 0, summed / np.where(length > 0, length, 1.0)[:, None], 0.0)
    height = np.abs(np.einsum("tcj,tj->tc", corners - centre[owner][:, None, :], axis[owner])).max(axis=1)
    thickness = np.zeros(n)
    np.maximum.at(thickness, owner, height)
    return Bounds(centre, axis, radius, thickness)


def incident_triangles(faces: IntArray, n: int, cap: int = 16) -> IntArray:
    """(n, d) triangles around each vertex, padded with -1 (at most ``cap``)."""
    v = faces.ravel()
    t = np.repeat(np.arange(len(faces)), 3)
    order = np.argsort(v, kind="stable")
    v, t = v[order], t[order]
    counts = np.bincount(v, minlength=n)
    d = int(min(max(counts.max(initial=1), 1), cap))
    start = np.concatenate([[0], np.cumsum(counts)[:-1]])
    rank = np.arange(len(v)) - start[v]
    out = -np.ones((n, d), np.int64)
    keep = rank < d
    out[v[keep], rank[keep]] = t[keep]
    return out


def barycentric_matrix(faces: IntArray, tri: IntArray, bary: FloatArray, n: int) -> sparse.csr_matrix:
    """Sparse ``(len(tri), n)`` matrix taking vertex values to the points
    ``bary`` on triangles ``tri``."""
    n_q = len(tri)
    return sparse.csr_matrix((bary.ravel(), (np.repeat(np.arange(n_q), 3), faces[tri].ravel())), shape=(n_q, n))
