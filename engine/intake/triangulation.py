"""Polygons to triangles: quads all at once, larger polygons by ear cutting.

Polygons arrive the way mesh files and Blender store them: one flat list of
corner vertex indices ``corners`` and the number of corners of each polygon
``sizes``. Triangles pass through unchanged. Quads are split along the diagonal
that keeps both halves inside the quad (the shorter one when both do), all
quads in one vectorised step. Polygons with more than four corners are
projected (all at once) onto their best-fit planes and ear-cut one at a time,
which is correct for concave polygons where a fan is not: by the maintained
``mapbox_earcut`` library when it is importable, by the ear clipping below
when it is not or when it returns fewer than ``k - 2`` triangles (it drops
collinear and repeated corners, which the mesh must keep).

Every triangle keeps the winding of its polygon, so a consistently oriented
polygon mesh gives a consistently oriented triangle mesh.

Sources: the Newell normal (M. E. Newell's method, as given in Sutherland,
Sproull and Schumacker, "A characterization of ten hidden-surface algorithms",
1974 (from memory)) is the sum of ``p_i x p_{i+1}`` over the polygon's edges and
equals twice the vector area of the polygon; ear clipping rests on the two-ears
theorem (Meisters, "Polygons have ears", Amer. Math. Monthly 82, 1975): every
simple polygon with more than three corners has two non-overlapping ears.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from ..common.arrays import Array

__all__: list[str] = []


def _load_earcut() -> Callable[[Array, Array], Array] | None:
    """The ear cutter of ``mapbox_earcut`` (a maintained C++ library, bundled with the extension as a
    wheel), or None when it is not installed."""
    try:
        from mapbox_earcut import triangulate_float64
    except ImportError:  # pragma: no cover - depends on the environment
        return None
    cut: Callable[[Array, Array], Array] = triangulate_float64
    return cut


_earcut = _load_earcut()

# Below this fraction of the squared polygon extent a signed area counts as
# zero: the rounding error of a cross product of coordinates of size ``s`` is a
# few ulp of ``s**2`` (about 1e-16 relative), so 1e-14 leaves a wide margin
# while real slivers stay far above it (common practice).
_REL_EPS = 1e-14


def triangulate(vertices: Array, corners: Array, sizes: Array) -> tuple[Array, Array]:
    """Split polygons into triangles that keep each polygon's winding.

    The caller has validated the input (``sizes >= 3``,
    ``sizes.sum() == len(corners)``, indices in range).

    Parameters
    ----------
    vertices : (n, 3) float64 array
    corners : (c,) int64 array
        Corner vertex indices of all polygons, one polygon after another.
    sizes : (f,) int64 array
        Number of corners of each polygon.

    Returns
    -------
    triangles : (t, 3) int64 array
        Ordered by polygon; within a polygon in the order they were cut.
    tri_polygon : (t,) int64 array
        Index of the polygon each triangle came from.

    Notes
    -----
    Degenerate polygons (collinear or repeated corners, zero Newell normal)
    never raise: they are cut as a fan and the resulting zero-area triangles are
    left for the mesh cleaning to drop.
    """
    v = np.asarray(vertices, dtype=np.float64)
    corners = np.asarray(corners, dtype=np.int64)
    sizes = np.asarray(sizes, dtype=np.int64)
    if len(corners) == 3 * len(sizes) and (sizes == 3).all():   # triangles only: the same result at once
        return corners.reshape(-1, 3).copy(), np.arange(len(sizes), dtype=np.int64)
    starts = np.cumsum(sizes) - sizes
    tris: list[Array] = []
    owners: list[Array] = []

    which = np.flatnonzero(sizes == 3)
    if which.size:
        tris.append(corners[starts[which, None] + np.arange(3)])
        owners.append(which)

    which = np.flatnonzero(sizes == 4)
    if which.size:
        quads = corners[starts[which, None] + np.arange(4)]
        tris.append(_split_quads(v, quads).reshape(-1, 3))
        owners.append(np.repeat(which, 2))

    which = np.flatnonzero(sizes > 4)
    if which.size:
        cut, owner = _cut_polygons(v, corners, starts, sizes, which)
        tris.append(cut)
        owners.append(owner)

    if not tris:
        return np.zeros((0, 3), np.int64), np.zeros(0, np.int64)
    triangles = np.concatenate(tris).astype(np.int64, copy=False)
    tri_polygon = np.concatenate(owners).astype(np.int64, copy=False)
    order = np.argsort(tri_polygon, kind="stable")
    return np.ascontiguousarray(triangles[order]), tri_polygon[order]


def _split_quads(v: Array, quads: Array) -> Array:
    """Cut each quad ``abcd`` into two triangles, (q, 2, 3).

    Diagonal ``ac`` gives ``abc, acd``; diagonal ``bd`` gives ``abd, bcd``. A
    diagonal is valid when both of its triangles have positive area along the
    quad's Newell normal ``(c - a) x (d - b)`` (for a quad the Newell sum
    reduces to the cross product of its diagonals), i.e. both lie inside the
    quad with its winding. In a simple quad at most one corner is reflex and the
    valid diagonal is the one through it. When both are valid the shorter one
    is taken; when neither is (a degenerate or bow-tie quad), the one whose
    smaller triangle is larger.
    """
    a, b, c, d = (v[quads[:, i]] for i in range(4))
    normal = np.cross(c - a, d - b)

    def along(p: Array, q: Array, r: Array) -> Array:
        return np.asarray(np.einsum("ij,ij->i", np.cross(q - p, r - p), normal))

    score_ac = np.minimum(along(a, b, c), along(a, c, d))
    score_bd = np.minimum(along(a, b, d), along(b, c, d))
    scale = np.maximum(np.einsum("ij,ij->i", c - a, c - a), np.einsum("ij,ij->i", d - b, d - b))
    tol = _REL_EPS * scale * scale  # score is quadratic in area: (length^2)^2
    ok_ac, ok_bd = score_ac > tol, score_bd > tol
    shorter_bd = np.einsum("ij,ij->i", d - b, d - b) < np.einsum("ij,ij->i", c - a, c - a)
    use_bd = (ok_bd & ~ok_ac) | (ok_ac & ok_bd & shorter_bd) | (~ok_ac & ~ok_bd & (score_bd > score_ac))
    qa, qb, qc, qd = quads.T
    out = np.empty((len(quads), 2, 3), dtype=np.int64)
    out[:, 0] = np.where(use_bd[:, None], np.column_stack([qa, qb, qd]), np.column_stack([qa, qb, qc]))
    out[:, 1] = np.where(use_bd[:, None], np.column_stack([qb, qc, qd]), np.column_stack([qa, qc, qd]))
    return out


def _fan(k: int) -> Array:
    i = np.arange(1, k - 1)
    return np.column_stack([np.zeros_like(i), i, i + 1])


def _planar(v: Array, corners: Array, starts: Array, sizes: Array,
            which: Array) -> tuple[Array, Array, Array]:
    """Corners of polygons ``which`` in their best-fit planes, counter-clockwise.

    Each polygon is centred on its centroid and projected onto the plane
    perpendicular to its Newell normal, with in-plane axes ``(u, w)`` such that
    ``(u, w, normal)`` is right-handed, so the polygon winds counter-clockwise.

    Returns
    -------
    xy : (c, 2) float64 array
        Projected corners of the chosen polygons, one polygon after another.
    flat : (len(which),) bool array
        Polygons whose Newell normal is rounding noise (collinear or repeated
        corners): to be cut as a fan.
    eps : (len(which),) float64 array
        Signed-area tolerance of each polygon (``_REL_EPS`` times its squared extent).
    """
    k = sizes[which]
    offset = np.cumsum(k) - k
    idx = np.repeat(starts[which] - offset, k) + np.arange(int(k.sum()))
    pid = np.repeat(np.arange(which.size), k)
    points = v[corners[idx]]
    q = points - (np.add.reduceat(points, offset) / k[:, None])[pid]
    following = np.arange(q.shape[0]) + 1
    following[offset + k - 1] = offset
    normal = np.add.reduceat(np.cross(q, q[following]), offset)
    extent2 = np.maximum.reduceat(np.einsum("ij,ij->i", q, q), offset)
    nn = np.linalg.norm(normal, axis=1)
    flat = ~(nn > _REL_EPS * extent2)
    n_hat = normal / np.where(flat, 1.0, nn)[:, None]
    axis = np.zeros_like(n_hat)
    axis[np.arange(which.size), np.argmin(np.abs(n_hat), axis=1)] = 1.0
    u = np.cross(n_hat, axis)
    u /= np.maximum(np.linalg.norm(u, axis=1, keepdims=True), np.finfo(float).tiny)
    w = np.cross(n_hat, u)
    xy = np.column_stack([np.einsum("ij,ij->i", q, u[pid]), np.einsum("ij,ij->i", q, w[pid])])
    return xy, flat, _REL_EPS * extent2


def _cut_polygons(v: Array, corners: Array, starts: Array, sizes: Array,
                  which: Array) -> tuple[Array, Array]:
    """Triangles (vertex indices, each polygon's winding) and their polygon, for the polygons ``which``."""
    xy, flat, eps = _planar(v, corners, starts, sizes, which)
    k_all = sizes[which]
    offset = np.cumsum(k_all) - k_all
    local: list[Array] = []
    by_library = np.zeros(which.size, dtype=bool)
    for i, (k, at) in enumerate(zip(k_all.tolist(), offset.tolist())):
        pts = xy[at:at + k]
        t = _fan(k) if flat[i] else _library_ears(pts)
        by_library[i] = t is not None and not flat[i] and len(t) == k - 2
        if not by_library[i] and not flat[i]:
            t = _ear_clip(pts[:, 0], pts[:, 1], float(eps[i]))
        local.append(t + at)
    tri = np.concatenate(local)
    # The library's triangles get the polygon's (counter-clockwise) winding.
    a, b, c = xy[tri[:, 0]], xy[tri[:, 1]], xy[tri[:, 2]]
    cw = (b[:, 0] - a[:, 0]) * (c[:, 1] - a[:, 1]) - (b[:, 1] - a[:, 1]) * (c[:, 0] - a[:, 0]) < 0
    cw &= np.repeat(by_library, k_all - 2)
    tri[cw] = tri[cw][:, [0, 2, 1]]
    owner = np.repeat(np.arange(which.size), k_all - 2)
    first = np.repeat(starts[which] - offset, k_all - 2)
    return corners[tri + first[:, None]], which[owner]


def _library_ears(pts: Array) -> Array | None:
    """Ear cutting by ``mapbox_earcut`` (local indices, any winding); None when the library is missing."""
    if _earcut is None:
        return None
    return np.asarray(_earcut(pts, np.array([len(pts)], dtype=np.uint32)), dtype=np.int64).reshape(-1, 3)


def _ear_clip(x: Array, y: Array, eps: float) -> Array:
    """Ear-clip one counter-clockwise planar polygon, (k - 2, 3) local indices.

    A corner is convex when the signed area of (previous, corner, next) is
    above ``eps``. An ear is a convex
    corner whose triangle contains no other remaining corner (closed test, so a
    corner touching the cut also blocks it). If no ear is found (a self-
    intersecting or numerically flat remainder), a corner with zero signed area
    is cut off instead, and failing that the remainder becomes a fan.
    """
    k = len(x)
    prev = [(i - 1) % k for i in range(k)]
    nxt = [(i + 1) % k for i in range(k)]
    alive = np.ones(k, dtype=bool)

    def signed(i: int) -> float:
        a, c = prev[i], nxt[i]
        return float((x[i] - x[a]) * (y[c] - y[i]) - (y[i] - y[a]) * (x[c] - x[i]))

    def is_ear(i: int) -> bool:
        a, c = prev[i], nxt[i]
        if signed(i) <= eps:
            return False
        others = alive.copy()
        others[[a, i, c]] = False
        idx = np.flatnonzero(others)
        if idx.size == 0:
            return True
        px, py = x[idx], y[idx]
        # Drop corners sitting exactly on the ear's own corners (repeated positions).
        same = ((px == x[a]) & (py == y[a])) | ((px == x[i]) & (py == y[i])) | ((px == x[c]) & (py == y[c]))
        px, py = px[~same], py[~same]
        d1 = (x[i] - x[a]) * (py - y[a]) - (y[i] - y[a]) * (px - x[a])
        d2 = (x[c] - x[i]) * (py - y[i]) - (y[c] - y[i]) * (px - x[i])
        d3 = (x[a] - x[c]) * (py - y[c]) - (y[a] - y[c]) * (px - x[c])
        return not bool(np.any((d1 >= -eps) & (d2 >= -eps) & (d3 >= -eps)))

    out: list[tuple[int, int, int]] = []
    remaining = k
    i = 0
    while remaining > 3:
        start, found = i, False
        while True:
            if is_ear(i):
                found = True
                break
            i = nxt[i]
            if i == start:
                break
        if not found:
            # No proper ear: cut a flat corner if there is one, else fan the rest.
            flat = [j for j in np.flatnonzero(alive) if abs(signed(int(j))) <= eps]
            if not flat:
                ring = [i]
                j = nxt[i]
                while j != i:
                    ring.append(j)
                    j = nxt[j]
                out.extend((ring[0], ring[t], ring[t + 1]) for t in range(1, len(ring) - 1))
                return np.asarray(out, dtype=np.int64)
            i = int(flat[0])
        a, c = prev[i], nxt[i]
        out.append((a, i, c))
        alive[i] = False
        nxt[a], prev[c] = c, a
        remaining -= 1
        i = c
    a = i
    out.append((prev[a], a, nxt[a]))
    return np.asarray(out, dtype=np.int64)
