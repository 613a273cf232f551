"""Fill-reducing ordering of the vertices: nested dissection from the graph alone.

Coordinates are graph distances (Dijkstra, edge length ``sqrt(m_i) + sqrt(m_j)``
as a proxy of the mesh spacing) to four far-apart landmarks per component;
each part is bisected at the median of its most spread coordinate and the
vertices of one side touching the other form the separator, ordered after both
halves (George 1973, nested dissection; here with level-set separators, a
simple form of the geometric variant).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import scipy.sparse as sp
import scipy.sparse.csgraph as csgraph
from numpy.typing import NDArray

Array = NDArray[Any]
# A part awaiting bisection: its vertices and its inner edges (i, j); a
# separator, already final, has None for the edges.
Part = tuple[Array, Array | None, Array | None]

# Nested-dissection leaf size in vertices (figures: docs/measurements.md).
LEAF = 128

__all__ = ["LEAF", "graph_pattern", "nested_dissection"]


def graph_pattern(L: sp.csr_matrix) -> sp.csr_matrix:
    """The adjacency of ``L``'s off-diagonal pattern, all weights 1."""
    G = L.copy()
    G.setdiag(0)
    G.eliminate_zeros()
    G.data = np.ones_like(G.data)
    return G


def nested_dissection(G: sp.csr_matrix, m: Array, leaf: int = LEAF) -> tuple[Array, Array]:
    """Nested-dissection ordering of the graph ``G`` (n, n) with vertex masses ``m`` (n,).

    Returns the permutation (n,) (elimination order: ``perm[i]`` is the
    vertex eliminated i-th) and the boundaries (nb + 1,) of its blocks (leaves
    and separators) in elimination order.
    """
    n = G.shape[0]
    ncomp, labels = csgraph.connected_components(G, directed=False)
    order_comp = np.argsort(labels, kind="stable")
    starts = np.searchsorted(labels[order_comp], np.arange(ncomp + 1))
    coords = landmark_coordinates(G, m, order_comp, starts, leaf)
    U = sp.triu(G, 1).tocoo()
    ei, ej = U.row.astype(np.int64), U.col.astype(np.int64)
    # An explicit stack instead of recursion, so that a part's edge lists are
    # released as soon as its halves have theirs. Popping A before B before
    # the separator keeps the post-order.
    stack: list[Part] = []
    for c in reversed(range(ncomp)):
        verts = order_comp[starts[c]:starts[c + 1]]
        inc = labels[ei] == c
        stack.append((np.sort(verts), ei[inc], ej[inc]))
    del ei, ej
    out: list[Array] = []
    side = np.zeros(n, np.int8)
    sep = np.zeros(n, bool)
    while stack:
        idx, pi, pj = stack.pop()
        if pi is None or pj is None:  # a separator, after both its halves
            out.append(idx)
            continue
        if idx.size <= leaf:
            if idx.size:
                out.append(idx)
            continue
        parts = bisect(idx, pi, pj, coords, side, sep)
        if parts is None:
            out.append(idx)
            continue
        del pi, pj
        stack.extend(parts)
        del parts
    perm = np.concatenate(out)
    bounds = np.cumsum([0] + [o.size for o in out])
    return perm, bounds


def landmark_coordinates(G: sp.csr_matrix, m: Array, order_comp: Array, starts: Array,
                         leaf: int) -> Array:
    """(n, 4) distances to four far-apart landmarks of each component larger
    than ``leaf`` (zeros elsewhere). ``order_comp`` lists the vertices by
    component, ``starts`` (ncomp + 1,) where each component begins in it."""
    n = G.shape[0]
    h = np.sqrt(m)
    Gc = G.tocoo()
    W = sp.csr_matrix((h[Gc.row] + h[Gc.col], (Gc.row, Gc.col)), shape=G.shape)
    coords = np.zeros((n, 4))
    for c in range(starts.size - 1):
        verts = order_comp[starts[c]:starts[c + 1]]
        if verts.size <= leaf:
            continue
        d = csgraph.dijkstra(W, indices=int(verts[0]))
        mind = np.full(n, np.inf)
        for j in range(4):
            cand = d[verts] if j == 0 else mind[verts]
            land = int(verts[np.argmax(cand)])
            dj = csgraph.dijkstra(W, indices=land)
            coords[verts, j] = dj[verts]
            mind[verts] = np.minimum(mind[verts], dj[verts])
    return coords


def bisect(idx: Array, pi: Array, pj: Array, coords: Array, side: Array,
           sep: Array) -> list[Part] | None:
    """Split the part ``idx`` (sorted vertices) with inner edges ``(pi, pj)``
    at the median of its most spread coordinate.

    Returns the parts to push, in stack order: the separator (if any), the
    second half, the first half; None when the coordinates do not spread.
    ``side`` (n,) int8 and ``sep`` (n,) bool are scratch arrays, left as
    ``sep`` was found.
    """
    X = coords[idx]
    spread = X.max(axis=0) - X.min(axis=0)
    ax = int(np.argmax(spread))
    if spread[ax] <= 0:
        return None
    half = idx.size // 2
    side[idx] = 2
    side[idx[np.argpartition(X[:, ax], half)[:half]]] = 1  # median split (introselect, deterministic)
    cut = side[pi] != side[pj]
    ci, cj = pi[cut], pj[cut]
    a = np.where(side[ci] == 1, ci, cj)
    sep[a] = True
    keep = ~(sep[pi] | sep[pj])
    e1, e2 = pi[keep], pj[keep]
    del cut, ci, cj, keep
    ma = side[e1] == 1
    sm, sd = sep[idx], side[idx]
    iA, iB, iS = idx[(sd == 1) & ~sm], idx[sd == 2], idx[sm]
    sep[a] = False
    parts: list[Part] = []
    if iS.size:
        parts.append((iS, None, None))
    parts.append((iB, e1[~ma], e2[~ma]))
    parts.append((iA, e1[ma], e2[ma]))
    return parts
