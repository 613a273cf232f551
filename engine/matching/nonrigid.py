"""Deforming the source onto the target: a non-rigid ICP with an as-similar-as-possible regulariser.

Each solve of :func:`deform_onto` is

``min_X  sum_j m_j |Pi_j X - y_j|^2  +  sum_i m'_i |X_i - q_i|^2  +  W sum_l |X_a(l) - y_b(l)|^2
+ r^2 A_t sum_i sum_(j~i) w_ij |(X_i - X_j) - s_i R_i (S_i - S_j)|^2``

over the deformed source vertices ``X``, with

- forward pairs: target vertex ``y_j`` and its point ``Pi_j X`` on the
  deformed source (weight its mass ``m_j``);
- backward pairs: source vertex ``X_i`` and its foot ``q_i`` on the tangent
  plane of its nearest target vertex (weight its mass ``m'_i`` in target
  units), so that parts of the source no target vertex picks are still pulled
  onto the target;
- the landmarks, together as heavy as the whole surface
  (``W = landmark_weight * A_t / n_landmarks`` each);
- the regulariser, with the source's cotangent weights ``w_ij`` and rest
  positions ``S`` and per vertex a rotation ``R_i`` and scale ``s_i`` fitted
  to the current ``X`` (:class:`SimilarityFit`). ``r`` is the smoothing
  length as a fraction of ``sqrt(A_t)``.

Pairs of either direction whose normals disagree (cosine below
``normal_min``) are dropped; the landmarks and the spectral map's pairs are
always kept. Measurements of every variant: docs/measurements.md,
"Correspondence and transfer accuracy".

:func:`deform_through` runs the same on simplified copies of large shapes
(their regulariser without negative edge weights, :func:`nonnegative_stiffness`)
and carries the deformation to the full source (:func:`carry_deformation`).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import scipy.sparse as sp
from numpy.typing import NDArray
from scipy.spatial import cKDTree

from ..carrying.detail import vertex_normals_unchecked
from ..spectra.discretization import mesh_operators
from ..spectra.shape import Shape
from .closest_point import SurfaceLocator, barycentric_matrix, closest_points_on_triangles, incident_triangles

__all__ = ["IcpOptions", "SpectralPairs", "Surface", "deform_onto", "deform_through", "carry_deformation",
           "nonnegative_stiffness", "near_closest", "spd_factor", "SimilarityFit"]

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.int64]
Landmarks = tuple[IntArray, IntArray]


@dataclass(frozen=True)
class IcpOptions:
    """Tuning of :func:`deform_onto`.

    Attributes
    ----------
    steps : smoothing lengths, fractions of sqrt(target area), largest first
    iterations : solves per smoothing length
    normal_min : pairs whose normals' cosine is below this are dropped
    backward : use the backward pairs
    similar : fit a scale with each rotation (as similar as possible; else as rigid)
    landmark_weight : all landmarks together weigh this times the surface
    map_solves : solves fitting the spectral map's pairs at the first length
    """

    steps: tuple[float, ...] = (0.1, 0.05, 0.02, 0.01, 0.005)
    iterations: int = 3
    normal_min: float = 0.5
    backward: bool = True
    similar: bool = True
    landmark_weight: float = 1.0
    map_solves: int = 2


@dataclass(frozen=True)
class SpectralPairs:
    """The spectral map's pairs: target points ``y`` (p, 3) with weights ``w`` (p,)
    and the matrix ``Pi`` (p, n_s) giving their partners on the source."""

    y: FloatArray
    w: FloatArray
    Pi: Any

    @classmethod
    def of(cls, source: Shape, target: Shape, tri: IntArray, bary: FloatArray,
           rows: IntArray | None) -> SpectralPairs:
        """Pairs of the map ``(tri, bary)`` of target vertices ``rows`` (None: all),
        weights the target masses (scaled up for a sample)."""
        Y, m_t = target.vertices, target.mass
        y = Y if rows is None else Y[rows]
        w = m_t if rows is None else m_t[rows] * (target.n_vertices / len(rows))
        return cls(y, w, barycentric_matrix(source.faces, tri, bary, source.n_vertices))


@dataclass(frozen=True)
class Surface:
    """What the alignment reads of a mesh: vertices (n, 3), faces (m, 3), lumped masses (n,),
    area and the regulariser's stiffness (n, n)."""

    vertices: FloatArray
    faces: IntArray
    mass: FloatArray
    area: float
    stiffness: Any

    @property
    def n_vertices(self) -> int:
        return len(self.vertices)

    @classmethod
    def of(cls, shape: Shape) -> Surface:
        """The shape's own operators."""
        return cls(shape.vertices, shape.faces, shape.mass, shape.area, shape.stiffness)

    @classmethod
    def coarse(cls, shape: Shape) -> Surface:
        """A simplified copy's plain cotangent operators, negative edge weights dropped
        (:func:`nonnegative_stiffness`)."""
        ops = mesh_operators(shape.vertices, shape.faces, robust=False)
        mass = np.asarray(ops.mass, dtype=np.float64)
        return cls(shape.vertices, shape.faces, mass, float(mass.sum()), nonnegative_stiffness(ops.stiffness))


