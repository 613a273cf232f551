"""UV maps (and any per-corner value laid out in charts) carried with their seams.

A UV map is cut into islands: faces joined across edges where both ends
carry the same coordinates. Across a seam the same vertex has different
coordinates on either side, and a remeshed target's edges do not run along
the source's seams, so some target faces straddle one. Averaging over such a
face (or reading each corner from its own side) would stretch it across the
whole texture. Instead every target face is laid out in one island:

1. the face's centre is located on the source (:func:`engine.carrying.faces.faces_under_centres`);
   its source triangle names the face's island;
2. a corner whose own mapped point lies on a source triangle of that island
   takes the coordinates interpolated there (for a map without seams this is
   exactly the point transfer);
3. a corner whose mapped point lies across a seam (on another island, or on
   the same island reached the other way round, as across the seam of a
   sphere's map, where the values jump by far more than
   the centre triangle spans: :data:`JUMP`) takes the coordinates of
   the centre's source triangle extended linearly to that point (barycentric
   coordinates in the triangle's plane, which may be negative), so the face
   stays whole in its island; a texture's padding around islands (common
   practice) covers the small overhang.

The target so gets a seam along its own edges wherever the source has one.
Values are not clamped: coordinates outside [0, 1] are valid UVs. Always
point to point: a basis would blur the islands' edges.
"""

from __future__ import annotations

from typing import Any, cast

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components

from ..intake.preparation import group_edges
from .corners import CornerResult, triangle_corners
from .faces import FaceHits, faces_under_centres, polygon_arrays
from .signals import check_signal

__all__ = ["SAME_VALUE", "JUMP", "polygon_islands", "plane_barycentric", "carry_charted"]

SAME_VALUE = 1e-6
"""Two corners at one vertex hold the same coordinates when they differ by less
than this times the map's extent."""


JUMP = 3.0
"""A corner's own value and its face's extended one differing by more than this
many times the span of the centre triangle's values lie across a seam."""


def polygon_islands(values: NDArray[np.float64], corner_verts: NDArray[np.int64],
                    face_sizes: NDArray[np.int64]) -> NDArray[np.int64]:
    """(f,) island of each polygon: polygons joined across edges whose two ends agree.

    Parameters
    ----------
    values : (c, k) float per corner
    corner_verts, face_sizes : the polygons
    """
    n_faces = len(face_sizes)
    starts = np.concatenate([[0], np.cumsum(face_sizes)[:-1]]).astype(np.int64)
    face = np.repeat(np.arange(n_faces, dtype=np.int64), face_sizes)
    corner = np.arange(len(corner_verts), dtype=np.int64)
    nxt = np.where(corner + 1 == starts[face] + face_sizes[face], starts[face], corner + 1)
    a, b = corner_verts[corner], corner_verts[nxt]
    lo_c = np.where(a <= b, corner, nxt)          # the corner at the lower vertex of the edge
    hi_c = np.where(a <= b, nxt, corner)
    edges = group_edges(a, b, int(corner_verts.max(initial=0)) + 1)
    group = edges.group_of()
    shared = group[1:] == group[:-1]
    first, second = edges.order[:-1][shared], edges.order[1:][shared]
    extent = float(np.ptp(values, axis=0).max()) if len(values) else 0.0
    tol = SAME_VALUE * max(extent, 1.0)
    agree = ((np.abs(values[lo_c[first]] - values[lo_c[second]]).max(axis=1) <= tol)
             & (np.abs(values[hi_c[first]] - values[hi_c[second]]).max(axis=1) <= tol))
    rows, cols = face[first[agree]], face[second[agree]]
    graph = coo_matrix((np.ones(len(rows)), (rows, cols)), shape=(n_faces, n_faces))
    _, labels = connected_components(graph, directed=False)
    return np.asarray(labels, dtype=np.int64)


