"""Vertex clustering: a linear-time first cut of a huge mesh before quadric simplification.

The quadric simplifier of :mod:`engine.matching.standin` spends its time per
edge collapse, so taking a million vertices to a stand-in of twelve thousand
is almost a million collapses. Most of them only merge vertices a small
fraction of the stand-in's edge apart, which vertex clustering does in a few
vectorised passes (common practice): a grid of cubic cells, each cell's
vertices merged into one vertex at their mean, triangles whose corners fall
into fewer than three clusters dropped.

Clustering alone can change a surface's topology (two sheets meeting in a
cell, a thin fold collapsing onto itself), so:

- a cluster is a connected piece of the surface inside its cell (edges
  inside the cell), so two sheets passing through one cell stay apart;
- boundary vertices are never merged, so the boundary is kept edge for edge;
- a cluster at an edge that is not an ordinary manifold edge (used by one
  triangle away from the boundary, by more than two, or twice in the same
  direction) or at a repeated triangle is split back into its original
  vertices.

The caller still checks the simplified result's topology against the input's
(:func:`engine.matching.standin.simplified_shape`).
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp
from numpy.typing import NDArray
from scipy.sparse.csgraph import connected_components

from ..intake.preparation import group_edges

__all__ = ["cluster_mesh", "cell_labels", "clustered_faces", "bad_clusters", "repeated_faces", "drop_fins"]

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.int64]


def cluster_mesh(vertices: FloatArray, faces: IntArray, cell: float, *,
                 boundary: bool = True) -> tuple[FloatArray, IntArray]:
    """The mesh clustered on a grid of ``cell``-sized cubes (see the module's notes).

    Parameters
    ----------
    vertices : (n, 3) float64, faces : (m, 3) int64
        A cleaned triangle mesh.
    cell : float
        Edge of the grid's cubes.
    boundary : bool
        Whether the mesh may have a boundary (False: it is known to be closed,
        and its boundary is not looked for).

    Returns
    -------
    (k, 3) float64 cluster means, (m', 3) int64 faces
    """
    n = len(vertices)
    tail, head = faces.ravel(), faces[:, [1, 2, 0]].ravel()
    border = np.zeros(n, dtype=bool)
    if boundary:
        groups = group_edges(tail, head, n)
        once = groups.order[groups.starts[groups.counts == 1]]
        border[tail[once]] = True
        border[head[once]] = True
    labels = cell_labels(vertices, (tail, head), cell, border)
    k = int(labels.max()) + 1
    border_of = np.zeros(k, dtype=bool)
    border_of[labels[border]] = True
    split = bad_clusters(clustered_faces(labels[faces]), k, border_of)[labels]
    if split.any():                    # their vertices are clusters of their own again
        labels = labels.copy()
        labels[split] = k + np.arange(int(split.sum()))
        labels = np.unique(labels, return_inverse=True)[1].astype(np.int64).reshape(-1)
        k = int(labels.max()) + 1
    count = np.bincount(labels, minlength=k).astype(np.float64)
    means = np.column_stack([np.bincount(labels, vertices[:, i], minlength=k) for i in range(3)]) / count[:, None]
    return means, clustered_faces(labels[faces])


def cell_labels(vertices: FloatArray, edges: tuple[IntArray, IntArray], cell: float,
                fixed: NDArray[np.bool_]) -> IntArray:
    """Cluster of each vertex: the connected pieces of the edges inside one grid cell
    (a ``fixed`` vertex is a cluster of its own). Labels ``0 .. k - 1``."""
    n = len(vertices)
    grid = np.floor((vertices - vertices.min(axis=0)) / cell).astype(np.int64)
    dims = grid.max(axis=0) + 1
    key = (grid[:, 0] * dims[1] + grid[:, 1]) * dims[2] + grid[:, 2]
    a, b = edges
    inside = (a < b) & (key[a] == key[b]) & ~fixed[a] & ~fixed[b]   # each inner edge once is enough
    graph = sp.csr_matrix((np.ones(int(inside.sum()), dtype=np.int8), (a[inside], b[inside])), shape=(n, n))
    labels = connected_components(graph, directed=True, connection="weak")[1]
    return np.asarray(labels, dtype=np.int64)


def clustered_faces(corners: IntArray) -> IntArray:
    """The triangles ``corners`` (cluster labels per corner) whose three clusters differ."""
    keep = (corners[:, 0] != corners[:, 1]) & (corners[:, 1] != corners[:, 2]) & (corners[:, 2] != corners[:, 0])
    return np.ascontiguousarray(corners[keep])


def bad_clusters(faces: IntArray, k: int, border_of: NDArray[np.bool_]) -> NDArray[np.bool_]:
    """(k,) bool: clusters at a doubtful edge or repeated triangle of the clustered ``faces``.

    ``border_of`` marks the clusters that are boundary vertices of the input;
    an edge used once is ordinary only between two of them.
    """
    tail, head = faces.ravel(), faces[:, [1, 2, 0]].ravel()
    groups = group_edges(tail, head, k)
    first = groups.order[groups.starts]
    second = groups.order[np.minimum(groups.starts + 1, len(groups.order) - 1)]
    ordinary = (groups.counts == 2) & (tail[first] == head[second])
    ordinary |= (groups.counts == 1) & border_of[tail[first]] & border_of[head[first]]
    bad = np.zeros(k, dtype=bool)
    bad[tail[first[~ordinary]]] = True
    bad[head[first[~ordinary]]] = True
    bad[faces[repeated_faces(faces, k)].ravel()] = True
    return bad


def repeated_faces(faces: IntArray, k: int) -> NDArray[np.bool_]:
    """(m,) bool: triangles whose three vertices (of ``0 .. k - 1``) another triangle has too."""
    rows = np.sort(faces, axis=1)
    if float(k) ** 3 < 2.0 ** 62:
        key = (rows[:, 0] * np.int64(k) + rows[:, 1]) * np.int64(k) + rows[:, 2]
        order = np.argsort(key)
        same = np.flatnonzero(key[order][1:] == key[order][:-1])
    else:
        order = np.lexsort(rows.T[::-1])
        sr = rows[order]
        same = np.flatnonzero((sr[1:] == sr[:-1]).all(axis=1))
    out = np.zeros(len(faces), dtype=bool)
    out[order[same]] = True
    out[order[same + 1]] = True
    return out


def drop_fins(vertices: FloatArray, faces: IntArray) -> tuple[FloatArray, IntArray]:
    """Without triangles that repeat (a fin of two triangles back to back, which an edge
    collapse without a link test can leave), and without the vertices left unused."""
    repeated = repeated_faces(faces, len(vertices))
    if not repeated.any():
        return vertices, faces
    kept = faces[~repeated]
    used = np.flatnonzero(np.bincount(kept.ravel(), minlength=len(vertices)))
    index = np.full(len(vertices), -1, dtype=np.int64)
    index[used] = np.arange(len(used))
    return vertices[used], index[kept]
