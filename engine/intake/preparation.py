"""Mesh intake: the one validator at the door, triangulation and cleaning.

Every public entry point of the engine that takes a mesh calls
:func:`validate_mesh` first. :func:`prepare_mesh` takes what a file or a host
application holds (triangles, or polygons as corners and sizes), triangulates
it, and cleans it without losing data: whatever is welded, dropped or set aside
is remembered, so per-vertex results on the cleaned mesh can be handed back for
every original vertex (:meth:`PreparedMesh.restore`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp
from scipy.sparse.csgraph import connected_components
from scipy.spatial import cKDTree

from ..common.arrays import Array, ArrayLike, cross_rows
from .triangulation import triangulate

__all__ = ["validate_mesh", "validate_triangles", "prepare_mesh", "PreparedMesh", "mesh_topology", "EdgeGroups",
           "group_edges", "split_fans", "fan_counts", "FAN_WALK", "edge_graph"]

# Triangles with area <= _ZERO_AREA * (bounding-box diagonal)**2 are dropped.
# The area comes from a cross product of edge vectors whose coordinates are at
# most the diagonal d in size; in float64 each product carries a rounding error
# of about 1.1e-16 * d**2, so an area below a few hundred ulp of d**2 cannot be
# told from zero. 1e-14 * d**2 is about 45 ulp: it catches collapsed and exactly
# collinear triangles (whose computed area is pure rounding noise) while a real
# sliver, even one with an edge ratio of 1e-6 on a 1e-3-diagonal feature, has
# an area many orders of magnitude above it (common practice).
_ZERO_AREA = 1e-14


def validate_mesh(vertices: ArrayLike, faces: ArrayLike) -> tuple[Array, Array]:
    """Check a triangle mesh and return it as contiguous float64 / int64 arrays.

    Parameters
    ----------
    vertices : (n, 3) float array
    faces : (m, 3) integer array
        Indices into ``vertices``.

    Returns
    -------
    vertices : (n, 3) float64 array
    faces : (m, 3) int64 array

    Raises
    ------
    ValueError
        With a message naming the problem: no vertices, no faces, a wrong
        shape or dtype, an index out of range, a non-finite coordinate.
    """
    v = validate_vertices(vertices)
    f = np.asarray(faces)
    if f.dtype == object or not np.issubdtype(f.dtype, np.integer):
        if f.size == 0:
            f = f.reshape(0, 3).astype(np.int64) if f.ndim == 2 or f.size == 0 else f
        else:
            raise ValueError(f"faces must be an integer array, got dtype {f.dtype}")
    if f.ndim != 2 or f.shape[1] != 3:
        raise ValueError(f"faces must have shape (m, 3) (triangles), got {f.shape}")
    if f.shape[0] == 0:
        raise ValueError("mesh has no faces")
    n = v.shape[0]
    lo, hi = int(f.min()), int(f.max())
    if lo < 0 or hi >= n:
        which = np.flatnonzero((f < 0).any(axis=1) | (f >= n).any(axis=1))[0]
        value = hi if hi >= n else lo
        raise ValueError(f"faces index {value} out of range for {n} vertices (face {int(which)})")
    return v, np.ascontiguousarray(f, dtype=np.int64)


def validate_vertices(vertices: ArrayLike) -> Array:
    """The vertex half of :func:`validate_mesh`: (n, 3) finite numbers, as float64."""
    v = np.asarray(vertices)
    if v.dtype == object or not (np.issubdtype(v.dtype, np.floating) or np.issubdtype(v.dtype, np.integer)):
        raise ValueError(f"vertices must be a numeric array, got dtype {v.dtype}")
    if v.ndim != 2 or v.shape[1] != 3:
        raise ValueError(f"vertices must have shape (n, 3), got {v.shape}")
    if v.shape[0] == 0:
        raise ValueError("mesh has no vertices")
    v = np.ascontiguousarray(v, dtype=np.float64)
    bad = ~np.isfinite(v).all(axis=1)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise ValueError(f"vertex {i} has a non-finite coordinate {v[i].tolist()} "
                         f"({int(bad.sum())} such vertices)")
    return v


def validate_polygons(corners: ArrayLike, sizes: ArrayLike, n: int) -> tuple[Array, Array]:
    """Check polygons given as a flat corner list and per-polygon sizes.

    Parameters
    ----------
    corners : (c,) integer array
    sizes : (f,) integer array
    n : int
        Number of vertices the corners index into.

    Returns
    -------
    corners : (c,) int64 array
    sizes : (f,) int64 array
    """
    c = np.asarray(corners)
    s = np.asarray(sizes)
    for name, a in (("corners", c), ("sizes", s)):
        if a.size == 0:
            a = a.reshape(0)
        elif a.dtype == object or not np.issubdtype(a.dtype, np.integer):
            raise ValueError(f"{name} must be an integer array, got dtype {a.dtype}")
        if a.ndim != 1:
            raise ValueError(f"{name} must be one-dimensional, got shape {a.shape}")
    c = np.ascontiguousarray(c.reshape(-1), dtype=np.int64)
    s = np.ascontiguousarray(s.reshape(-1), dtype=np.int64)
    if s.size == 0:
        raise ValueError("mesh has no faces")
    small = np.flatnonzero(s < 3)
    if small.size:
        i = int(small[0])
        raise ValueError(f"polygon {i} has {int(s[i])} corners, at least 3 needed "
                         f"({small.size} such polygons)")
    total = int(s.sum())
    if total != c.size:
        raise ValueError(f"polygon sizes add up to {total} corners but {c.size} corners were given")
    bad = np.flatnonzero((c < 0) | (c >= n))
    if bad.size:
        j = int(bad[0])
        polygon = int(np.searchsorted(np.cumsum(s), j, side="right"))
        raise ValueError(f"corners index {int(c[j])} out of range for {n} vertices (polygon {polygon})")
    return c, s


def validate_triangles(triangles: tuple[ArrayLike, ArrayLike], n: int, f: int) -> tuple[Array, Array]:
    """Check a polygon mesh's triangles given by the caller.

    Parameters
    ----------
    triangles : ((t, 3) integer array, (t,) integer array)
        Vertex indices of each triangle, and the polygon each comes from.
    n, f : int
        Number of vertices and of polygons.

    Returns
    -------
    tris : (t, 3) int64 array
    tri_polygon : (t,) int64 array
    """
    tris, polygon = (np.asarray(a) for a in triangles)
    for name, a, ndim in (("triangles", tris, 2), ("triangle polygons", polygon, 1)):
        if a.dtype == object or not np.issubdtype(a.dtype, np.integer):
            raise ValueError(f"{name} must be an integer array, got dtype {a.dtype}")
        if a.ndim != ndim or (ndim == 2 and a.shape[1] != 3) or a.size == 0:
            shape = "(t, 3)" if ndim == 2 else "(t,)"
            raise ValueError(f"{name} must be a non-empty {shape} array, got shape {a.shape}")
    if len(polygon) != len(tris):
        raise ValueError(f"{len(tris)} triangles but {len(polygon)} triangle polygons")
    if tris.min() < 0 or tris.max() >= n:
        raise ValueError(f"triangle vertex index out of range [0, {n}): {int(tris.min())}..{int(tris.max())}")
    if polygon.min() < 0 or polygon.max() >= f:
        raise ValueError(f"triangle polygon index out of range [0, {f}): "
                         f"{int(polygon.min())}..{int(polygon.max())}")
    return (np.ascontiguousarray(tris, dtype=np.int64),
            np.ascontiguousarray(polygon, dtype=np.int64))


@dataclass(frozen=True)
class PreparedMesh:
    """A cleaned triangle mesh with the map back to the mesh it came from.

    Attributes
    ----------
    vertices : (n', 3) float64 array
        Only vertices that some kept triangle uses, in original order.
    faces : (m', 3) int64 array
        Triangles indexing ``vertices``, each keeping its polygon's winding.
    to_clean : (n,) int64 array
        For every original vertex its index in ``vertices``; -1 for a vertex no
        kept triangle uses (neither itself nor an exact copy of it).
    from_clean : (n',) int64 array
        For every cleaned vertex one original vertex: the lowest original index
        among the exact copies welded into it.
    restore_index : (n,) int64 array
        For every original vertex the cleaned vertex whose value it receives in
        :meth:`restore`: ``to_clean`` where that is set, else the spatially
        nearest cleaned vertex.
    tri_polygon : (m',) int64 array
        For every kept triangle the original polygon (or input triangle) index.
    n_original : int
        Number of original vertices ``n``.
    n_components : int
        Connected components of the cleaned mesh (through shared vertices).
    component : (n',) int64 array
        Component label of each cleaned vertex, ``0 .. n_components - 1``.
    n_boundary_loops : int
        Closed chains of boundary edges (edges used by exactly one triangle).
    non_manifold_edges : int
        Edges used by more than two triangles.
    non_manifold_vertices : int
        Vertices whose triangles do not form one edge-connected fan (a bow-tie
        vertex where two sheets touch at a point counts; so does every vertex
        whose fans are joined only through a non-manifold edge's other faces).
    notes : tuple of str
        What the cleaning did, one short sentence each.
    """

    vertices: Array
    faces: Array
    to_clean: Array
    from_clean: Array
    restore_index: Array
    tri_polygon: Array
    n_original: int
    n_components: int
    component: Array
    n_boundary_loops: int
    non_manifold_edges: int
    non_manifold_vertices: int
    notes: tuple[str, ...]

    @property
    def handles(self) -> int | None:
        """Holes through the surface (as in a ring), summed over the pieces: the genus
        ``(2 C - (V - E + F) - B) / 2`` of Euler's formula for surfaces (common practice),
        C components, B boundary loops, of the cleaned mesh. None when an edge has
        more than two triangles (no surface genus then)."""
        if self.non_manifold_edges:
            return None
        f = self.faces
        edges = len(group_edges(f.ravel(), f[:, [1, 2, 0]].ravel(), len(self.vertices)).starts)
        chi = len(self.vertices) - edges + len(f)
        return max((2 * self.n_components - chi - self.n_boundary_loops) // 2, 0)

    def restore(self, values: ArrayLike) -> Array:
        """Per-vertex values on the cleaned mesh, handed back to every original vertex.

        Parameters
        ----------
        values : (n', ...) array
            One row per cleaned vertex.

        Returns
        -------
        (n, ...) array
            Welded copies get their representative's row; vertices that no
            kept triangle uses get the row of the spatially nearest cleaned
            vertex. Integer and boolean values are copied, never blended.
        """
        a = np.asarray(values)
        if a.ndim == 0 or a.shape[0] != len(self.vertices):
            raise ValueError(f"values must have one row per cleaned vertex ({len(self.vertices)}), "
                             f"got shape {a.shape}")
        return a[self.restore_index]

    def to_cleaned(self, values: ArrayLike) -> Array:
        """Per-vertex values on the original mesh, taken to the cleaned vertices.

        Parameters
        ----------
        values : (n, ...) array
            One row per original vertex.

        Returns
        -------
        (n', ...) array
            For a group of welded copies the row of its representative (the
            lowest original index, ``from_clean``); the copies' own rows are
            not averaged, so labels and weights pass through unchanged.
        """
        a = np.asarray(values)
        if a.ndim == 0 or a.shape[0] != self.n_original:
            raise ValueError(f"values must have one row per original vertex ({self.n_original}), "
                             f"got shape {a.shape}")
        return a[self.from_clean]


def prepare_mesh(vertices: ArrayLike, faces: ArrayLike | None = None, *, corners: ArrayLike | None = None,
                 sizes: ArrayLike | None = None, weld: bool = True,
                 triangles: tuple[ArrayLike, ArrayLike] | None = None) -> PreparedMesh:
    """Validate, triangulate and clean a mesh, keeping the map back to it.

    Parameters
    ----------
    vertices : (n, 3) float array
    faces : (m, 3) integer array, optional
        Triangles. Give either ``faces`` or ``corners`` and ``sizes``.
    corners : (c,) integer array, optional
        Polygon corners, one polygon after another.
    sizes : (f,) integer array, optional
        Corners per polygon (each at least 3).
    weld : bool
        Merge vertices with exactly identical coordinates (seams split for UVs
        or normals in exporters). Nothing within a tolerance is merged: two
        vertices a hair apart may be meant to be apart.
    triangles : ((t, 3) integer array, (t,) integer array), optional
        With ``corners`` and ``sizes``: the polygons' triangles already
        computed by the caller (vertex indices) and the polygon each comes
        from; used instead of triangulating here (see
        :func:`validate_triangles`).

    Returns
    -------
    PreparedMesh

    Raises
    ------
    ValueError
        For invalid input (see :func:`validate_mesh`; for polygons: a size
        below 3, sizes not adding up to the number of corners, an index out of
        range), or when no triangle with non-zero area is left.

    Notes
    -----
    Steps, in order: triangulate (polygons), weld exact duplicates, drop
    triangles with area at most ``1e-14 * d**2`` where ``d`` is the bounding-box
    diagonal of the referenced vertices (below that an area is rounding noise
    of the cross product; see ``_ZERO_AREA``), drop repeated triangles (same
    three vertices in any order or orientation; the first is kept), set aside
    vertices no triangle uses, then count components, boundary loops and
    non-manifold edges and vertices.
    """
    if faces is not None and (corners is not None or sizes is not None):
        raise ValueError("give either faces or corners and sizes, not both")
    if faces is not None and triangles is not None:
        raise ValueError("triangles go with corners and sizes, not with faces")
    if faces is not None:
        v, tris = validate_mesh(vertices, faces)
        tri_polygon = np.arange(len(tris), dtype=np.int64)
    elif corners is not None and sizes is not None:
        v = validate_vertices(vertices)
        c, s = validate_polygons(corners, sizes, len(v))
        tris, tri_polygon = (triangulate(v, c, s) if triangles is None
                             else validate_triangles(triangles, len(v), len(s)))
    else:
        raise ValueError("no faces given: pass faces, or corners and sizes")
    n = len(v)
    notes: list[str] = []

    rep = _weld(v, notes) if weld else np.arange(n, dtype=np.int64)
    tris, tri_polygon = _drop_degenerate(v, rep[tris], tri_polygon, notes)

    # Compact: only referenced vertices, in original order.
    from_clean = np.flatnonzero(np.bincount(tris.reshape(-1), minlength=n))
    new_index = np.full(n, -1, dtype=np.int64)
    new_index[from_clean] = np.arange(len(from_clean))
    to_clean = new_index[rep]
    faces_c = np.ascontiguousarray(new_index[tris])
    verts_c = np.ascontiguousarray(v[from_clean])
    loose = np.flatnonzero(to_clean < 0)
    restore_index = to_clean.copy()
    if loose.size:
        notes.append(f"set aside {loose.size} unreferenced vertices")
        restore_index[loose] = cKDTree(verts_c).query(v[loose])[1]

    nv = len(verts_c)
    groups = group_edges(faces_c.reshape(-1), faces_c[:, [1, 2, 0]].reshape(-1), nv)
    n_components, component = connected_components(edge_graph(faces_c, nv, groups), directed=True,
                                                   connection="weak")
    if n_components > 1:
        notes.append(f"{n_components} connected components")
    loops, nm_edges, nm_vertices = mesh_topology(faces_c, nv, groups)
    if nm_edges:
        notes.append(f"{nm_edges} non-manifold edges")
    if nm_vertices:
        notes.append(f"{nm_vertices} non-manifold vertices")
    return PreparedMesh(
        vertices=verts_c, faces=faces_c, to_clean=to_clean, from_clean=from_clean,
        restore_index=restore_index.astype(np.int64), tri_polygon=tri_polygon,
        n_original=n, n_components=int(n_components), component=component.astype(np.int64),
        n_boundary_loops=loops, non_manifold_edges=nm_edges, non_manifold_vertices=nm_vertices,
        notes=tuple(notes))


def _weld(v: Array, notes: list[str]) -> Array:
    """Representative of each vertex: the lowest original index with exactly the same position."""
    n = len(v)
    rep = np.arange(n, dtype=np.int64)
    if n < 2:
        return rep
    order = np.lexsort((v[:, 2], v[:, 1], v[:, 0]))
    sv = v[order]
    new_group = np.ones(n, dtype=bool)
    new_group[1:] = (sv[1:] != sv[:-1]).any(axis=1)
    group = np.cumsum(new_group) - 1
    lowest = order[new_group]  # lexsort is stable: each group starts with its lowest index
    rep[order] = lowest[group]
    n_welded = int(n - len(lowest))
    if n_welded:
        notes.append(f"welded {n_welded} duplicate vertices")
    return rep


def _drop_degenerate(v: Array, tris: Array, tri_polygon: Array,
                     notes: list[str]) -> tuple[Array, Array]:
    """Drop zero-area triangles (including those welding collapsed), then repeated ones (first kept)."""
    used = np.flatnonzero(np.bincount(tris.reshape(-1), minlength=len(v)))
    span = v[used].max(axis=0) - v[used].min(axis=0)
    diag2 = float(span @ span)
    p0, p1, p2 = v[tris[:, 0]], v[tris[:, 1]], v[tris[:, 2]]
    area = 0.5 * np.linalg.norm(cross_rows(p1 - p0, p2 - p0), axis=1)
    keep = area > _ZERO_AREA * diag2
    keep &= (tris[:, 0] != tris[:, 1]) & (tris[:, 1] != tris[:, 2]) & (tris[:, 2] != tris[:, 0])
    if not keep.any():
        raise ValueError("mesh has no faces with non-zero area")
    if not keep.all():
        notes.append(f"dropped {int((~keep).sum())} zero-area faces")
    tris, tri_polygon = tris[keep], tri_polygon[keep]
    first = _first_of_rows(np.sort(tris, axis=1), len(v))
    if len(first) < len(tris):
        notes.append(f"dropped {len(tris) - len(first)} duplicate faces")
        first.sort()
        tris, tri_polygon = tris[first], tri_polygon[first]
    return tris, tri_polygon


def edge_graph(faces: Array, nv: int, groups: EdgeGroups) -> sp.csr_matrix:
    """(nv, nv) sparse graph with each edge of ``faces`` once, from the smaller vertex to the larger
    (``groups``: its face-edges grouped by :func:`group_edges`, already in that order)."""
    h = groups.order[groups.starts]
    tail, head = faces.reshape(-1)[h], faces[:, [1, 2, 0]].reshape(-1)[h]
    low, high = np.minimum(tail, head), np.maximum(tail, head)
    indptr = np.zeros(nv + 1, dtype=np.int64)
    np.cumsum(np.bincount(low, minlength=nv), out=indptr[1:])
    return sp.csr_matrix((np.ones(len(h), dtype=np.int8), high, indptr), shape=(nv, nv))


def mesh_topology(faces: Array, nv: int, groups: EdgeGroups | None = None) -> tuple[int, int, int]:
    """Boundary loops, non-manifold edges and non-manifold vertices of a triangle mesh.

    Half-edge ``t*3 + k`` runs from corner ``k`` to corner ``k + 1`` of triangle
    ``t``. An undirected edge used by one triangle is a boundary edge. Boundary
    loops are the cycles obtained by following boundary half-edges head to
    tail (at a vertex where several boundary chains meet, incoming and outgoing
    half-edges are paired in the order of their triangles, so two loops that
    touch at a bow-tie vertex may be counted as one); where orientation is inconsistent and a vertex has unequal
    numbers of incoming and outgoing boundary half-edges, the loops are counted
    as connected pieces of the boundary instead.

    A vertex is non-manifold when its corners split into more than one fan:
    corners at the vertex in two triangles that share an edge through it are
    joined (common practice; the same definition as a vertex-manifold test).
    ``groups``: the face-edges grouped by :func:`group_edges`, computed here when not given.
    """
    tail = faces.reshape(-1)
    head = faces[:, [1, 2, 0]].reshape(-1)
    if groups is None:
        groups = group_edges(tail, head, nv)
    order, starts, counts = groups.order, groups.starts, groups.counts
    nm_edges = int((counts > 2).sum())

    # Boundary loops.
    bnd = order[starts[counts == 1]]
    loops = 0
    if bnd.size:
        bt, bh = tail[bnd], head[bnd]
        out_deg = np.bincount(bt, minlength=nv)
        in_deg = np.bincount(bh, minlength=nv)
        if np.array_equal(out_deg, in_deg):
            # Pair the j-th incoming with the j-th outgoing half-edge at each vertex.
            by_tail = np.argsort(bt, kind="stable")
            by_head = np.argsort(bh, kind="stable")
            nxt = np.empty(len(bnd), dtype=np.int64)
            nxt[by_head] = by_tail
            g = sp.coo_matrix((np.ones(len(bnd)), (np.arange(len(bnd)), nxt)), shape=(len(bnd),) * 2)
            loops = int(connected_components(g, directed=False)[0])
        else:
            verts = np.unique(np.r_[bt, bh])
            g = sp.coo_matrix((np.ones(len(bnd)), (bt, bh)), shape=(nv, nv))
            labels = connected_components(g, directed=False)[1]
            loops = len(np.unique(labels[verts]))

    nm_vertices = int(split_fans(faces, nv, groups).sum())
    return loops, nm_edges, nm_vertices


def split_fans(faces: Array, nv: int, groups: EdgeGroups | None = None) -> Array:
    """(nv,) bool: vertices whose triangles form more than one fan.

    Corners at the vertex in two triangles that share an edge through it are
    joined (common practice; the same definition as a vertex-manifold test);
    a fan is a connected set of joined corners. ``groups`` are the face-edges
    of ``faces`` grouped by :func:`group_edges` (half-edge ``t*3 + k`` from
    corner ``k`` to ``k + 1``), computed here when not given.

    Where every edge at a vertex is an ordinary one (two triangles, opposite
    directions), the corner across the outgoing edge is the next corner around
    the vertex, and the vertex has one fan when walking from one of its corners
    comes back after all of them; the other vertices, and those whose walk is
    longer than :data:`FAN_WALK` steps, have their fans counted as connected
    components of the joined corners (:func:`fan_counts`).
    """
    m3 = 3 * len(faces)
    tail = faces.reshape(-1)
    head = faces[:, [1, 2, 0]].reshape(-1)
    if groups is None:
        groups = group_edges(tail, head, nv)
    order, starts, counts = groups.order, groups.starts, groups.counts
    first, second = order[starts], order[np.minimum(starts + 1, m3 - 1)]
    ordinary = (counts == 2) & (tail[first] == head[second])
    irregular = np.zeros(nv, dtype=bool)
    irregular[tail[first[~ordinary]]] = True
    irregular[head[first[~ordinary]]] = True
    # the next corner around the vertex: the corner after the twin half-edge's in its triangle
    after = (np.arange(len(faces))[:, None] * 3 + np.array([1, 2, 0])).reshape(-1)
    step = np.arange(m3)
    step[first[ordinary]], step[second[ordinary]] = after[second[ordinary]], after[first[ordinary]]
    size = np.bincount(tail, minlength=nv)
    start = np.full(nv, -1, dtype=np.int64)
    start[tail] = np.arange(m3)
    walk = np.flatnonzero((size > 0) & ~irregular)
    here, length = step[start[walk]], np.ones(len(walk), dtype=np.int64)
    active = np.flatnonzero(here != start[walk])
    for _ in range(FAN_WALK):
        if not active.size:
            break
        here[active] = step[here[active]]
        length[active] += 1
        active = active[here[active] != start[walk[active]]]
    irregular[walk[active]] = True                  # walked too long: counted below
    split = np.zeros(nv, dtype=bool)
    done = ~irregular[walk]
    split[walk[done]] = length[done] < size[walk[done]]
    if irregular.any():
        split |= fan_counts(faces, nv, groups, only=irregular) > 1
    return split


FAN_WALK = 64
"""Steps of the walk around a vertex in :func:`split_fans` before its fans are counted the general way."""


def fan_counts(faces: Array, nv: int, groups: EdgeGroups, only: Array | None = None) -> Array:
    """(nv,) int64: the fans of each vertex (of each vertex in the mask ``only``; 0 elsewhere and
    for a vertex no triangle uses), as connected components of the joined corners
    (see :func:`split_fans`)."""
    m = len(faces)
    tail = faces.reshape(-1)
    order = groups.order
    # Half-edge h = (a -> b) in triangle t: corners (t, a) and (t, b). Two
    # half-edges of the same undirected edge join the corners at a and at b.
    corner_at = np.arange(m * 3)  # half-edge h starts at corner h
    corner_head = (np.arange(m)[:, None] * 3 + np.array([1, 2, 0])).reshape(-1)
    group = groups.group_of()
    later = np.r_[False, group[1:] == group[:-1]]  # sorted position shares its edge with the one before
    h1, h0 = order[later], order[np.r_[later[1:], False]]
    # Join the corners at each end vertex of the shared edge.
    t0c = np.stack([corner_at[h0], corner_head[h0]], axis=1)
    t1c = np.stack([corner_at[h1], corner_head[h1]], axis=1)
    same_dir = tail[h0] == tail[h1]
    t1c = np.where(same_dir[:, None], t1c, t1c[:, ::-1])
    rows, cols = t0c.reshape(-1), t1c.reshape(-1)
    if only is not None:
        rows, cols = rows[only[tail[rows]]], cols[only[tail[rows]]]
    g = sp.coo_matrix((np.ones(len(rows)), (rows, cols)), shape=(m * 3, m * 3))
    labels = connected_components(g, directed=False)[1]
    # one entry per distinct (vertex, fan) pair; vertex * 3m + label < nv * 3m fits in int64
    corners = np.arange(m * 3) if only is None else np.flatnonzero(only[tail])
    pairs = np.sort(tail[corners] * np.int64(m * 3) + labels[corners])
    fans = pairs[np.r_[True, pairs[1:] != pairs[:-1]]] // np.int64(m * 3)
    return np.bincount(fans, minlength=nv).astype(np.int64)

def _first_of_rows(rows: Array, bound: int) -> Array:
    """Indices of the first occurrence of each distinct row, ascending.

    ``rows`` holds integers in ``0 .. bound - 1``. When every row packs into
    one int64 key, a plain sort of the keys first tells whether any row
    repeats (usually none does); otherwise, or when one does, a lexicographic
    sort of the columns, much faster than ``np.unique(..., axis=0)``, which
    sorts a structured view.
    """
    if float(bound) ** rows.shape[1] < 2.0 ** 62:
        key = np.zeros(len(rows), dtype=np.int64)
        for column in rows.T:
            key = key * np.int64(bound) + column
        packed = np.sort(key)
        if not (packed[1:] == packed[:-1]).any():
            return np.arange(len(rows), dtype=np.int64)
    order = np.lexsort(rows.T[::-1])
    sr = rows[order]
    new = np.ones(len(rows), dtype=bool)
    new[1:] = (sr[1:] != sr[:-1]).any(axis=1)
    return np.sort(order[new])  # lexsort is stable: each run starts with its lowest index


@dataclass(frozen=True)
class EdgeGroups:
    """Face-edges grouped by the undirected edge they lie on.

    Attributes
    ----------
    order : (3 m,) int64 array
        Face-edge indices sorted by undirected edge (then by the secondary key
        given to :func:`group_edges`, else stably by index).
    starts : (g,) int64 array
        Position in ``order`` where each edge's group begins.
    counts : (g,) int64 array
        Number of face-edges on each edge (1 on a boundary, 2 inside a
        manifold, more on a non-manifold edge).
    """

    order: Array
    starts: Array
    counts: Array

    def group_of(self) -> Array:
        """(3 m,) group number of each sorted position."""
        return np.repeat(np.arange(self.starts.size), self.counts)


def group_edges(p: Array, q: Array, n: int, secondary: Array | None = None) -> EdgeGroups:
    """Group directed edges ``p[i] -> q[i]`` over ``n`` vertices by the undirected edge {p, q}.

    The edge key is ``min(p, q) * n + max(p, q)``; within a group the edges
    are ordered by ``secondary`` when given, else by index.
    """
    key = np.minimum(p, q).astype(np.int64) * np.int64(n) + np.maximum(p, q)
    if secondary is not None:
        order = np.lexsort((secondary, key))
    elif key.size and (int(key.max()) + 1) * key.size <= np.iinfo(np.int64).max:
        # a stable order by key: sort key * size + index (fits in int64), then unpack the index
        size = np.int64(key.size)
        order = np.sort(key * size + np.arange(key.size, dtype=np.int64)) % size
    else:
        order = np.argsort(key, kind="stable")
    ks = key[order]
    start = np.ones(ks.size, dtype=bool)
    start[1:] = ks[1:] != ks[:-1]
    starts = np.flatnonzero(start)
    counts = np.diff(np.append(starts, ks.size))
    return EdgeGroups(order.astype(np.int64), starts.astype(np.int64), counts.astype(np.int64))