def plane_barycentric(points: NDArray[np.float64], corners: NDArray[np.float64]) -> NDArray[np.float64]:
    """(q, 3) barycentric coordinates of ``points`` (q, 3) projected into the planes
    of the triangles ``corners`` (q, 3, 3); negative outside a triangle. A
    degenerate triangle gives its centre (1/3 each)."""
    a = corners[:, 0]
    e1, e2, d = corners[:, 1] - a, corners[:, 2] - a, points - a
    g11, g12, g22 = (e1 * e1).sum(1), (e1 * e2).sum(1), (e2 * e2).sum(1)
    r1, r2 = (e1 * d).sum(1), (e2 * d).sum(1)
    det = g11 * g22 - g12 * g12
    ok = det > 1e-12 * np.maximum(g11 * g22, 1e-300)
    safe = np.where(ok, det, 1.0)
    s = np.where(ok, (g22 * r1 - g12 * r2) / safe, 1.0 / 3.0)
    t = np.where(ok, (g11 * r2 - g12 * r1) / safe, 1.0 / 3.0)
    return np.column_stack([1.0 - s - t, s, t])


def carry_charted(pair: Any, name: str, values: ArrayLike, source_corner_verts: ArrayLike,
                  source_face_sizes: ArrayLike, target_corner_verts: ArrayLike,
                  target_face_sizes: ArrayLike, hits: FaceHits | None = None) -> CornerResult:
    """Carry one per-corner map laid out in islands (module docstring).

    Parameters
    ----------
    pair : engine.jobs.pair.Pair
        Its shapes were built from these polygons.
    name : str
    values : (c_s, k) float, one row per source corner (k = 2 for a UV map)
    source_corner_verts, source_face_sizes, target_corner_verts, target_face_sizes : the polygons
    hits : FaceHits, optional
        Where the target's face centres land, when already found.

    Returns
    -------
    CornerResult
        ``values`` (c_t, k) float64, ``source_error`` 0 (point to point).
    """
    S, T = pair.source, pair.target
    s_cv, s_sizes = polygon_arrays(source_corner_verts, source_face_sizes)
    t_cv, t_sizes = polygon_arrays(target_corner_verts, target_face_sizes)
    vals = check_signal(name, values, len(s_cv), "vector").reshape(len(s_cv), -1)
    island = polygon_islands(vals, s_cv, s_sizes)
    tri_island = island[np.asarray(S.prepared.tri_polygon)]
    if hits is None:
        hits = faces_under_centres(pair, t_cv, t_sizes)
    if len(hits.triangle) != len(t_sizes):
        raise ValueError(f"carrying {name!r}: the face centres were found for another target")
    corr = cast(Any, pair.correspondence)
    own_tri = np.asarray(T.restore(corr.triangle), dtype=np.int64)[t_cv]
    own_bary = np.asarray(T.restore(corr.barycentric), dtype=np.float64)[t_cv]
    centre_tri = np.repeat(hits.triangle, t_sizes)
    centre_vals = vals[triangle_corners(S, s_cv, s_sizes, centre_tri, name)]          # (c_t, 3, k)
    lam = plane_barycentric(hits.mapped[t_cv], S.vertices[S.faces[centre_tri]])
    extended = np.einsum("qj,qjc->qc", lam, centre_vals)
    own = np.einsum("qj,qjc->qc", own_bary, vals[triangle_corners(S, s_cv, s_sizes, own_tri, name)])
    # across a seam: another island, or the same island reached the other way
    # round (the values jump by far more than the centre triangle spans)
    span = np.ptp(centre_vals, axis=1).max(axis=1)
    jump = np.abs(own - extended).max(axis=1) > JUMP * span + SAME_VALUE
    across = (tri_island[own_tri] != tri_island[centre_tri]) | jump
    out = np.where(across[:, None], extended, own)
    if not np.isfinite(out).all():  # never write NaN
        raise ValueError(f"carrying {name!r} produced non-finite values")
    return CornerResult(out, 0.0)