@dataclass(frozen=True)
class _Fixed:
    """What stays the same over every solve."""

    source: Surface
    target: Surface
    L: Any                    # source stiffness, csr
    fit: SimilarityFit
    m_s: FloatArray           # source masses in target units
    tree_t: cKDTree
    inc_s: IntArray
    normals_t: FloatArray
    lm_w: FloatArray          # landmark weight per source vertex
    lm_y: FloatArray          # landmark weight times target position per source vertex


def deform_onto(source: Shape, target: Shape, pairs: SpectralPairs, landmarks: Landmarks | None,
                options: IcpOptions) -> tuple[IntArray, FloatArray, FloatArray]:
    """Deform the source onto the target, starting from the spectral map, then closest points.

    The source starts from a thin-plate-spline warp through the landmarks
    (four or more) and an affine fit of the spectral map; ``map_solves`` solves
    at the first smoothing length fit the spectral map's ``pairs`` (one
    factorisation, the rotations refitted between solves), then
    ``iterations`` solves per smoothing length, each with the pairs of the
    last deformed source (found by :func:`near_closest`; the final map uses
    the exact search).

    Returns
    -------
    triangle (n_t,), barycentric (n_t, 3) for every target vertex; the deformed source (n_s, 3).
    """
    X = _deform(Surface.of(source), Surface.of(target), pairs, landmarks, options)
    cp = SurfaceLocator(X, source.faces).closest(target.vertices)
    return cp.triangle, cp.barycentric, X


def deform_through(source: Shape, target: Shape, coarse: tuple[Shape, Shape], pairs: SpectralPairs,
                   landmarks: Landmarks | None, options: IcpOptions) -> tuple[IntArray, FloatArray, FloatArray]:
    """:func:`deform_onto` run on simplified copies of the shapes (``pairs`` and ``landmarks`` theirs),
    the deformation carried to the full source (:func:`carry_deformation`) and every full target
    vertex's point on it found by the cheap search (:func:`near_closest`).

    Returns
    -------
    triangle (n_t,), barycentric (n_t, 3) for every full target vertex; the deformed full source (n_s, 3).
    """
    cs, ct = Surface.coarse(coarse[0]), Surface.coarse(coarse[1])
    Xc = _deform(cs, ct, pairs, landmarks, options)
    X = carry_deformation(cs, Xc, SimilarityFit(cs.stiffness, cs.vertices, scale=options.similar), source.vertices)
    tri, bary, _ = near_closest(X, source.faces, incident_triangles(source.faces, source.n_vertices),
                                target.vertices)
    return tri, bary, X


