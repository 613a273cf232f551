"""Intrinsic matching: pose, placement and scale differ.

Area-normalised eigenbases, heat and wave kernel signatures plus each
landmark's heat-kernel rows give a functional map by least squares with
Laplacian commutativity and an orientation-preserving term (so a
mirror-symmetric character is not mirrored); ZoomOut grows it to a larger
basis, with the landmark rows kept in the nearest-neighbour search. Then the
source is deformed onto the target (:func:`engine.matching.nonrigid.deform_onto`)
and every target vertex takes its closest point on the deformed source: this
is what carries variants with other proportions, which no isometry prior
serves. Last, the point map is searched again in the product embedding
(:func:`engine.matching.embedding.refine_products`), unless ``refine=False``.

Above ``MatchOptions.coarse_above`` vertices the spectral map and the
alignment run on simplified copies of a fixed size and the deformation is
carried to the full source; only the product-embedding search runs at full
resolution (measurements: docs/measurements.md, "Transfer speed").
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray
from scipy.spatial import cKDTree

from ..spectra.shape import Shape
from .closest_point import incident_triangles
from .embedding import ProductSettings, refine_products
from .functional_map import MapWeights, fmap_from_descriptors, nearest_rows, orientation_operators, zoomout
from .modes import MatchOptions, ModeResult
from .nonrigid import IcpOptions, SpectralPairs, deform_onto, deform_through, near_closest
from .standin import SimplifierMissing, simplified_shape

__all__ = ["LANDMARK_TIMES", "match_intrinsic", "coarse_shapes", "coarse_landmarks", "through_coarse_basis"]

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.int64]
Landmarks = tuple[IntArray, IntArray]

LANDMARK_TIMES = (0.003, 0.01, 0.03)
"""Heat-kernel times of the landmark columns (unit-area shapes: kernel radius ~ sqrt(4t) ~ 0.1-0.35)."""


@dataclass(frozen=True)
class _SpectralMap:
    """The functional map's outcome: a source vertex per target vertex (of ``rows``; None: all),
    and the embeddings whose nearest rows give the reverse map."""

    vertex: IntArray
    rows: IntArray | None
    embedding_s: FloatArray
    embedding_t: FloatArray


def match_intrinsic(source: Shape, target: Shape, landmarks: Landmarks | None, options: MatchOptions,
                    refine: bool | None, h: float) -> ModeResult:
    """Spectral map, then the source deformed onto the target, then the product-embedding search.

    With the alignment on and either shape over ``options.coarse_above``
    vertices, the spectral map and the alignment run on simplified copies
    (:func:`coarse_shapes`) and only the product-embedding search at full
    resolution (:func:`_match_through`).

    Parameters
    ----------
    landmarks : (source vertices, target vertices) of the cleaned meshes, or None
    refine : the product-embedding search runs unless False
    h : the coarser mesh's mean edge length
    """
    coarse = coarse_shapes(source, target, options) if options.align_steps else None
    if coarse is not None:
        return _match_through(source, target, coarse, landmarks, options, refine, h)
    timings: dict[str, float] = {}
    t0 = time.perf_counter()
    kk = int(min(options.k, source.n_vertices - 1, target.n_vertices - 1))
    spectral = _spectral_map(source, target, landmarks, options, kk, timings)
    tri, bary = _vertex_as_point(source, spectral.vertex)
    vertex = spectral.vertex
    timings["initial_map"] = time.perf_counter() - t0
    frame = None
    if not options.align_steps:
        back = nearest_rows(spectral.embedding_t, spectral.embedding_s)
    else:
        t0 = time.perf_counter()
        tri, bary, frame = deform_onto(source, target, SpectralPairs.of(source, target, tri, bary, spectral.rows),
                                       landmarks, _icp_options(options))
        vertex, back = _round_trip(source, target, tri, bary, frame)
        timings["align_refine"] = time.perf_counter() - t0
    sizes: dict[str, Any] = {}
    if refine is None or refine:
        t0 = time.perf_counter()
        settings = ProductSettings(options.product_K, options.product_order)
        tri, bary, vertex, sizes = refine_products(source, target, tri, bary, settings, h, frame)
        timings["product_refine"] = time.perf_counter() - t0
    return ModeResult(tri, bary, vertex, back, kk, timings, sizes)


def coarse_shapes(source: Shape, target: Shape, options: MatchOptions) -> tuple[Shape, Shape] | None:
    """Copies of both shapes simplified to ``options.coarse_vertices`` (a shape not larger kept as it
    is) when either has more than ``options.coarse_above`` vertices; else, or without the simplifier,
    None. The copies' size is fixed, so refining the input does not change what is matched on them."""
    if not _coarsened(source, target, options):
        return None
    try:
        cs, ct = (simplified_shape(sh, options.coarse_vertices) if sh.n_vertices > options.coarse_vertices
                  else sh for sh in (source, target))
    except SimplifierMissing:
        return None
    return cs, ct


