"""The embedding of orthogonalised eigenfunction products, seen from both sides of a map.

Target products ``Q_t = P_t R^-1`` come from the target's own first ``K``
eigenfunctions; on the source, those eigenfunctions are carried through the
current map (mass-weighted least squares in the source eigenbasis),
multiplied into the same kept monomials and orthogonalised with the same
``R``, so both embeddings are the same functions seen from the two sides (a
point map commutes with pointwise products). Columns are weighted by how well
each survives the transport.

:func:`refine_products` is the intrinsic mode's last step: each target vertex
takes its nearest source vertex in that embedding, augmented with the
position in the frame the map was found in, within
:data:`PRODUCT_WINDOW` mean edge lengths of its current match, then the best
point on that vertex's triangles (:func:`best_on_triangles`). The aligned
mode's check (:mod:`engine.matching.aligned`) uses the same pieces.
Measurements: docs/measurements.md, "Correspondence and transfer accuracy".
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray
from scipy.spatial import cKDTree

from ..spectra.products import raw_products
from ..spectra.shape import Shape
from .closest_point import barycentric_matrix, incident_triangles

__all__ = ["PRODUCT_K", "PRODUCT_SPATIAL", "PRODUCT_WINDOW", "ProductSettings", "ProductEmbedding",
           "product_embedding", "refine_products", "row_distances", "best_on_triangles", "triangle_grams",
           "simplex_qp"]

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.int64]

PRODUCT_K = 10
"""Eigenfunctions of the product embedding (order 3: 286 monomials)."""

PRODUCT_SPATIAL = 0.05
"""Spatial scale of the product refinement, in mean edge lengths ``h``: moving
a match by ``0.05 h`` from where the current map put it (in the frame the map
was found in) costs as much as the median embedding residual of the current map."""

PRODUCT_WINDOW = 3.0
"""Search radius of the product refinement around the current match, in mean edge lengths."""

PRODUCT_NEIGHBOURS = 32
"""Candidate source vertices per target vertex in the product refinement (then cut to the window)."""

BLOCK_VALUES = 1 << 16
"""Float64 values per gathered block of embedding rows (512 KB: it stays in cache)."""


@dataclass(frozen=True)
class ProductSettings:
    """Size of the product embedding.

    ``K`` eigenfunctions multiplied up to ``order``; ``tol`` is the products'
    dependency tolerance. It bounds the conditioning of ``R_kept`` (a kept
    product keeps at least ``tol`` of its norm, so ``R^-1`` amplifies the
    transport error by at most about ``1 / tol``). ``floor``: the residual
    scale is at least the embedding's change over ``floor`` mean edge lengths,
    so an exact map does not turn rounding into moves.
    """

    K: int = PRODUCT_K
    order: int = 3
    tol: float = 0.3
    floor: float = 0.01


@dataclass(frozen=True)
class ProductEmbedding:
    """Both sides of the product embedding through one map.

    Attributes
    ----------
    target : (n_t, r) target rows, column-weighted and divided by the residual scale ``s``
    source : (n_s, r) source rows, the same
    frame : (n_s, 3) the frame the map was found in (source vertices by default)
    here : (n_t, 3) the current points in that frame
    sizes : dict of sizes (JSON-able)
    """

    target: FloatArray
    source: FloatArray
    frame: FloatArray
    here: FloatArray
    sizes: dict[str, Any]


def product_embedding(source: Shape, target: Shape, tri: IntArray, bary: FloatArray, settings: ProductSettings,
                      h: float, frame: FloatArray | None = None) -> ProductEmbedding:
    """Both sides of the product embedding through the map ``(tri, bary)``.

    The source side is the target's first ``K`` eigenfunctions carried to the
    source (least squares in a source eigenbasis of ``2K + 10`` functions),
    multiplied into the target's kept monomials and orthogonalised with the
    target's ``R^-1``. Each column ``j`` is weighted by ``1 / e_j`` (scaled to
    unit root mean square), ``e_j`` its mass-weighted residual through the map;
    both sides are divided by ``s``, the root of the median weighted residual
    (at least the embedding's change over ``settings.floor * h``).
    """
    K = int(min(settings.K, source.n_vertices - 2, target.n_vertices - 2))
    pb = target.products(K, settings.order, tol=settings.tol)
    a_t = target.area
    Qt = pb.basis * np.sqrt(a_t)
    kept = np.asarray(pb.kept)
    Rinv = np.linalg.inv(np.asarray(pb.coefficients)[:, kept])
    ex = np.asarray(pb.exponents)[kept]
    kk = int(min(2 * K + 10, source.n_vertices - 2))
    ps = source.eigenbasis(kk).eigenvectors[:, :kk]
    pt = target.eigenbasis(K).eigenvectors[:, :K]
    sw = np.sqrt(target.mass)[:, None]
    F = source.vertices if frame is None else np.asarray(frame, dtype=np.float64)
    Pi = barycentric_matrix(source.faces, tri, bary, source.n_vertices)
    A = np.linalg.lstsq(sw * (Pi @ ps), sw * pt, rcond=None)[0]           # (kk, K)
    G = ps @ A                                                              # target eigenfunctions on the source
    Qs = raw_products(G, ex) @ Rinv * np.sqrt(a_t)
    res = Pi @ Qs - Qt
    m = target.mass / a_t
    col_res = np.sqrt(m @ (res * res))                                      # per column, columns of unit norm
    wc = 1.0 / np.maximum(col_res, 1e-3)
    wc /= np.sqrt(np.mean(wc * wc))
    Qt, Qs, res = Qt * wc, Qs * wc, res * wc
    s = _residual_scale(source.faces, Qs, F, res, settings.floor * h)
    here = np.einsum("ij,ijk->ik", bary, F[source.faces[tri]])
    sizes = {"product_K": K, "product_order": settings.order, "product_columns": int(len(pb.exponents)),
             "product_rank": int(len(kept))}
    return ProductEmbedding(Qt / s, Qs / s, F, here, sizes)


def _residual_scale(faces: IntArray, Qs: FloatArray, F: FloatArray, res: FloatArray, floor: float) -> float:
    """Root of the median squared residual, at least the embedding's change over ``floor``."""
    s2 = float(np.median(np.einsum("ij,ij->i", res, res)))
    e = np.vstack([faces[:, [0, 1]], faces[:, [1, 2]], faces[:, [2, 0]]])    # every edge, interior ones twice
    # each edge's change computed once (both directions give the same bits), in blocks that stay in cache
    n = np.int64(len(Qs))
    keys, each = np.unique(np.minimum(e[:, 0], e[:, 1]) * n + np.maximum(e[:, 0], e[:, 1]), return_inverse=True)
    pairs = np.column_stack([keys // n, keys % n])
    dq_once = np.empty(len(pairs))
    step = max(1, BLOCK_VALUES // max(1, Qs.shape[1]))
    for a in range(0, len(pairs), step):
        d = Qs[pairs[a:a + step, 0]] - Qs[pairs[a:a + step, 1]]
        dq_once[a:a + step] = np.einsum("ij,ij->i", d, d)
    dq = dq_once[each.ravel()]
    dx = np.einsum("ij,ij->i", F[e[:, 0]] - F[e[:, 1]], F[e[:, 0]] - F[e[:, 1]])
    ok = dx > 0
    g2 = float(np.median(dq[ok] / dx[ok])) if ok.any() else 0.0
    return float(np.sqrt(max(s2, g2 * floor ** 2, 1e-300)))


def refine_products(source: Shape, target: Shape, tri: IntArray, bary: FloatArray, settings: ProductSettings,
                    h: float, frame: FloatArray | None = None
                    ) -> tuple[IntArray, FloatArray, IntArray, dict[str, Any]]:
    """Point map in the product embedding, searched near the current match.

    Each target vertex ``i`` takes the source point ``x`` minimising

        ``|Q_t(i) - Q_s(x)|_w^2 / s^2 + |F(x) - F(x_i)|^2 / (PRODUCT_SPATIAL h)^2``

    with ``x_i`` its current match and ``F`` the frame the map was found in
    (``frame``: the deformed source of the alignment step; the source's own
    vertices by default). The augmented embedding ``[Q w / s, F / (spatial h)]``
    makes that a nearest-neighbour search among the source vertices within
    :data:`PRODUCT_WINDOW` ``h`` of the current point, then the best point on
    that vertex's triangles by least squares on the simplex (exact for this
    cost, which is quadratic in the barycentric weights).

    Returns
    -------
    triangle (n_t,), barycentric (n_t, 3), nearest source vertex (n_t,), sizes (dict)
    """
    emb = product_embedding(source, target, tri, bary, settings, h, frame)
    spatial = PRODUCT_SPATIAL
    window = PRODUCT_WINDOW * h
    Qt_a = np.hstack([emb.target, emb.here / (spatial * h)])
    Qs_a = np.hstack([emb.source, emb.frame / (spatial * h)])
    tree = cKDTree(emb.frame)
    inc = incident_triangles(source.faces, source.n_vertices)
    dist, cand = tree.query(emb.here, k=min(PRODUCT_NEIGHBOURS, source.n_vertices))
    cost = np.where(dist <= window, row_distances(Qt_a, Qs_a, cand), np.inf)
    cost[:, 0] = np.minimum(cost[:, 0], row_distances(Qt_a, Qs_a, cand[:, :1])[:, 0])
    best = cand[np.arange(len(cand)), np.argmin(cost, axis=1)]
    tri2, bary2 = best_on_triangles(Qt_a, Qs_a, source.faces, inc, best)
    moved = np.linalg.norm(np.einsum("ij,ijk->ik", bary2, emb.frame[source.faces[tri2]]) - emb.here, axis=1)
    return tri2, bary2, best, {**emb.sizes, "product_spatial": float(spatial),
                               "product_median_move_over_h": float(np.median(moved) / h)}


def row_distances(Qt: FloatArray, Qs: FloatArray, cand: IntArray, chunk: int | None = None,
                  row_scale: FloatArray | None = None) -> FloatArray:
    """Squared distances from each row of ``Qt`` to its candidate rows of ``Qs``;
    with ``row_scale`` the differences in the last three columns of row ``i``
    are multiplied by ``row_scale[i]`` first. ``chunk`` rows at a time (default:
    :data:`BLOCK_VALUES` differences, so the gathered block stays in cache)."""
    if chunk is None:
        chunk = max(8, BLOCK_VALUES // max(1, cand.shape[1] * Qt.shape[1]))    # a few rows at least
    out = np.empty(cand.shape)
    for s in range(0, len(cand), chunk):
        c = cand[s:s + chunk]
        diff = Qs[c] - Qt[s:s + chunk, None, :]
        if row_scale is not None:
            diff[..., -3:] *= row_scale[s:s + chunk, None, None]
        out[s:s + chunk] = np.einsum("ijk,ijk->ij", diff, diff)
    return out


def best_on_triangles(Qt: FloatArray, Qs: FloatArray, faces: IntArray, inc: IntArray, best: IntArray,
                      chunk: int = 4000, row_scale: FloatArray | None = None) -> tuple[IntArray, FloatArray]:
    """Best point on the triangles around ``best`` for each target row, by least squares on the simplex
    (``row_scale`` as in :func:`row_distances`)."""
    n = len(best)
    tri_out = np.empty(n, np.int64)
    w_out = np.empty((n, 3))
    # without row scales a triangle's corner Gram is the same for every row: once per triangle
    grams = triangle_grams(Qs, faces, np.unique(inc[best]), chunk) if row_scale is None else np.zeros((0, 3, 3))
    for s in range(0, n, chunk):
        T = inc[best[s:s + chunk]]                   # (c, d) triangles, -1 padded
        r_i, c_i = np.nonzero(T >= 0)                # only the real ones are solved, one per row of (u, 1)
        q = Qt[s:s + chunk][r_i]
        F = faces[T[r_i, c_i]][:, None, :]           # (u, 1, 3)
        if row_scale is None:
            Gm = grams[T[r_i, c_i]][:, None]
            sv = np.stack([np.einsum("cdr,cr->cd", Qs[F[..., i]], q) for i in range(3)], axis=-1)
        else:
            P = Qs[F]                                # (u, 1, 3, r)
            scale = row_scale[s:s + chunk][r_i]
            q[:, -3:] *= scale[:, None]
            P[..., -3:] *= scale[:, None, None, None]
            Gm = np.einsum("cdir,cdjr->cdij", P, P)  # corner Gram
            sv = np.einsum("cdir,cr->cdi", P, q)
        w, v = simplex_qp(Gm, sv)
        val = np.full(T.shape, np.inf)
        val[r_i, c_i] = v[:, 0]
        at = np.zeros(T.shape, np.int64)
        at[r_i, c_i] = np.arange(len(r_i))
        pick = at[np.arange(len(T)), np.argmin(val, axis=1)]
        tri_out[s:s + chunk] = T[r_i[pick], c_i[pick]]
        w_out[s:s + chunk] = w[pick, 0]
    return tri_out, w_out


def triangle_grams(Qs: FloatArray, faces: IntArray, triangles: IntArray, chunk: int = 4000) -> FloatArray:
    """(m, 3, 3) Gram matrices of the rows of ``Qs`` at each triangle's corners, filled for
    ``triangles`` (negative ids skipped), zero elsewhere."""
    out = np.zeros((len(faces), 3, 3))
    triangles = triangles[triangles >= 0]
    for s in range(0, len(triangles), chunk):
        t = triangles[s:s + chunk]
        corners = [Qs[faces[t, i]] for i in range(3)]
        for i in range(3):
            for j in range(i, 3):
                out[t, i, j] = out[t, j, i] = np.einsum("ur,ur->u", corners[i], corners[j])
    return out


def simplex_qp(G: FloatArray, s: FloatArray) -> tuple[FloatArray, FloatArray]:
    """Minimise ``w^T G w - 2 w^T s`` over the probability simplex in 3 variables.

    ``G`` (..., 3, 3), ``s`` (..., 3); returns the weights (..., 3) and the values (...).
    """
    shape = s.shape[:-1]
    best_w = np.zeros(shape + (3,))
    best_v = np.full(shape, np.inf)
    # interior with sum-to-one (KKT)
    A = np.zeros(shape + (4, 4))
    A[..., :3, :3] = 2 * G
    A[..., :3, 3] = 1
    A[..., 3, :3] = 1
    rhs = np.concatenate([2 * s, np.ones(shape + (1,))], axis=-1)
    reg = 1e-12 * (np.abs(G).max(axis=(-1, -2)) + 1e-300)
    A[..., :3, :3] += 2 * reg[..., None, None] * np.eye(3)
    try:
        sol = np.linalg.solve(A, rhs[..., None])[..., 0][..., :3]
    except np.linalg.LinAlgError:
        sol = np.full(shape + (3,), -1.0)
    ok = np.isfinite(sol).all(axis=-1) & (sol >= 0).all(axis=-1)
    v = np.einsum("...i,...ij,...j->...", sol, G, sol) - 2 * np.einsum("...i,...i->...", sol, s)
    take = ok & (v < best_v)
    best_w[take], best_v[take] = sol[take], v[take]
    for p, q in ((0, 1), (1, 2), (2, 0)):
        a, b, c = G[..., p, p], G[..., p, q], G[..., q, q]
        den = a - 2 * b + c
        t = np.clip(np.where(den > 0, (a - b - s[..., p] + s[..., q]) / np.where(den > 0, den, 1), 0.0), 0, 1)
        v = (1 - t) ** 2 * a + 2 * t * (1 - t) * b + t * t * c - 2 * (1 - t) * s[..., p] - 2 * t * s[..., q]
        take = v < best_v
        w = np.zeros(shape + (3,))
        w[..., p], w[..., q] = 1 - t, t
        best_w[take], best_v[take] = w[take], v[take]
    return best_w, best_v