def _deform(source: Surface, target: Surface, pairs: SpectralPairs, landmarks: Landmarks | None,
            options: IcpOptions) -> FloatArray:
    """The deformed source: warp and affine fit, the map's solves, then the ICP solves."""
    X = _affine_fit(_landmark_warp(source, target, landmarks), pairs)
    fixed = _fixed_terms(source, target, landmarks, options)
    X = _fit_to_map(fixed, pairs, X, options)
    A_t = target.area
    for r in options.steps:
        lam = r * r * A_t
        for _ in range(options.iterations):
            X = _icp_solve(fixed, X, lam, options)
    return X


def nonnegative_stiffness(L: Any) -> Any:
    """``L`` with its negative edge weights (positive off-diagonal entries) dropped, rows summing to zero:
    a simplified mesh's long thin triangles give such weights, which make the regulariser indefinite."""
    C = sp.coo_matrix(L)
    keep = (C.row != C.col) & (C.data < 0)
    off = sp.csr_matrix((C.data[keep], (C.row[keep], C.col[keep])), shape=C.shape)
    return (off - sp.diags(np.asarray(off.sum(axis=1)).ravel())).tocsr()


def carry_deformation(coarse: Surface, X_coarse: FloatArray, fit: SimilarityFit, points: FloatArray) -> FloatArray:
    """``points`` near the rest surface of ``coarse`` carried by its deformation ``X_coarse``: each
    takes its closest point on the coarse surface, deformed barycentrically, plus its offset from
    there through the corners' fitted rotations and scales (blended barycentrically)."""
    tri, bary, foot = near_closest(coarse.vertices, coarse.faces,
                                   incident_triangles(coarse.faces, coarse.n_vertices), points)
    corners = coarse.faces[tri]
    T = np.einsum("ij,ijab->iab", bary, fit.transforms(X_coarse)[corners])
    out: FloatArray = np.einsum("ij,ijk->ik", bary, X_coarse[corners]) + np.einsum("iab,ib->ia", T, points - foot)
    return out


def _landmark_warp(source: Surface, target: Surface, landmarks: Landmarks | None) -> FloatArray:
    """Source vertices through a thin-plate spline taking the landmarks onto the target's (identity below four)."""
    X: FloatArray = source.vertices.copy()
    if landmarks is not None and len(landmarks[0]) >= 4:
        from scipy.interpolate import RBFInterpolator   # imported when needed: slow to import
        try:
            X = RBFInterpolator(X[landmarks[0]], target.vertices[landmarks[1]], kernel="thin_plate_spline",
                                degree=1)(X)
        except (np.linalg.LinAlgError, ValueError):   # degenerate landmark layout: keep the identity
            X = source.vertices.copy()
    return X


def _affine_fit(X: FloatArray, pairs: SpectralPairs) -> FloatArray:
    """``X`` through the affine map that best carries the spectral map's partners onto their targets."""
    ph = np.hstack([pairs.Pi @ X, np.ones((len(pairs.y), 1))])
    sw = np.sqrt(pairs.w)[:, None]
    A = np.linalg.lstsq(sw * ph, sw * pairs.y, rcond=None)[0]
    out: FloatArray = np.hstack([X, np.ones((len(X), 1))]) @ A
    return out


def _fixed_terms(source: Surface, target: Surface, landmarks: Landmarks | None, options: IcpOptions) -> _Fixed:
    n_s = source.n_vertices
    Y, A_t = target.vertices, target.area
    L = source.stiffness.tocsr()
    lm_w = np.zeros(n_s)
    lm_y = np.zeros((n_s, 3))
    if landmarks is not None:
        W = options.landmark_weight * A_t / len(landmarks[0])
        np.add.at(lm_w, landmarks[0], W)
        np.add.at(lm_y, landmarks[0], W * Y[landmarks[1]])
    return _Fixed(source, target, L, SimilarityFit(L, source.vertices, scale=options.similar),
                  source.mass * (A_t / source.area), cKDTree(Y), incident_triangles(source.faces, n_s),
                  vertex_normals_unchecked(Y, target.faces), lm_w, lm_y)