def _coarsened(source: Shape, target: Shape, options: MatchOptions) -> bool:
    """Whether :func:`coarse_shapes` simplifies this pair (given the simplifier)."""
    return options.coarse_vertices > 0 and max(source.n_vertices, target.n_vertices) > options.coarse_above


def through_coarse_basis(source: Shape, target: Shape, options: MatchOptions) -> int:
    """Size of the target eigenbasis the intrinsic match solves when it runs through coarse copies
    (:func:`_match_through`: the product embedding's ``2 product_K + 10``); 0 when it would not
    (it then solves its own, larger basis on the target)."""
    if not (options.align_steps and _coarsened(source, target, options)):
        return 0
    return int(min(2 * options.product_K + 10, source.n_vertices - 2, target.n_vertices - 2))


def _match_through(source: Shape, target: Shape, coarse: tuple[Shape, Shape], landmarks: Landmarks | None,
                   options: MatchOptions, refine: bool | None, h: float) -> ModeResult:
    """:func:`match_intrinsic` with the spectral map and the alignment on the ``coarse`` copies
    (:func:`engine.matching.nonrigid.deform_through` carries the deformation to the full source).
    The final functional map is reported in a basis of ``2 product_K + 10`` functions, the size the
    product embedding computes on the source anyway."""
    timings: dict[str, float] = {}
    t0 = time.perf_counter()
    cs, ct = coarse
    lm = coarse_landmarks(landmarks, (source, target), coarse)
    kk = int(min(options.k, cs.n_vertices - 1, ct.n_vertices - 1))
    spectral = _spectral_map(cs, ct, lm, options, kk, timings)
    tri, bary = _vertex_as_point(cs, spectral.vertex)
    timings["initial_map"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    tri, bary, frame = deform_through(source, target, coarse, SpectralPairs.of(cs, ct, tri, bary, spectral.rows),
                                      lm, _icp_options(options))
    vertex, back = _round_trip(source, target, tri, bary, frame)
    timings["align_refine"] = time.perf_counter() - t0
    sizes: dict[str, Any] = {"coarse_source_vertices": cs.n_vertices, "coarse_target_vertices": ct.n_vertices}
    basis = through_coarse_basis(source, target, options)
    target.eigenbasis(basis)         # one solve for the product embedding's few and the final map's
    if refine is None or refine:
        t0 = time.perf_counter()
        settings = ProductSettings(options.product_K, options.product_order)
        tri, bary, vertex, more = refine_products(source, target, tri, bary, settings, h, frame)
        sizes.update(more)
        timings["product_refine"] = time.perf_counter() - t0
    return ModeResult(tri, bary, vertex, back, basis, timings, sizes)


def coarse_landmarks(landmarks: Landmarks | None, full: tuple[Shape, Shape],
                     coarse: tuple[Shape, Shape]) -> Landmarks | None:
    """Landmarks (vertices of the full shapes) as the nearest vertices of the coarse copies."""
    if landmarks is None:
        return None
    ends = [np.asarray(cKDTree(c.vertices).query(f.vertices[idx])[1], dtype=np.int64)
            for f, c, idx in zip(full, coarse, landmarks)]
    return ends[0], ends[1]


def _icp_options(options: MatchOptions) -> IcpOptions:
    return IcpOptions(steps=tuple(options.align_steps), iterations=options.align_iterations)


def _round_trip(source: Shape, target: Shape, tri: IntArray, bary: FloatArray,
                frame: FloatArray) -> tuple[IntArray, IntArray]:
    """The map's source vertex per target vertex, and the reverse map: per source vertex the
    target vertex at its deformed position (``frame``), found by the cheap search, which
    serves the round trip's confidence."""
    vertex = source.faces[tri, np.argmax(bary, axis=1)]
    b_tri, b_bary, _ = near_closest(target.vertices, target.faces,
                                    incident_triangles(target.faces, target.n_vertices), frame)
    return vertex, target.faces[b_tri, np.argmax(b_bary, axis=1)]


def _spectral_map(source: Shape, target: Shape, landmarks: Landmarks | None, options: MatchOptions, kk: int,
                  timings: dict[str, float]) -> _SpectralMap:
    """Descriptor functional map made orthogonal, then ZoomOut to ``kk`` functions."""
    t0 = time.perf_counter()
    ls, ps = source.normalised_basis(kk)
    lt, pt = target.normalised_basis(kk)
    timings["eigenbasis"] = time.perf_counter() - t0
    t1 = time.perf_counter()
    ds, dt = _descriptors(source, target, kk, landmarks)
    extra_s = extra_t = None
    if landmarks is not None:
        extra_s, extra_t = _landmark_columns(source, target, kk, landmarks, options.landmark_weight)
    k0 = int(min(options.k_start, kk))
    ms, mt = source.mass / source.area, target.mass / target.area
    # orientation operators of every 4th descriptor, each scaled to unit maximum
    orient_s = list(orientation_operators(source.vertices, source.faces, ps[:, :k0],
                                          ds[:, ::4] / np.abs(ds[:, ::4]).max(axis=0)))
    orient_t = list(orientation_operators(target.vertices, target.faces, pt[:, :k0],
                                          dt[:, ::4] / np.abs(dt[:, ::4]).max(axis=0)))
    weights = MapWeights(commute=options.commute, orient=options.orient, orient_s=orient_s, orient_t=orient_t)
    C0 = fmap_from_descriptors((ls[:k0], ps[:, :k0], ms, ds), (lt[:k0], pt[:, :k0], mt, dt), weights)
    # nearest orthogonal matrix: a near-isometry's map between orthonormal bases is orthogonal
    u, _, vt = np.linalg.svd(C0)
    C0 = u @ vt
    timings["descriptor_map"] = time.perf_counter() - t1
    t1 = time.perf_counter()
    C, vertex, rows = zoomout(C0, (ps, pt, mt), k_final=kk, step=options.step, extra=(extra_s, extra_t),
                              full_last=not options.align_steps)
    timings["zoomout"] = time.perf_counter() - t1
    emb_t, emb_s = pt @ C, ps
    if extra_s is not None and extra_t is not None:
        emb_t, emb_s = np.hstack([emb_t, extra_t]), np.hstack([emb_s, extra_s])
    return _SpectralMap(vertex, rows, emb_s, emb_t)


def _descriptors(source: Shape, target: Shape, k: int, landmarks: Landmarks | None) -> tuple[FloatArray, FloatArray]:
    """HKS and WKS (area-normalised, so comparable across shapes), columns scaled."""
    ds = np.hstack([source.hks(k, 12), source.wks(k, 12)])
    dt = np.hstack([target.hks(k, 12), target.wks(k, 12)])
    if landmarks is not None:
        es, et = _landmark_columns(source, target, k, landmarks, 1.0)
        ds, dt = np.hstack([ds, es]), np.hstack([dt, et])
    return ds, dt


def _landmark_columns(source: Shape, target: Shape, k: int, landmarks: Landmarks,
                      weight: float) -> tuple[FloatArray, FloatArray]:
    """Heat-kernel rows of the landmarks on both shapes, each column scaled by its value at the landmark."""
    hs = source.heat_rows(k, landmarks[0], LANDMARK_TIMES)
    ht = target.heat_rows(k, landmarks[1], LANDMARK_TIMES)
    # scale each column by its value at the landmark so both shapes share units
    scale = np.maximum(np.abs(hs).max(axis=0), 1e-300)
    return weight * hs / scale, weight * ht / np.maximum(np.abs(ht).max(axis=0), 1e-300)


def _vertex_as_point(shape: Shape, vertex: IntArray) -> tuple[IntArray, FloatArray]:
    """A vertex map as (triangle, barycentric): weight 1 at that corner of one incident triangle."""
    inc = incident_triangles(shape.faces, shape.n_vertices, cap=1)[:, 0]
    tri = inc[vertex]
    corner = np.argmax(shape.faces[tri] == vertex[:, None], axis=1)
    return tri, np.eye(3)[corner]
