"""Aligned matching: the meshes overlap in space, closest points are the map.

Where the surfaces coincide (the :data:`ALIGNED_QUANTILE` of the closest-point
distances, both ways, below :data:`ALIGNED_COINCIDE` mean edge lengths) the
closest points are kept as they are: two meshings of one surface, where the
closest point is the true partner by construction. Where the surfaces differ,
each closest point at least a quarter edge from the source whose
product-embedding residual is an outlier is searched for within a distance
that grows with the gap between the surfaces there, and moved only if that
lowers its cost clearly (:func:`check_closest_points`). The embedding is
carried through the closest-point map itself, so it agrees with any smooth
error of that map and can only catch matches that disagree with the rest of
it: closest points on the wrong part across a narrow gap. Measurements:
docs/measurements.md, "Correspondence and transfer accuracy".
"""

from __future__ import annotations

import time
import weakref
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray
from scipy.spatial import cKDTree

from ..spectra.shape import Shape
from .closest_point import SurfaceLocator, SurfacePoints, incident_triangles
from .embedding import PRODUCT_SPATIAL, ProductSettings, best_on_triangles, product_embedding, row_distances
from .modes import ModeResult

__all__ = ["ALIGNED_QUANTILE", "ALIGNED_COINCIDE", "ALIGNED_MARGIN", "ALIGNED_SPATIAL", "ALIGNED_WINDOW",
           "ALIGNED_NEIGHBOURS", "ALIGNED_PASSES", "match_aligned", "check_closest_points",
           "vertices_on_surface", "surface_locator"]

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.int64]

ALIGNED_QUANTILE = 0.99
"""Quantile of the closest-point distances (target vertices to the source
surface and source vertices to the target, the larger) that decides whether
aligned surfaces coincide: "everywhere" short of a few stray vertices."""

ALIGNED_COINCIDE = 0.25
"""Distance, in mean edge lengths ``h`` (the coarser mesh's), below which
aligned surfaces coincide: if the :data:`ALIGNED_QUANTILE` of the
closest-point distances is below it the check of :func:`check_closest_points`
is skipped (``refine=None``), and per vertex a closest point nearer than this
is never moved. Two meshings of one surface stay below it: a chord of length
``h`` deviates from a surface of curvature radius ``R`` by about
``h^2 / 8R``, a quarter edge only where ``R`` is under half an edge, detail
the coarser mesh does not carry."""

ALIGNED_MARGIN = 16.0
"""A closest point is moved only if that lowers its cost in the product
embedding by more than this many median residuals (so only vertices whose
own residual exceeds it are searched)."""

ALIGNED_SPATIAL = 2.0
"""Spatial scale of the aligned check, as a multiple of the distance ``d_i``
between the surfaces at target vertex ``i`` (at least
:data:`~engine.matching.embedding.PRODUCT_SPATIAL` ``h``): where the surfaces
are ``d`` apart the closest point is only known to about ``d``."""

ALIGNED_WINDOW = 8.0
"""Search radius of the aligned check, as a multiple of ``d_i`` (at least ``2 h``)."""

ALIGNED_NEIGHBOURS = 256
"""Candidate source vertices per searched target vertex (the nearest, then cut to the window)."""

ALIGNED_PASSES = 3
"""Passes of the aligned check, each carrying the embedding through the map
the last one left, so that a fixed match stops pulling its neighbours' back."""