def _fit_to_map(fixed: _Fixed, pairs: SpectralPairs, X: FloatArray, options: IcpOptions) -> FloatArray:
    """Solves fitting the spectral map's pairs: they stay fixed, so one factorisation serves every solve."""
    n_s = fixed.source.n_vertices
    lam = options.steps[0] * options.steps[0] * fixed.target.area
    PtW = pairs.Pi.T.multiply(pairs.w[None, :]).tocsr()
    H = (PtW @ pairs.Pi + lam * fixed.L + sp.diags(fixed.lm_w)).tocsc()
    eps = 1e-9 * H.diagonal().mean()      # a tiny pull toward the current X keeps H definite, unbiased
    solve = spd_factor(H + sp.diags(np.full(n_s, eps))).solve
    b = PtW @ pairs.y + fixed.lm_y
    for _ in range(options.map_solves):
        X = solve(np.asarray(b + lam * fixed.fit.rhs(X) + eps * X))
    return X


def _icp_solve(fixed: _Fixed, X: FloatArray, lam: float, options: IcpOptions) -> FloatArray:
    """One solve with the pairs of the current deformed source ``X``."""
    source, Y, m_t = fixed.source, fixed.target.vertices, fixed.target.mass
    n_s = source.n_vertices
    # forward pairs: every target vertex onto the deformed source
    f_tri, f_bary, _ = near_closest(X, source.faces, fixed.inc_s, Y)
    n_x = vertex_normals_unchecked(X, source.faces)
    ns = np.einsum("ij,ijk->ik", f_bary, n_x[source.faces[f_tri]])
    w = m_t * (np.einsum("ij,ij->i", ns, fixed.normals_t) >= options.normal_min * np.linalg.norm(ns, axis=1))
    Pi = barycentric_matrix(source.faces, f_tri, f_bary, n_s)
    if options.backward:
        # backward pairs: each source vertex onto the tangent plane of its nearest target vertex
        _, j = fixed.tree_t.query(X, workers=-1)
        nq = fixed.normals_t[j]
        back_q = X - np.einsum("ij,ij->i", X - Y[j], nq)[:, None] * nq
        back_w = fixed.m_s * (np.einsum("ij,ij->i", n_x, nq) >= options.normal_min)
    else:
        back_w, back_q = np.zeros(n_s), np.zeros((n_s, 3))
    PtW = Pi.T.multiply(w[None, :]).tocsr()
    H = (PtW @ Pi + lam * fixed.L + sp.diags(back_w + fixed.lm_w)).tocsc()
    eps = 1e-9 * H.diagonal().mean()
    rhs = PtW @ Y + back_w[:, None] * back_q + fixed.lm_y + lam * fixed.fit.rhs(X) + eps * X
    out: FloatArray = spd_factor(H + sp.diags(np.full(n_s, eps))).solve(np.asarray(rhs))
    return out


def near_closest(vertices: FloatArray, faces: IntArray, incident: IntArray, query: FloatArray,
                 centroids: int = 2) -> tuple[IntArray, FloatArray, FloatArray]:
    """Closest points among the triangles around each query's nearest vertex and
    its ``centroids`` nearest triangle centroids (no padded candidates): the
    cheap, not always exact search used between solves of :func:`deform_onto`.

    Returns
    -------
    triangle (q,), barycentric (q, 3), points (q, 3)
    """
    _, vi = cKDTree(vertices).query(query, workers=-1)
    _, ti = cKDTree(vertices[faces].mean(axis=1)).query(query, k=centroids, workers=-1)
    fan, ti = incident[vi], ti.reshape(len(query), -1)
    cand = np.concatenate([fan, ti], axis=1)
    # a centroid's triangle already in the vertex's fan is not tried twice (its first place counts)
    again = np.concatenate([np.zeros(fan.shape, dtype=bool), (ti[:, :, None] == fan[:, None, :]).any(axis=2)], axis=1)
    qi, ci = np.nonzero((cand >= 0) & ~again)
    t = cand[qi, ci]
    f = faces[t]
    w, pts = closest_points_on_triangles(query[qi], vertices[f[:, 0]], vertices[f[:, 1]], vertices[f[:, 2]])
    d = np.einsum("ij,ij->i", pts - query[qi], pts - query[qi])
    # the best candidate of each query, the first of its candidates on ties
    # (a padded table and argmin, much faster than a lexsort)
    D = np.full(cand.shape, np.inf)
    D[qi, ci] = d
    at = np.full(cand.shape, -1)
    at[qi, ci] = np.arange(len(qi))
    first = at[np.arange(len(query)), np.argmin(D, axis=1)]
    return t[first], w[first], pts[first]


