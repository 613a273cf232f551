"""Where each target vertex lies on the source surface.

:func:`correspond` answers, for every target vertex, a source triangle and
barycentric weights. Two ways there:

aligned
    The meshes overlap in space: closest points on the source triangles
    (:mod:`engine.closest_point`), kept as they are where the two surfaces
    coincide and checked in the product embedding (below) where they differ.
intrinsic
    Pose, placement and scale differ: area-normalised eigenbases, heat and
    wave kernel signatures plus each landmark's heat-kernel rows give a
    functional map by least squares with Laplacian commutativity and an
    orientation-preserving term (so a mirror-symmetric character is not
    mirrored); ZoomOut refinement grows it to a larger basis, with the
    landmark rows kept in the nearest-neighbour search. Then the source is
    deformed onto the target (landmark thin-plate-spline start, affine fit,
    a fit to the spectral map, then a non-rigid ICP: pairs both ways between
    the deformed source and the target, normals compatible, the landmarks
    held, an as-similar-as-possible regulariser with shrinking smoothing
    lengths) and every target vertex takes its closest point on the deformed
    source: this is what carries variants with other proportions, which no
    isometry prior serves.

The final point map of the intrinsic mode is found by nearest neighbours in
the embedding of orthogonalised eigenfunction products (``refine``, on by
default in intrinsic mode): target products ``Q_t = P_t R^-1`` from the
target's own first ``K`` eigenfunctions; on the source, those eigenfunctions
transported through the current map (mass-weighted least squares in the
source eigenbasis), multiplied into the same kept monomials and
orthogonalised with the same ``R``, so both embeddings are the same functions
seen from the two sides (a point map commutes with pointwise products). The
columns are weighted by how well each survives the transport, and the
embedding is augmented with the position in the frame the map was found in
(the deformed source), scaled so that moving a match by 0.05 edge lengths costs
as much as the median embedding residual: the embedding arbitrates locally
instead of replacing the match. Each target vertex takes its nearest source
vertex in that augmented embedding within 3 mean edge lengths of its current
match, then the best point on that vertex's triangles by a least-squares fit
(:func:`_refine_products`). Measured with benchmarks/transfer_accuracy.py
(pointwise colour RMSE / mask error / map error over sqrt(area), without ->
with):

====================  ========================  ========================
pair                  without                   with (default)
====================  ========================  ========================
creature-pose         0.0328 / 0.0137 / 0.0157  0.0326 / 0.0120 / 0.0157
creature-proportion   0.0507 / 0.0234 / 0.0280  0.0507 / 0.0234 / 0.0280
creature-rigid        0 / 0 / 0                 0 / 0 / 0
cow-rigid             0 / 0 / 0                 0 / 0 / 0
elephant-bent         0.0182 / 0.0025 / 0.0079  0.0181 / 0.0029 / 0.0079
elephant-proportion   0.0199 / 0.0086 / 0.0092  0.0198 / 0.0086 / 0.0092
====================  ========================  ========================

and over all 13 non-rigid intrinsic pairs of benchmarks/product_refinement.py
(these and nine variants: other seeds, bend angles, resolutions and
proportions) colour RMSE and map error got worse on none, mean changes
colour -0.40%, mask -1.55%, map -0.16%; the mask is one vertex worse on three
pairs (elephant-bent above). With the spatial term at 0.1 edge lengths the mask
got worse on average (+1.76%; creature-pose 0.0137 -> 0.0172); without it 7 of
the 13 got worse in map error. The gains are small because the map after the
alignment step is already within a fraction of an edge length of the truth
and the embedding, transported through that map, mostly agrees with it.

In aligned mode the closest points are the map where the surfaces coincide:
if 99% of the closest-point distances, both ways, are below a quarter of the
mean edge length (:data:`ALIGNED_COINCIDE`), nothing else is done and the
report says why. Two meshings of one surface stay below it (0.11 to 0.19 on
the four such pairs of benchmarks/aligned_refinement.py), and there the
closest point is the true partner by construction, so any move is an error:
the intrinsic mode's step, forced on elephant-resolution, took it from
0.0018 / 0.0055 / 0.0006 to 0.0033 / 0.0061 / 0.0011. Where the surfaces
differ, each closest point at least a quarter edge from the source whose
product-embedding residual is an outlier is searched for within a distance
that grows with the gap between the surfaces there, and moved only if that
lowers its cost clearly (:func:`_refine_aligned`). The embedding is carried
through the closest-point map itself, so it agrees with any smooth error of
that map (a surface sliding along itself, as bending or a smooth deformation
makes it) and can only catch matches that disagree with the rest of the map:
closest points on the wrong part across a narrow gap. Measured with
benchmarks/aligned_refinement.py (the same three metrics; gap: 99th
percentile of the closest-point distances over ``h``):

====================  =====  ========================  ========================
pair                  gap    closest points            default
====================  =====  ========================  ========================
creature-resolution   0.117  0.0039 / 0.0127 / 0.0010  same (closest points)
elephant-resolution   0.186  0.0018 / 0.0055 / 0.0006  same (closest points)
creature-thicker      0.334  0.0058 / 0.0183 / 0.0025  same (nothing moved)
creature-reposed      0.561  0.0314 / 0.0151 / 0.0173  same (nothing moved)
creature-pinched      2.286  0.1041 / 0.0714 / 0.0686  0.0455 / 0.0277 / 0.0193
elephant-deformed     2.843  0.0989 / 0.0289 / 0.0379  0.0976 / 0.0293 / 0.0375
====================  =====  ========================  ========================

Over the 13 pairs that differ (those four at two or three strengths each) the
default changed colour RMSE by -7.8% on average, mask error by -7.1%, map error
by -9.6%; the one metric it made worse is elephant-deformed's mask (+1.6%, 21
of 44,460 vertices). The smooth sliding is what the intrinsic mode recovers:
``match="intrinsic"`` takes elephant-deformed to 0.0094 / 0.0060 / 0.0043,
creature-reposed to 0.0197 / 0.0055 / 0.0097 and creature-pinched to
0.0260 / 0.0277 / 0.0171, but creature-thicker, whose closest points are right
(a change of thickness moves the surface along its normal), to
0.0342 / 0.0326 / 0.0184 (benchmarks/transfer_accuracy.py --match=intrinsic),
so aligned mode does not switch to it by itself.

``mode="auto"`` measures the overlap: the fraction of target vertices within
``3`` mean edge lengths of the source surface and of source vertices within
as much of the target; both above 0.9 picks aligned.

Confidence per target vertex is the round-trip agreement: target vertex ->
source point -> (reverse map: closest points from the (deformed) source
onto the target, or the spectral embedding without alignment) -> target vertex; ``exp(-(d / 4h)^2)`` with
``d`` the distance between start and end and ``h`` the target's mean edge
length (1 is a perfect round trip, 0.5 about 3.3 edge lengths off).
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field

import numpy as np
from scipy.spatial import cKDTree

from ..spectra.products import product_exponents, raw_products
from .closest_point import SurfaceLocator, incident_triangles, closest_points_on_triangles
from ..carrying.detail import vertex_normals_unchecked
from .functional_map import fmap_from_descriptors, nearest_rows, orientation_operator, zoomout
from ..spectra.shape import Shape

__all__ = ["Correspondence", "correspond"]

MATCHES = ("auto", "aligned", "intrinsic")


@dataclass(frozen=True)
class Correspondence:
    """A map from every target vertex to a point on the source surface.

    Attributes
    ----------
    source, target : Shape
    mode : str
        ``"aligned"`` or ``"intrinsic"``.
    reason : str
        Why that mode (for ``match="auto"`` the measured overlap).
    triangle : (n_t,) int64 array
        Source triangle (index into ``source.faces``) per cleaned target vertex.
    barycentric : (n_t, 3) float64 array
        Weights of that triangle's corners; non-negative, rows sum to 1.
    confidence : (n_t,) float64 array in [0, 1]
        Round-trip agreement (module docstring).
    fmap : (k_t, k_s) float64 array
        Functional map, source eigen-coefficients -> target eigen-coefficients.
    stats : dict
        JSON-able: overlap, coverage of source area, consistency, sizes and
        ranks, timings, cache hits.
    """

    source: Shape
    target: Shape
    mode: str
    reason: str
    triangle: np.ndarray
    barycentric: np.ndarray
    confidence: np.ndarray
    fmap: np.ndarray
    stats: dict = field(default_factory=dict)

    def matrix(self):
        """The pull-back as a sparse ``(n_t_clean, n_s_clean)`` matrix of barycentric weights."""
        return _barycentric_matrix(self.source.faces, self.triangle, self.barycentric, self.source.n_vertices)

    def points(self) -> np.ndarray:
        """(n_t, 3) mapped points on the source surface (source coordinates)."""
        return np.einsum("ij,ijk->ik", self.barycentric, self.source.vertices[self.source.faces[self.triangle]])

    def pull(self, source_values) -> np.ndarray:
        """Barycentric interpolation of per-vertex source values.

        Parameters
        ----------
        source_values : (n_s_original, ...) float array

        Returns
        -------
        (n_t_original, ...) float64 array
        """
        v = _check_values(source_values, self.source.n_original, "source values")
        clean = self.source.to_cleaned(v.astype(np.float64))
        corners = clean[self.source.faces[self.triangle]]           # (n_t, 3, ...)
        w = self.barycentric.reshape(self.barycentric.shape + (1,) * (clean.ndim - 1))
        return self.target.restore((w * corners).sum(axis=1))

    def pull_labels(self, labels) -> np.ndarray:
        """Labels or masks, never blended: each target vertex takes the label
        that holds the most barycentric weight among the three corners of its
        source triangle (a majority where several labels meet; two equal
        corners outvote a single heavier one), ties going to the corner with
        the largest weight.

        Parameters
        ----------
        labels : (n_s_original,) or (n_s_original, c) array of any dtype

        Returns
        -------
        (n_t_original, ...) array of the same dtype
        """
        a = np.asarray(labels)
        if a.ndim == 0 or a.shape[0] != self.source.n_original:
            raise ValueError(f"labels must have one row per source vertex ({self.source.n_original}), "
                             f"got shape {a.shape}")
        clean = self.source.to_cleaned(a)
        corners = self.source.faces[self.triangle]                     # (n_t, 3)
        vals = clean[corners].reshape(len(corners), 3, -1)             # (n_t, 3, c)
        w = self.barycentric
        # weight of the label at corner i: sum of the weights of corners equal to it
        same = np.all(vals[:, :, None, :] == vals[:, None, :, :], axis=3)   # (n_t, 3, 3)
        votes = np.einsum("nij,nj->ni", same.astype(np.float64), w)
        votes += 1e-9 * w  # ties: the heavier corner
        pick = corners[np.arange(len(corners)), np.argmax(votes, axis=1)]
        return self.target.restore(clean[pick])

    def report(self) -> dict:
        """JSON-able summary: mode and reason plus :attr:`stats`."""
        return {"mode": self.mode, "reason": self.reason, **self.stats}


def _check_values(values, n, what):
    a = np.asarray(values)
    if a.ndim == 0 or a.shape[0] != n:
        raise ValueError(f"{what} must have one row per source vertex ({n}), got shape {a.shape}")
    if not (np.issubdtype(a.dtype, np.number) or a.dtype == bool):
        raise ValueError(f"{what} must be numeric, got dtype {a.dtype}")
    if not np.isfinite(a).all():
        raise ValueError(f"{what} contain {int((~np.isfinite(a)).sum())} non-finite entries")
    return a


# ---------------------------------------------------------------- entry point
def correspond(source: Shape, target: Shape, *, match: str = "auto", landmarks=None, k: int = 60,
               k_start: int = 20, step: int = 10, refine: bool | None = None, product_K: int | None = None,
               product_order: int = 3, overlap_radius: float = 3.0, overlap_threshold: float = 0.9,
               landmark_weight: float = 1.0, commute: float = 0.1, orient: float = 1e-3,
               align_steps=(0.1, 0.05, 0.02, 0.01, 0.005), align_iterations: int = 3) -> Correspondence:
    """Correspondence from every target vertex to the source surface.

    Parameters
    ----------
    source, target : Shape
    match : {"auto", "aligned", "intrinsic"}
    landmarks : list of (source_vertex, target_vertex), optional
        Original vertex indices known to correspond.
    k : int
        Final size of the eigenbasis for the intrinsic functional map.
    k_start : int
        Size of the first (descriptor) functional map.
    step : int
        ZoomOut step.
    refine : bool, optional
        Intrinsic mode: final point map by nearest neighbours in the product
        embedding augmented with the position in the map's frame. Aligned
        mode: the closest points checked in that embedding
        (:func:`_refine_aligned`). ``None`` (default): always in intrinsic
        mode, in aligned mode where the surfaces differ
        (:data:`ALIGNED_COINCIDE`); ``True``: always; ``False``: never.
    product_K, product_order : int
        Eigenfunctions and order of the product embedding; ``product_K`` by
        default :data:`PRODUCT_K`.
    overlap_radius : float
        In mean edge lengths, for the overlap measure.
    overlap_threshold : float
        Overlap above which ``auto`` picks aligned.
    landmark_weight : float
        Weight of the landmark heat-kernel columns in the nearest-neighbour search.
    align_steps : sequence of float
        Intrinsic mode only: after the spectral map, deform the source onto
        the target (:func:`_align_refine`: an affine fit, a fit to the
        spectral map, then a non-rigid ICP with these smoothing lengths, as
        fractions of sqrt(target area)) and take closest points on the
        deformed source. Empty to skip.
    align_iterations : int
        ICP solves per smoothing length.
    commute, orient : float
        Weights of Laplacian commutativity and of the orientation term in the
        descriptor functional map (eigenvalues scaled to [0, 1], descriptor
        coefficients to unit norm).

    Returns
    -------
    Correspondence
    """
    if not isinstance(source, Shape) or not isinstance(target, Shape):
        raise ValueError("source and target must be Shape objects")
    if match not in MATCHES:
        raise ValueError(f"unknown match {match!r}; expected one of {', '.join(MATCHES)}")
    lm = _check_landmarks(landmarks, source, target)
    timings: dict = {}
    t0 = time.perf_counter()
    loc_s = SurfaceLocator(source.vertices, source.faces)
    loc_t = SurfaceLocator(target.vertices, target.faces)
    h = max(source.mean_edge, target.mean_edge)
    # The overlap is a fraction: a fixed random sample of each side measures it
    # to about +-1% (binomial, 4,000 points), so the closest points of every
    # vertex are only computed when the aligned mode needs them.
    sample_t = _overlap_sample(target.n_vertices)
    sample_s = _overlap_sample(source.n_vertices)
    frac_t = float(np.mean(loc_s.closest(target.vertices[sample_t]).distance < overlap_radius * h))
    frac_s = float(np.mean(loc_t.closest(source.vertices[sample_s]).distance < overlap_radius * h))
    overlap = min(frac_t, frac_s)
    timings["overlap"] = time.perf_counter() - t0
    if match == "auto":
        mode = "aligned" if overlap >= overlap_threshold else "intrinsic"
        reason = (f"auto: {frac_t:.0%} of target vertices and {frac_s:.0%} of source vertices lie within "
                  f"{overlap_radius:g} mean edge lengths of the other surface "
                  f"({'>=' if mode == 'aligned' else '<'} {overlap_threshold:.0%}): {mode}")
    else:
        mode = match
        reason = f"requested {mode} (measured overlap {overlap:.0%})"
    stats: dict = {"overlap": {"target_near_source": frac_t, "source_near_target": frac_s}}
    K = product_K if product_K is not None else PRODUCT_K

    t0 = time.perf_counter()
    if mode == "aligned":
        cp_t = loc_s.closest(target.vertices)       # target vertices -> source surface
        cp_s = loc_t.closest(source.vertices)       # source vertices -> target surface
        tri, bary = cp_t.triangle, cp_t.barycentric
        gap = float(max(np.quantile(cp_t.distance, ALIGNED_QUANTILE),
                        np.quantile(cp_s.distance, ALIGNED_QUANTILE)) / h)    # ALIGNED_COINCIDE
        vertex = source.faces[tri, np.argmax(bary, axis=1)]
        k_map = max(K, 20)
        C = None
        rev = ("closest", cp_s)
        extra_s = extra_t = None
    else:
        kk = int(min(k, source.n_vertices - 1, target.n_vertices - 1))
        ls, ps = source.normalised_basis(kk)
        lt, pt = target.normalised_basis(kk)
        timings["eigenbasis"] = time.perf_counter() - t0
        t1 = time.perf_counter()
        ds, dt = _descriptors(source, target, kk, lm)
        extra_s = extra_t = None
        if lm is not None:
            extra_s, extra_t = _landmark_columns(source, target, kk, lm, landmark_weight)
        k0 = int(min(k_start, kk))
        ms, mt = source.mass / source.area, target.mass / target.area
        # orientation operators of every 4th descriptor, each scaled to unit maximum
        orient_s = [orientation_operator(source.vertices, source.faces, ps[:, :k0], ms, d / np.abs(d).max())
                    for d in ds.T[::4]]
        orient_t = [orientation_operator(target.vertices, target.faces, pt[:, :k0], mt, d / np.abs(d).max())
                    for d in dt.T[::4]]
        C0 = fmap_from_descriptors(ls[:k0], ps[:, :k0], ms, ds, lt[:k0], pt[:, :k0], mt, dt,
                                   orient_s=orient_s, orient_t=orient_t, orient=orient, commute=commute)
        # nearest orthogonal matrix: a near-isometry's map between orthonormal bases is orthogonal
        u, _, vt = np.linalg.svd(C0)
        C0 = u @ vt
        timings["descriptor_map"] = time.perf_counter() - t1
        t1 = time.perf_counter()
        C, vertex, rows = zoomout(C0, ps, pt, mt, k_final=kk, step=step, extra_s=extra_s, extra_t=extra_t,
                                  full_last=not align_steps)
        timings["zoomout"] = time.perf_counter() - t1
        tri, bary = _vertex_as_point(source, vertex)
        k_map = kk
        emb_t = pt @ C
        emb_s = ps
        if extra_s is not None:
            emb_t, emb_s = np.hstack([emb_t, extra_t]), np.hstack([emb_s, extra_s])
        rev = ("embedding", emb_s, emb_t)
        window = None
    timings["initial_map"] = time.perf_counter() - t0

    if mode == "intrinsic" and align_steps:
        t0 = time.perf_counter()
        tri, bary, X = _align_refine(source, target, tri, bary, align_steps, lm, rows,
                                     iterations=align_iterations)
        vertex = source.faces[tri, np.argmax(bary, axis=1)]
        rev = ("closest", loc_t.closest(X))
        timings["align_refine"] = time.perf_counter() - t0

    ranks = {}
    if mode == "aligned":
        differ = gap >= ALIGNED_COINCIDE
        run = differ if refine is None else bool(refine)
        where = (f"{ALIGNED_QUANTILE:.0%} of closest-point distances within {gap:.2f} mean edge lengths "
                 f"({'>=' if differ else '<'} {ALIGNED_COINCIDE:g}: the surfaces {'differ' if differ else 'coincide'})")
        checked = {"closest_distance_over_h": gap, "coincide_below": ALIGNED_COINCIDE, "ran": run}
        if run:
            t0 = time.perf_counter()
            tri, bary, vertex, ranks, counts = _refine_aligned(source, target, tri, bary, cp_t.distance, K,
                                                               product_order, h=h)
            timings["aligned_refine"] = time.perf_counter() - t0
            checked.update(counts)
            why = (f"{where}; {'requested: ' if refine else ''}product-embedding check moved "
                   f"{counts['moved']} of {target.n_vertices} closest points")
        else:
            why = f"{where}; closest points kept" + (" (refine=False)" if refine is False else "")
        checked["why"] = why
        stats["aligned_refine"] = checked
        reason = f"{reason}; {why}"
    elif refine is None or refine:
        t0 = time.perf_counter()
        frame = X if align_steps else None
        tri, bary, vertex, ranks = _refine_products(source, target, tri, bary, vertex, K, product_order,
                                                    window=window, h=h, frame=frame)
        timings["product_refine"] = time.perf_counter() - t0

    # functional map of the final point map (unit-area bases)
    kf = int(min(k_map, source.n_vertices - 1, target.n_vertices - 1))
    _, ps = source.normalised_basis(kf)
    _, pt = target.normalised_basis(kf)
    mt = target.mass / target.area
    pulled = np.einsum("ij,ijk->ik", bary, ps[source.faces[tri]])
    C = pt.T @ (mt[:, None] * pulled)

    # confidence and consistency: round trip through the reverse map
    t0 = time.perf_counter()
    if rev[0] == "closest":
        back = target.faces[rev[1].triangle, np.argmax(rev[1].barycentric, axis=1)]
    else:
        back = nearest_rows(rev[2], rev[1])
    end = back[vertex]
    d = np.linalg.norm(target.vertices[end] - target.vertices, axis=1)
    conf = np.exp(-(d / (4 * target.mean_edge)) ** 2)
    coverage = _coverage(source, np.einsum("ij,ijk->ik", bary, source.vertices[source.faces[tri]]),
                         2 * max(source.mean_edge, target.mean_edge * np.sqrt(source.area / target.area)))
    timings["confidence"] = time.perf_counter() - t0
    stats.update({
        "coverage_of_source_area": coverage,
        "consistency": {"median_round_trip_over_sqrt_area": float(np.median(d) / np.sqrt(target.area)),
                        "within_2_edges": float(np.mean(d < 2 * target.mean_edge)),
                        "mean_confidence": float(conf.mean())},
        "sizes": {"source_vertices": source.n_vertices, "target_vertices": target.n_vertices,
                  "fmap": list(C.shape), "landmarks": 0 if lm is None else len(lm[0]), **ranks},
        "timings": {k_: round(v, 4) for k_, v in timings.items()},
        "cache_hits": {"source": dict(source.hits), "target": dict(target.hits)},
    })
    return Correspondence(source, target, mode, reason, tri.astype(np.int64), bary, conf, C, stats)


# ---------------------------------------------------------------- pieces
OVERLAP_SAMPLE = 4000


def _overlap_sample(n: int) -> np.ndarray:
    """Vertex indices used to measure overlap: all of them, or a fixed random sample."""
    if n <= OVERLAP_SAMPLE:
        return np.arange(n)
    return np.sort(np.random.default_rng(0).choice(n, OVERLAP_SAMPLE, replace=False))


def _check_landmarks(landmarks, source, target):
    if landmarks is None or len(landmarks) == 0:
        return None
    a = np.asarray(landmarks)
    if a.ndim != 2 or a.shape[1] != 2 or not np.issubdtype(a.dtype, np.integer):
        raise ValueError(f"landmarks must be a list of (source_vertex, target_vertex) integer pairs, "
                         f"got shape {a.shape} and dtype {a.dtype}")
    return source.original_index(a[:, 0]), target.original_index(a[:, 1])


def _descriptors(source, target, k, lm):
    """HKS and WKS (area-normalised, so comparable across shapes), columns scaled."""
    ds = np.hstack([source.hks(k, 12), source.wks(k, 12)])
    dt = np.hstack([target.hks(k, 12), target.wks(k, 12)])
    if lm is not None:
        es, et = _landmark_columns(source, target, k, lm, 1.0)
        ds, dt = np.hstack([ds, es]), np.hstack([dt, et])
    return ds, dt


LANDMARK_TIMES = (0.003, 0.01, 0.03)   # unit-area shapes: kernel radius ~ sqrt(4t) ~ 0.1-0.35


def _landmark_columns(source, target, k, lm, weight):
    hs = source.heat_rows(k, lm[0], LANDMARK_TIMES)
    ht = target.heat_rows(k, lm[1], LANDMARK_TIMES)
    # scale each column by its value at the landmark so both shapes share units
    scale = np.maximum(np.abs(hs).max(axis=0), 1e-300)
    return weight * hs / scale, weight * ht / np.maximum(np.abs(ht).max(axis=0), 1e-300)


def _vertex_as_point(shape, vertex):
    """A vertex map as (triangle, barycentric): weight 1 at that corner of one incident triangle."""
    inc = incident_triangles(shape.faces, shape.n_vertices, cap=1)[:, 0]
    tri = inc[vertex]
    corner = np.argmax(shape.faces[tri] == vertex[:, None], axis=1)
    return tri, np.eye(3)[corner]


PRODUCT_K = 10
"""Eigenfunctions of the product refinement (order 3: 286 monomials, rank 25
to 58 on the benchmark pairs at tolerance 0.3; 0.04-0.25 s on one core). On
the 13 pairs of benchmarks/product_refinement.py, 8 and 12 each made two
pairs worse where 10 made none worse: the stretched elephant 0.7-1.3 (colour
RMSE 0.0412 -> 0.0416, map error 0.0175 -> 0.0176) and one creature's mask by
one vertex."""

PRODUCT_SPATIAL = 0.05
"""Spatial scale of the product refinement, in mean edge lengths ``h``: moving
a match by ``0.05 h`` from where the current map put it (in the frame the map
was found in) costs as much as the median embedding residual of the current
map. Measured on the 13 intrinsic pairs of benchmarks/product_refinement.py
after the non-rigid ICP alignment (colour RMSE, mask error, map error; mean
change over the 13): 0.05: -0.40% / -1.55% / -0.16%, colour and map error no
worse on any pair at 4 decimals, the mask one vertex worse on three pairs
(elephant-bent 0.0025 -> 0.0029) and better on six; 0.07: -0.52% / +0.37% /
-0.16%; 0.1: -0.60% / +1.76% / -0.04% (creature-pose mask 0.0137 -> 0.0172).
Before that alignment existed, 0.07 and 0.1 made no pair worse; without the
spatial term 7 of the 13 got worse in map error."""


ALIGNED_QUANTILE = 0.99
"""Quantile of the closest-point distances (target vertices to the source
surface and source vertices to the target, the larger) that decides whether
aligned surfaces coincide: "everywhere" short of a few stray vertices."""

ALIGNED_COINCIDE = 0.25
"""Distance, in mean edge lengths ``h`` (the coarser mesh's), below which
aligned surfaces coincide: if the :data:`ALIGNED_QUANTILE` of the
closest-point distances is below it the check of :func:`_refine_aligned` is
skipped (``refine=None``), and per vertex a closest point nearer than this is
never moved. Two meshings of one surface stay below it: a chord of length
``h`` deviates from a surface of curvature radius ``R`` by about
``h^2 / 8R``, a quarter edge only where ``R`` is under half an edge, detail
the coarser mesh does not carry. Measured with
benchmarks/aligned_refinement.py: 0.117 creature-resolution, 0.186
elephant-resolution (its fine mesh is a smoothed subdivision, so it deviates
most), 0.113 and 0.150 on two smaller creatures; the pairs that differ 0.133
to 2.843. The three of those below 0.25 (the creature's radius changed by up
to 3% and 6%: 0.133, 0.193; bent by 0.1 rad: 0.199) have nothing moved by the
check either when it is forced. Without the per-vertex floor the forced check
moved 19 vertices of elephant-resolution (colour RMSE +0.28%) and made
creature-pinched-0.1's colour 0.60% worse instead of 0.08% better."""

ALIGNED_MARGIN = 16.0
"""A closest point is moved only if that lowers its cost in the product
embedding by more than this many median residuals (so only vertices whose
own residual exceeds it are searched). Measured with
benchmarks/aligned_refinement.py, colour / mask / map error change against
closest points: at 8, creature-pinched -57.3 / -62.7 / -72.7% but
elephant-deformed at 0.25 and 0.5 edge lengths +1.28% and +0.41% in colour
(on the former 258 vertices moved, 185 of them further from the truth); at
16, -56.3 / -61.2 / -71.8%, those two unchanged, elephant-deformed -1.23 /
+1.64 / -1.09%; at 32, -55.6 / -61.2 / -71.2% and -0.69 / +0.39 / -0.54%."""

ALIGNED_SPATIAL = 2.0
"""Spatial scale of the aligned check, as a multiple of the distance ``d_i``
between the surfaces at target vertex ``i`` (at least
:data:`PRODUCT_SPATIAL` ``h``): where the surfaces are ``d`` apart the closest
point is only known to about ``d``. Measured on creature-pinched /
elephant-deformed, colour change: 1: -55.8% / -1.08%; 2: -56.3% / -1.23%;
4: -56.9% / -1.16% (mask of elephant-deformed +1.87, +1.64, +1.95%)."""

ALIGNED_WINDOW = 8.0
"""Search radius of the aligned check, as a multiple of ``d_i`` (at least
``2 h``): on creature-pinched a wrong-arm match lies 2 to 3 edge lengths
away from the right one, at ``d_i`` of 0.5 to 2 edges. Colour change there:
6: -48.8%; 8 and 12: -56.3%."""

ALIGNED_NEIGHBOURS = 256
"""Candidate source vertices per searched target vertex (the nearest, then
cut to the window): 128 gave creature-pinched -42.8% in colour, 256 and 512
the same -56.3%."""

ALIGNED_PASSES = 3
"""Passes of the aligned check, each carrying the embedding through the map
the last one left, so that a fixed match stops pulling its neighbours' back:
colour change on creature-pinched / elephant-deformed 1: -52.6% / -0.96%; 3:
-56.3% / -1.23%; 5: -57.1% / -1.29%."""


def _refine_products(source, target, tri, bary, vertex, K, order, *, window, h, frame=None,
                     spatial=PRODUCT_SPATIAL, neighbours=32, tol=0.3, floor=0.01):
    """Point map in the product embedding, searched near the current match.

    Target embedding: ``Q_t = P_t(kept) R^-1``, the target's own orthogonal
    products. Source embedding: the target's first ``K`` eigenfunctions
    carried to the source through the current map (mass-weighted least
    squares in a source eigenbasis of ``2K + 10`` functions: the source
    functions whose pull-back is closest to each target eigenfunction), then
    the same kept monomials and the same ``R^-1``, so the columns of both
    embeddings are the same functions seen from the two sides.

    Each column ``j`` is weighted by ``1 / e_j`` (weights scaled to unit
    root mean square), ``e_j`` its mass-weighted residual through the
    current map, ``||Pi Q_s,j - Q_t,j||_M`` (columns have unit norm): the
    products that survive the transport badly count less. Then each target
    vertex ``i`` takes the source point ``x`` minimising

        ``|Q_t(i) - Q_s(x)|_w^2 / s^2 + |F(x) - F(x_i)|^2 / (spatial h)^2``

    with ``x_i`` its current match, ``F`` the frame the map was found in
    (``frame``: the deformed source of the alignment step; the source's
    own vertices by default) and ``s^2`` the median weighted residual of the
    current map (at least the embedding's change over ``floor h``, so an
    exact map does not turn rounding into moves). The augmented embedding
    ``[Q w / s, F / (spatial h)]`` makes that a nearest-neighbour search
    among the source vertices within ``window`` of the current point, then
    the best point on that vertex's triangles by least squares on the
    simplex (exact for this cost, which is quadratic in the barycentric
    weights). The spatial term lets the embedding arbitrate locally instead
    of replacing the match: in the measurements of :data:`PRODUCT_SPATIAL`
    the median move is a few hundredths of an edge.

    ``tol`` is the products' dependency tolerance. It bounds the
    conditioning of ``R_kept`` (a kept product keeps at least ``tol`` of its
    norm, so ``R^-1`` amplifies the transport error by at most about
    ``1 / tol``): at the library default (1e-3) the source embedding's error
    was amplified enough to triple the map error on creature-pose.
    """
    Qt, Qs, F, here, info = _product_embedding(source, target, tri, bary, K, order, h=h, frame=frame,
                                                tol=tol, floor=floor)
    if window is None:
        window = 3.0 * h
    Qt_a = np.hstack([Qt, here / (spatial * h)])
    Qs_a = np.hstack([Qs, F / (spatial * h)])
    tree = cKDTree(F)
    inc = incident_triangles(source.faces, source.n_vertices)
    dist, cand = tree.query(here, k=min(neighbours, source.n_vertices))
    cost = np.where(dist <= window, _row_distances(Qt_a, Qs_a, cand), np.inf)
    cost[:, 0] = np.minimum(cost[:, 0], _row_distances(Qt_a, Qs_a, cand[:, :1])[:, 0])
    best = cand[np.arange(len(cand)), np.argmin(cost, axis=1)]
    tri2, bary2 = _best_on_triangles(Qt_a, Qs_a, source.faces, inc, best)
    moved = np.linalg.norm(np.einsum("ij,ijk->ik", bary2, F[source.faces[tri2]]) - here, axis=1)
    return tri2, bary2, best, {**info, "product_spatial": float(spatial),
                               "product_median_move_over_h": float(np.median(moved) / h)}


def _product_embedding(source, target, tri, bary, K, order, *, h, frame=None, tol=0.3, floor=0.01):
    """Both sides of the product embedding through the current map (:func:`_refine_products`).

    Returns
    -------
    Qt : (n_t, r) target rows, column-weighted and divided by the residual scale ``s``
    Qs : (n_s, r) source rows, the same
    F : (n_s, 3) the frame (source vertices by default)
    here : (n_t, 3) the current points in that frame
    info : dict of sizes
    """
    K = int(min(K, source.n_vertices - 2, target.n_vertices - 2))
    pb = target.products(K, order, tol=tol)
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
    Pi = _barycentric_matrix(source.faces, tri, bary, source.n_vertices)
    A = np.linalg.lstsq(sw * (Pi @ ps), sw * pt, rcond=None)[0]           # (kk, K)
    G = ps @ A                                                              # target eigenfunctions on the source
    Qs = raw_products(G, ex) @ Rinv * np.sqrt(a_t)
    res = Pi @ Qs - Qt
    m = target.mass / a_t
    col_res = np.sqrt(m @ (res * res))                                      # per column, columns of unit norm
    wc = 1.0 / np.maximum(col_res, 1e-3)
    wc /= np.sqrt(np.mean(wc * wc))
    Qt, Qs, res = Qt * wc, Qs * wc, res * wc
    s2 = float(np.median(np.einsum("ij,ij->i", res, res)))
    f = source.faces
    e = np.vstack([f[:, [0, 1]], f[:, [1, 2]], f[:, [2, 0]]])    # every edge, interior ones twice
    dq = np.einsum("ij,ij->i", Qs[e[:, 0]] - Qs[e[:, 1]], Qs[e[:, 0]] - Qs[e[:, 1]])
    dx = np.einsum("ij,ij->i", F[e[:, 0]] - F[e[:, 1]], F[e[:, 0]] - F[e[:, 1]])
    ok = dx > 0
    g2 = float(np.median(dq[ok] / dx[ok])) if ok.any() else 0.0
    s = np.sqrt(max(s2, g2 * (floor * h) ** 2, 1e-300))
    here = np.einsum("ij,ijk->ik", bary, F[source.faces[tri]])
    return Qt / s, Qs / s, F, here, {"product_K": K, "product_order": order,
                                     "product_columns": int(len(pb.exponents)), "product_rank": int(len(kept))}


def _refine_aligned(source, target, tri, bary, distance, K, order, *, h, margin=None, spatial=None,
                    window=None, neighbours=None, passes=None, tol=0.3, floor=0.01):
    """Aligned mode: move a closest point only where the product embedding rejects it.

    The embedding of :func:`_product_embedding` is carried through the
    closest-point map itself, so where that map is smooth the two sides agree
    with it by construction; what it can see is a match that disagrees with
    the rest of the map (a target vertex whose closest point lies on the
    wrong part across a narrow gap). Target vertex ``i``, at ``d_i`` from the
    source, is searched within ``max(2 h, window d_i)`` of its current point
    with the cost of :func:`_refine_products` and a spatial scale of
    ``max(PRODUCT_SPATIAL h, spatial d_i)`` (a closest point is only known to
    about the distance between the surfaces), and it moves only if that
    lowers its cost by more than ``margin`` median residuals. Its cost where
    it stands is its own residual, so only vertices whose residual exceeds
    ``margin`` are searched. Up to ``passes`` passes, each through the map the
    last one left (fewer if nothing moves).

    Returns
    -------
    triangle, barycentric, nearest source vertex, sizes (dict), counts (dict)
    """
    margin = ALIGNED_MARGIN if margin is None else margin
    spatial = ALIGNED_SPATIAL if spatial is None else spatial
    window = ALIGNED_WINDOW if window is None else window
    neighbours = ALIGNED_NEIGHBOURS if neighbours is None else neighbours
    passes = ALIGNED_PASSES if passes is None else passes
    faces = source.faces
    tri, bary = tri.copy(), bary.copy()
    start = np.einsum("ij,ijk->ik", bary, source.vertices[faces[tri]])
    searched, info = [], {}
    inc = tree = None
    for _ in range(passes):
        Qt, Qs, F, here, info = _product_embedding(source, target, tri, bary, K, order, h=h, tol=tol, floor=floor)
        diff = np.einsum("ij,ijk->ik", bary, Qs[faces[tri]]) - Qt
        current = np.einsum("ij,ij->i", diff, diff)              # cost where each vertex stands
        rows = np.flatnonzero((current > margin) & (distance >= ALIGNED_COINCIDE * h))
        searched.append(int(len(rows)))
        if not len(rows):
            break
        d = distance[rows]
        rs = 1.0 / np.maximum(PRODUCT_SPATIAL, spatial * d / h)    # 1 / spatial scale, in 1 / h
        win = np.maximum(2.0 * h, window * d)
        Qt_a = np.hstack([Qt[rows], here[rows] / h])
        Qs_a = np.hstack([Qs, F / h])
        k_n = min(neighbours, source.n_vertices)
        if tree is None:
            tree, inc = cKDTree(F), incident_triangles(faces, source.n_vertices)
        dist, cand = tree.query(here[rows], k=k_n)
        chunk = int(max(64, min(4000, 2e7 // (k_n * Qt_a.shape[1]))))   # at most ~160 MB of differences
        cost = np.where(dist <= win[:, None], _row_distances(Qt_a, Qs_a, cand, chunk=chunk, row_scale=rs), np.inf)
        cost[:, 0] = np.minimum(cost[:, 0], _row_distances(Qt_a, Qs_a, cand[:, :1], row_scale=rs)[:, 0])
        best = cand[np.arange(len(cand)), np.argmin(cost, axis=1)]
        t2, b2 = _best_on_triangles(Qt_a, Qs_a, faces, inc, best, row_scale=rs)
        dn = np.einsum("ij,ijk->ik", b2, Qs_a[faces[t2]]) - Qt_a
        dn[:, -3:] *= rs[:, None]
        go = np.einsum("ij,ij->i", dn, dn) < current[rows] - margin
        if not go.any():
            break
        tri[rows[go]], bary[rows[go]] = t2[go], b2[go]
    shift = np.linalg.norm(np.einsum("ij,ijk->ik", bary, source.vertices[faces[tri]]) - start, axis=1)
    moved = shift > 0
    vertex = faces[tri, np.argmax(bary, axis=1)]
    return tri, bary, vertex, info, {
        "passes": len(searched), "searched": searched, "moved": int(moved.sum()),
        "median_move_over_h": float(np.median(shift[moved]) / h) if moved.any() else 0.0}


def _row_distances(Qt, Qs, cand, chunk=4000, row_scale=None):
    """Squared distances from each row of ``Qt`` to its candidate rows of ``Qs``;
    with ``row_scale`` the differences in the last three columns of row ``i``
    are multiplied by ``row_scale[i]`` first."""
    out = np.empty(cand.shape)
    for s in range(0, len(cand), chunk):
        c = cand[s:s + chunk]
        diff = Qs[c] - Qt[s:s + chunk, None, :]
        if row_scale is not None:
            diff[..., -3:] *= row_scale[s:s + chunk, None, None]
        out[s:s + chunk] = np.einsum("ijk,ijk->ij", diff, diff)
    return out


def _best_on_triangles(Qt, Qs, faces, inc, best, chunk=4000, row_scale=None):
    """Best point on the triangles around ``best`` for each target row, by least squares on the simplex
    (``row_scale`` as in :func:`_row_distances`)."""
    n = len(best)
    tri_out = np.empty(n, np.int64)
    w_out = np.empty((n, 3))
    for s in range(0, n, chunk):
        b = best[s:s + chunk]
        q = Qt[s:s + chunk]
        T = inc[b]                                   # (c, d) triangles, -1 padded
        valid = T >= 0
        T = np.where(valid, T, T[:, :1])
        F = faces[T]                                 # (c, d, 3)
        P = Qs[F]                                    # (c, d, 3, r)
        if row_scale is not None:
            q = q.copy()
            q[:, -3:] *= row_scale[s:s + chunk, None]
            P[..., -3:] *= row_scale[s:s + chunk, None, None, None]
        Gm = np.einsum("cdir,cdjr->cdij", P, P)      # corner Gram
        sv = np.einsum("cdir,cr->cdi", P, q)
        w, val = _simplex_qp(Gm, sv)
        val = np.where(valid, val, np.inf)
        j = np.argmin(val, axis=1)
        rows = np.arange(len(b))
        tri_out[s:s + chunk] = T[rows, j]
        w_out[s:s + chunk] = w[rows, j]
    return tri_out, w_out


def _simplex_qp(G, s):
    """Minimise ``w^T G w - 2 w^T s`` over the probability simplex in 3 variables."""
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


def _align_refine(source, target, tri, bary, steps, lm=None, rows=None, *, iterations=3, normal_min=0.5,
                  backward=True, similar=True, landmark_weight=1.0, map_solves=2):
    """Deform the source onto the target, starting from the spectral map, then closest points.

    A non-rigid ICP with an as-similar-as-possible regulariser. Each solve is

    ``min_X  sum_j m_j |Pi_j X - y_j|^2  +  sum_i m'_i |X_i - q_i|^2  +  W sum_l |X_a(l) - y_b(l)|^2
    + r^2 A_t sum_i sum_(j~i) w_ij |(X_i - X_j) - s_i R_i (S_i - S_j)|^2``

    over the deformed source vertices ``X``, with

    - forward pairs: target vertex ``y_j`` and its point ``Pi_j X`` on the
      deformed source (weight its mass ``m_j``);
    - backward pairs: source vertex ``X_i`` and its foot ``q_i`` on the
      tangent plane of its nearest target vertex (weight its mass ``m'_i`` in
      target units), so that parts of the source no target vertex picks are
      still pulled onto the target;
    - the landmarks, together as heavy as the whole surface
      (``W = landmark_weight * A_t / n_landmarks`` each);
    - the regulariser, with the source's cotangent weights ``w_ij`` and rest
      positions ``S`` and per vertex a rotation ``R_i`` and scale ``s_i``
      fitted to the current ``X`` (the local step of as-rigid-as-possible
      deformation, plus a scale). ``r`` is the smoothing length as a fraction
      of ``sqrt(A_t)``.

    Pairs of either direction whose normals disagree (cosine below
    ``normal_min``) are dropped; the landmarks and the spectral map's pairs
    are always kept. The source starts from a thin-plate-spline warp through
    the landmarks (four or more; ``scipy.interpolate.RBFInterpolator``) and an
    affine fit of the spectral map; ``map_solves`` solves at the first
    smoothing length fit the spectral map's pairs (``tri, bary`` for target
    vertices ``rows``; one factorisation, the rotations refitted between
    solves), then ``iterations`` solves per smoothing length, each with the
    pairs of the last deformed source (found by a cheap closest-point
    search, :func:`_near_closest`; the final map uses the full search).

    Measured on the ground-truth pairs of benchmarks/transfer_accuracy.py,
    colour RMSE / mask error / map error for creature-pose,
    creature-proportion, elephant-bent, elephant-proportion (the rigid pairs
    creature-rigid and cow-rigid stay exactly 0 / 0 / 0 in every variant
    except the one without the scale):

    - this default: 0.0328/0.0137/0.0157, 0.0507/0.0234/0.0280,
      0.0182/0.0025/0.0079, 0.0199/0.0086/0.0092; the landmark warp + closest
      point baseline: 0.069/0.021/0.031, 0.087/0.015/0.045, 0.043/0.011/0.015,
      0.0385/0.0108/0.0139.
    - previous default (displacement ``D`` of the current source smoothed by
      ``r^2 D^T L D``, forward pairs only, one solve per length 0.05, 0.02,
      0.01): 0.0454/0.0275/0.0226, 0.0560/0.0467/0.0322,
      0.0298/0.0065/0.0109, 0.0376/0.0137/0.0166. Pulled along by the spectral
      map, which is poor on elephant-proportion (0.035 map error alone), it
      ended worse than the landmark warp there.
    - rotations without the scale (as rigid as possible): creature-rigid and
      cow-rigid no longer exact (map error 0.006 and 0.014: the target is
      scaled 1.7 times), creature-pose 0.0378/0.0206/0.0177.
    - no backward pairs: elephant-proportion 0.0215/0.0137/0.0099 (mask worse
      than the baseline), creature-proportion 0.0494/0.0234/0.0269 (better).
    - no landmark term: creature-pose 0.0434/0.0223/0.0219,
      creature-proportion 0.0618/0.0412/0.0348; ten times heavier: within
      0.0007 of the default everywhere.
    - no normal test: within 0.0003 colour RMSE of the default on all four
      (kept as a guard against pairs across thin parts, common practice).
    - ``map_solves`` 1 / 3: 0.0345, 0.0518, 0.0178, 0.0194 / 0.0325, 0.0503,
      0.0186, 0.0202 colour RMSE; on the 30k-vertex creature-pose of
      benchmarks/transfer_speed.py, whose landmark warp is poor (map error
      0.095), map error 0.0217 / 0.0167 (default) / 0.0157 (previous default
      0.0210).
    - ``iterations`` 1 / 2 / 5: elephant-proportion 0.0248/0.0123/0.0113,
      0.0216/0.0101/0.0099, 0.0183/0.0090/0.0085 (5 costs two thirds more
      time); lengths (0.05, 0.02, 0.01): elephant-proportion
      0.0248/0.0119/0.0110; starting at 0.2: creature-pose map error 0.0181,
      elephant-proportion mask 0.0126; without 0.005: within 0.0008.

    Returns
    -------
    triangle, barycentric for every target vertex; the deformed source (n_s, 3).
    """
    import scipy.sparse as sp
    n_s = source.n_vertices
    Y, m_t = target.vertices, target.mass
    A_t = target.area
    X = source.vertices.copy()
    if lm is not None and len(lm[0]) >= 4:
        from scipy.interpolate import RBFInterpolator
        try:
            X = RBFInterpolator(X[lm[0]], Y[lm[1]], kernel="thin_plate_spline", degree=1)(X)
        except (np.linalg.LinAlgError, ValueError):   # degenerate landmark layout: keep the identity
            X = source.vertices.copy()
    # first pairs: the spectral map (possibly on a sample of target vertices)
    y = Y if rows is None else Y[rows]
    w = m_t if rows is None else m_t[rows] * (target.n_vertices / len(rows))
    Pi = _barycentric_matrix(source.faces, tri, bary, n_s)
    ph = np.hstack([Pi @ X, np.ones((len(y), 1))])
    sw = np.sqrt(w)[:, None]
    A = np.linalg.lstsq(sw * ph, sw * y, rcond=None)[0]
    X = np.hstack([X, np.ones((n_s, 1))]) @ A
    L = source.stiffness.tocsr()
    arap = _SimilarityFit(L, source.vertices, scale=similar)
    m_s = source.mass * (A_t / source.area)
    tree_t = cKDTree(Y)
    inc_s = incident_triangles(source.faces, n_s)
    n_t_all = vertex_normals_unchecked(Y, target.faces)
    lm_w = np.zeros(n_s)
    lm_y = np.zeros((n_s, 3))
    if lm is not None:
        W = landmark_weight * A_t / len(lm[0])
        np.add.at(lm_w, lm[0], W)
        np.add.at(lm_y, lm[0], W * Y[lm[1]])
    # fit to the spectral map: the pairs stay fixed, so one factorisation serves every solve
    lam = steps[0] * steps[0] * A_t
    PtW = Pi.T.multiply(w[None, :]).tocsr()
    H = (PtW @ Pi + lam * L + sp.diags(lm_w)).tocsc()
    eps = 1e-9 * H.diagonal().mean()      # a tiny pull toward the current X keeps H definite, unbiased
    solve = _spd_factor(H + sp.diags(np.full(n_s, eps))).solve
    b = PtW @ y + lm_y
    for _ in range(map_solves):
        X = solve(np.asarray(b + lam * arap.rhs(X) + eps * X))
    for r in steps:
        lam = r * r * A_t
        for _ in range(iterations):
            # forward pairs: every target vertex onto the deformed source
            f_tri, f_bary, _ = _near_closest(X, source.faces, inc_s, Y)
            n_x = vertex_normals_unchecked(X, source.faces)
            ns = np.einsum("ij,ijk->ik", f_bary, n_x[source.faces[f_tri]])
            w = m_t * (np.einsum("ij,ij->i", ns, n_t_all) >= normal_min * np.linalg.norm(ns, axis=1))
            Pi = _barycentric_matrix(source.faces, f_tri, f_bary, n_s)
            if backward:
                # backward pairs: each source vertex onto the tangent plane of its nearest target vertex
                _, j = tree_t.query(X, workers=-1)
                nq = n_t_all[j]
                back_q = X - np.einsum("ij,ij->i", X - Y[j], nq)[:, None] * nq
                back_w = m_s * (np.einsum("ij,ij->i", n_x, nq) >= normal_min)
            else:
                back_w, back_q = np.zeros(n_s), np.zeros((n_s, 3))
            PtW = Pi.T.multiply(w[None, :]).tocsr()
            H = (PtW @ Pi + lam * L + sp.diags(back_w + lm_w)).tocsc()
            eps = 1e-9 * H.diagonal().mean()
            rhs = PtW @ Y + back_w[:, None] * back_q + lm_y + lam * arap.rhs(X) + eps * X
            X = _spd_factor(H + sp.diags(np.full(n_s, eps))).solve(np.asarray(rhs))
    cp = SurfaceLocator(X, source.faces).closest(Y)
    return cp.triangle, cp.barycentric, X


def _near_closest(vertices, faces, incident, query, centroids=2):
    """Closest points among the triangles around each query's nearest vertex and
    its ``centroids`` nearest triangle centroids (no padded candidates): the
    cheap search used between solves of :func:`_align_refine`.

    Returns
    -------
    triangle (q,), barycentric (q, 3), points (q, 3)
    """
    _, vi = cKDTree(vertices).query(query, workers=-1)
    _, ti = cKDTree(vertices[faces].mean(axis=1)).query(query, k=centroids, workers=-1)
    cand = np.concatenate([incident[vi], ti.reshape(len(query), -1)], axis=1)
    qi, ci = np.nonzero(cand >= 0)
    t = cand[qi, ci]
    f = faces[t]
    w, pts = closest_points_on_triangles(query[qi], vertices[f[:, 0]], vertices[f[:, 1]], vertices[f[:, 2]])
    d = np.einsum("ij,ij->i", pts - query[qi], pts - query[qi])
    # the best candidate of each query, the first of its candidates on ties
    # (a padded table and argmin: 5 ms where a lexsort took 40-60 ms)
    D = np.full(cand.shape, np.inf)
    D[qi, ci] = d
    at = np.full(cand.shape, -1)
    at[qi, ci] = np.arange(len(qi))
    first = at[np.arange(len(query)), np.argmin(D, axis=1)]
    return t[first], w[first], pts[first]


def _spd_factor(H):
    """Sparse LU of a symmetric positive definite matrix: minimum-degree ordering
    of ``H + H^T`` and diagonal pivots (at 30k vertices about 0.15-0.2 s, against
    0.5-2.4 s with SuperLU's default threshold pivoting, measured)."""
    import scipy.sparse.linalg as spla
    return spla.splu(H.tocsc(), permc_spec="MMD_AT_PLUS_A", diag_pivot_thresh=0.0, options={"SymmetricMode": True})


def _barycentric_matrix(faces, tri, bary, n):
    """Sparse ``(len(tri), n)`` matrix taking vertex values to the points
    ``bary`` on triangles ``tri``."""
    import scipy.sparse as sp
    n_q = len(tri)
    return sp.csr_matrix((bary.ravel(), (np.repeat(np.arange(n_q), 3), faces[tri].ravel())), shape=(n_q, n))


class _SimilarityFit:
    """Local step of an as-similar-as-possible energy on the edges of ``L``.

    For the current positions ``X`` each vertex ``i`` gets the rotation
    ``R_i`` and scale ``s_i`` that best carry its rest edges ``S_i - S_j`` onto
    ``X_i - X_j`` (weights ``w_ij = -L_ij``; the rotation from the SVD of the
    weighted edge covariance, reflections excluded). :meth:`rhs` returns
    ``b_i = sum_j w_ij (s_i R_i + s_j R_j) (S_i - S_j) / 2``, so that the global
    step ``L X = b`` minimises the energy for fixed rotations and scales.
    """

    def __init__(self, L, rest, *, scale=True):
        self.scale = scale
        C = L.tocoo()
        off = C.row != C.col
        self.i, self.j, self.w = C.row[off], C.col[off], -C.data[off]
        self.e0 = rest[self.i] - rest[self.j]
        self.n = len(rest)
        self.norm = np.bincount(self.i, weights=self.w * np.einsum("ij,ij->i", self.e0, self.e0), minlength=self.n)

    def rhs(self, X):
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
        T = (U @ Vt) * scale[:, None, None]
        Te = np.einsum("kab,kb->ka", T[i] + T[j], e0) * (0.5 * w)[:, None]
        return np.column_stack([np.bincount(i, weights=Te[:, a], minlength=n) for a in range(3)])


def _coverage(source, points, radius):
    """Fraction of source area within ``radius`` of some mapped point."""
    d, _ = cKDTree(points).query(source.vertices, workers=-1)
    return float(source.mass[d <= radius].sum() / source.area)