def match_aligned(source: Shape, target: Shape, locators: tuple[SurfaceLocator, SurfaceLocator], h: float,
                  refine: bool | None, settings: ProductSettings, ahead: int = 0) -> ModeResult:
    """Closest points both ways, checked in the product embedding where the surfaces differ.

    Parameters
    ----------
    locators : closest-point searches on the source and on the target
    h : the coarser mesh's mean edge length
    refine : None: check where the surfaces differ; True: always; False: never
    settings : the product embedding's size
    ahead : where the surfaces differ (the self-check will run), the target's eigenbasis is solved
        at this size first, so that the check's first ``K`` and the self-check's come from one solve
    """
    loc_s, loc_t = locators
    t0 = time.perf_counter()
    cp_t = vertices_on_surface(target, source, loc_s)       # target vertices -> source surface
    cp_s = vertices_on_surface(source, target, loc_t)       # source vertices -> target surface
    tri, bary = cp_t.triangle, cp_t.barycentric
    gap = float(max(np.quantile(cp_t.distance, ALIGNED_QUANTILE),
                    np.quantile(cp_s.distance, ALIGNED_QUANTILE)) / h)
    vertex = source.faces[tri, np.argmax(bary, axis=1)]
    differ = gap >= ALIGNED_COINCIDE
    run = differ if refine is None else bool(refine)
    where = (f"{ALIGNED_QUANTILE:.0%} of closest-point distances within {gap:.2f} mean edge lengths "
             f"({'>=' if differ else '<'} {ALIGNED_COINCIDE:g}: the surfaces {'differ' if differ else 'coincide'})")
    checked: dict[str, Any] = {"closest_distance_over_h": gap, "coincide_below": ALIGNED_COINCIDE, "ran": run}
    result = ModeResult(tri, bary, vertex, _nearest_corner(target, cp_s), max(settings.K, 20))
    result.timings["initial_map"] = time.perf_counter() - t0
    if run:
        t0 = time.perf_counter()
        if differ and ahead > 0:
            target.eigenbasis(ahead)
        result.triangle, result.barycentric, result.vertex, result.sizes, counts = check_closest_points(
            source, target, cp_t, settings, h)
        result.timings["aligned_refine"] = time.perf_counter() - t0
        checked.update(counts)
        why = (f"{where}; {'requested: ' if refine else ''}product-embedding check moved "
               f"{counts['moved']} of {target.n_vertices} closest points")
    else:
        why = f"{where}; closest points kept" + (" (refine=False)" if refine is False else "")
    checked["why"] = why
    result.stats["aligned_refine"] = checked
    result.why = why
    return result


_ON_SURFACE: weakref.WeakKeyDictionary[Shape, weakref.WeakKeyDictionary[Shape, SurfacePoints]] = \
    weakref.WeakKeyDictionary()


def vertices_on_surface(points_of: Shape, surface: Shape, locator: SurfaceLocator | None = None) -> SurfacePoints:
    """Closest points of ``points_of``'s vertices on ``surface``, computed once per pair of shapes
    while both live (the lift of a map matched through stand-ins asks again for the same ones).

    ``locator`` searches ``surface`` (made here when not given).
    """
    kept = _ON_SURFACE.setdefault(points_of, weakref.WeakKeyDictionary())
    if surface not in kept:
        loc = surface_locator(surface) if locator is None else locator
        found = loc.closest(points_of.vertices)
        for a in (found.triangle, found.barycentric, found.points, found.distance):
            a.setflags(write=False)            # shared between callers
        kept[surface] = found
    return kept[surface]


_LOCATORS: weakref.WeakKeyDictionary[Shape, SurfaceLocator] = weakref.WeakKeyDictionary()


def surface_locator(shape: Shape) -> SurfaceLocator:
    """The closest-point search on ``shape``, made once while it lives (the aligned match and the
    self-check's intrinsic match of the same pair share it)."""
    if shape not in _LOCATORS:
        _LOCATORS[shape] = SurfaceLocator(shape.vertices, shape.faces)
    return _LOCATORS[shape]


def _nearest_corner(shape: Shape, points: SurfacePoints) -> IntArray:
    """The corner of each point's triangle holding the most weight."""
    out: IntArray = shape.faces[points.triangle, np.argmax(points.barycentric, axis=1)]
    return out


@dataclass(frozen=True)
class _Search:
    """One pass's search: the target rows searched, their scale and window, the source side."""

    rows: IntArray
    row_scale: FloatArray        # 1 / spatial scale, in 1 / h
    window: FloatArray
    Qt: FloatArray               # augmented target rows
    Qs: FloatArray               # augmented source embedding
    here: FloatArray             # current points of the rows, in the frame