def spd_factor(H: Any) -> Any:
    """Sparse LU of a symmetric positive definite matrix: minimum-degree ordering
    of ``H + H^T`` and diagonal pivots (several times faster than SuperLU's
    default threshold pivoting on these systems, docs/measurements.md)."""
    import scipy.sparse.linalg as spla   # imported when needed, as elsewhere in the engine
    return spla.splu(H.tocsc(), permc_spec="MMD_AT_PLUS_A", diag_pivot_thresh=0.0, options={"SymmetricMode": True})


class SimilarityFit:
    """Local step of an as-similar-as-possible energy on the edges of ``L``.

    For the current positions ``X`` each vertex ``i`` gets the rotation
    ``R_i`` and scale ``s_i`` that best carry its rest edges ``S_i - S_j`` onto
    ``X_i - X_j`` (weights ``w_ij = -L_ij``; the rotation from the SVD of the
    weighted edge covariance, reflections excluded). :meth:`rhs` returns
    ``b_i = sum_j w_ij (s_i R_i + s_j R_j) (S_i - S_j) / 2``, so that the global
    step ``L X = b`` minimises the energy for fixed rotations and scales.
    """

    def __init__(self, L: Any, rest: FloatArray, *, scale: bool = True) -> None:
        self.scale = scale
        C = L.tocoo()
        off = C.row != C.col
        self.i, self.j, self.w = C.row[off], C.col[off], -C.data[off]
        self.e0 = rest[self.i] - rest[self.j]
        self.n = len(rest)
        self.norm = np.bincount(self.i, weights=self.w * np.einsum("ij,ij->i", self.e0, self.e0), minlength=self.n)

    def transforms(self, X: FloatArray) -> FloatArray:
        """(n, 3, 3) per vertex its rotation times its scale, fitted to ``X`` (n, 3)."""
        i, j, w, e0, n = self.i, self.j, self.w, self.e0, self.n
        e = X[i] - X[j]
        cov = np.empty((n, 3, 3))
        for a in range(3):
            for b in range(3):
                cov[:, a, b] = np.bincount(i, weights=w * e[:, a] * e0[:, b], minlength=n)
        U, sig, Vt = np.linalg.svd(cov)
        d = np.sign(np.linalg.det(U @ Vt))
        d[d == 0] = 1.0
        U[:, :, 2] *= d[:, None]
        sig[:, 2] *= d
        scale = np.where(self.norm > 0, sig.sum(axis=1) / np.where(self.norm > 0, self.norm, 1.0), 1.0)
        if not self.scale:
            scale = np.ones(n)
        out: FloatArray = (U @ Vt) * scale[:, None, None]
        return out

    def rhs(self, X: FloatArray) -> FloatArray:
        """``b`` of the global step for the rotations and scales fitted to ``X`` (n, 3)."""
        i, j, w, e0, n = self.i, self.j, self.w, self.e0, self.n
        T = self.transforms(X)
        Te = np.einsum("kab,kb->ka", T[i] + T[j], e0) * (0.5 * w)[:, None]
        return np.column_stack([np.bincount(i, weights=Te[:, a], minlength=n) for a in range(3)])