def check_closest_points(source: Shape, target: Shape, closest: SurfacePoints, settings: ProductSettings,
                         h: float) -> tuple[IntArray, FloatArray, IntArray, dict[str, Any], dict[str, Any]]:
    """Move a closest point only where the product embedding rejects it.

    Target vertex ``i``, at ``d_i`` from the source, is searched within
    ``max(2 h, ALIGNED_WINDOW d_i)`` of its current point with the cost of
    :func:`~engine.matching.embedding.refine_products` and a spatial scale of
    ``max(PRODUCT_SPATIAL h, ALIGNED_SPATIAL d_i)``, and it moves only if that
    lowers its cost by more than :data:`ALIGNED_MARGIN` median residuals. Its
    cost where it stands is its own residual, so only vertices whose residual
    exceeds the margin are searched. Up to :data:`ALIGNED_PASSES` passes, each
    through the map the last one left (fewer if nothing moves).

    Returns
    -------
    triangle, barycentric, nearest source vertex, sizes (dict), counts (dict)
    """
    faces = source.faces
    tri, bary, distance = closest.triangle.copy(), closest.barycentric.copy(), closest.distance
    start = np.einsum("ij,ijk->ik", bary, source.vertices[faces[tri]])
    searched: list[int] = []
    sizes: dict[str, Any] = {}
    tree: cKDTree | None = None
    inc = incident_triangles(faces, source.n_vertices)
    for _ in range(ALIGNED_PASSES):
        emb = product_embedding(source, target, tri, bary, settings, h)
        sizes = emb.sizes
        diff = np.einsum("ij,ijk->ik", bary, emb.source[faces[tri]]) - emb.target
        current = np.einsum("ij,ij->i", diff, diff)              # cost where each vertex stands
        rows = np.flatnonzero((current > ALIGNED_MARGIN) & (distance >= ALIGNED_COINCIDE * h))
        searched.append(int(len(rows)))
        if not len(rows):
            break
        d = distance[rows]
        search = _Search(rows, 1.0 / np.maximum(PRODUCT_SPATIAL, ALIGNED_SPATIAL * d / h),
                         np.maximum(2.0 * h, ALIGNED_WINDOW * d), np.hstack([emb.target[rows], emb.here[rows] / h]),
                         np.hstack([emb.source, emb.frame / h]), emb.here[rows])
        if tree is None:
            tree = cKDTree(emb.frame)
        t2, b2, go = _search_pass(search, current[rows], faces, tree, inc)
        if not go.any():
            break
        tri[rows[go]], bary[rows[go]] = t2[go], b2[go]
    shift = np.linalg.norm(np.einsum("ij,ijk->ik", bary, source.vertices[faces[tri]]) - start, axis=1)
    moved = shift > 0
    vertex = faces[tri, np.argmax(bary, axis=1)]
    return tri, bary, vertex, sizes, {
        "passes": len(searched), "searched": searched, "moved": int(moved.sum()),
        "median_move_over_h": float(np.median(shift[moved]) / h) if moved.any() else 0.0}


def _search_pass(search: _Search, current: FloatArray, faces: IntArray, tree: cKDTree,
                 inc: IntArray) -> tuple[IntArray, FloatArray, NDArray[np.bool_]]:
    """Best point near each searched row and whether it beats the current one by the margin."""
    Qt_a, Qs_a, rs = search.Qt, search.Qs, search.row_scale
    k_n = min(ALIGNED_NEIGHBOURS, len(Qs_a))
    dist, cand = tree.query(search.here, k=k_n)
    cost = np.where(dist <= search.window[:, None], row_distances(Qt_a, Qs_a, cand, row_scale=rs), np.inf)
    cost[:, 0] = np.minimum(cost[:, 0], row_distances(Qt_a, Qs_a, cand[:, :1], row_scale=rs)[:, 0])
    best = cand[np.arange(len(cand)), np.argmin(cost, axis=1)]
    t2, b2 = best_on_triangles(Qt_a, Qs_a, faces, inc, best, row_scale=rs)
    dn = np.einsum("ij,ijk->ik", b2, Qs_a[faces[t2]]) - Qt_a
    dn[:, -3:] *= rs[:, None]
    go = np.einsum("ij,ij->i", dn, dn) < current - ALIGNED_MARGIN
    return t2, b2, go
