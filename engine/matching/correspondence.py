"""Where each target vertex lies on the source surface.

:func:`correspond` answers, for every target vertex, a source triangle and
barycentric weights. Two ways there:

aligned
    The meshes overlap in space: closest points on the source triangles,
    kept as they are where the two surfaces coincide and checked in the
    product embedding where they differ (:mod:`engine.matching.aligned`).
intrinsic
    Pose, placement and scale differ: a functional map from spectral
    descriptors and landmarks, refined by ZoomOut, then the source deformed
    onto the target by a non-rigid ICP, then a search in the product
    embedding (:mod:`engine.matching.intrinsic`).

``match="auto"`` measures the overlap: the fraction of target vertices within
``overlap_radius`` mean edge lengths of the source surface and of source
vertices within as much of the target; both at least ``overlap_threshold``
picks aligned.

A mesh over :data:`~engine.matching.standin.STANDIN_ABOVE` vertices is
matched through a simplified stand-in and the map lifted to full resolution
(:mod:`engine.matching.standin`), so a sculpt's cost hardly grows with its
vertex count.

Confidence per target vertex starts from the round-trip agreement: target
vertex -> source point -> (reverse map: closest points from the (deformed)
source onto the target, or the spectral embedding without alignment) ->
target vertex; ``exp(-(d / 4h)^2)`` with ``d`` the distance between start and
end and ``h`` the coarser mesh's mean edge length (1 is a perfect round trip,
0.5 about 3.3 edge lengths off). :func:`correspond` multiplies in the checks
of :mod:`engine.matching.confidence` and, in auto mode, checks an aligned
answer against the intrinsic one; meshes of several pieces are paired piece
by piece (:mod:`engine.matching.pieces`).

Accuracy of each mode and of each choice behind the defaults:
docs/measurements.md, "Correspondence and transfer accuracy".
"""

from __future__ import annotations

import time
import weakref
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.spatial import cKDTree

from ..common.progress import MATCHING, REFINING, SIMPLIFYING, STANDIN_STAGES, skip, stage
from ..spectra.shape import Shape
from .aligned import match_aligned, surface_locator
from .closest_point import SurfaceLocator, barycentric_matrix
from .confidence import checked_auto, with_confidence
from .embedding import ProductSettings
from .intrinsic import match_intrinsic, through_coarse_basis
from .modes import MatchOptions, ModeResult
from .pieces import correspond_in_pieces
from .standin import STANDIN_ABOVE, StandIn, lift_map, make_standin, needs_standin, standin_landmarks

__all__ = ["Correspondence", "correspond", "correspond_surface", "MatchOptions", "MATCHES"]

MATCHES = ("auto", "aligned", "intrinsic")

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.int64]


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
        Functional map, source eigen-coefficients -> target eigen-coefficients
        (of the stand-ins when matched through them; empty, (0, 0), in aligned mode).
    stats : dict
        JSON-able: overlap, coverage of source area, consistency, sizes and
        ranks, timings, cache hits.
    """

    source: Shape
    target: Shape
    mode: str
    reason: str
    triangle: IntArray
    barycentric: FloatArray
    confidence: FloatArray
    fmap: FloatArray
    stats: dict[str, Any] = field(default_factory=dict)

    def matrix(self) -> Any:
        """The pull-back as a sparse ``(n_t_clean, n_s_clean)`` matrix of barycentric weights."""
        return barycentric_matrix(self.source.faces, self.triangle, self.barycentric, self.source.n_vertices)

    def points(self) -> FloatArray:
        """(n_t, 3) mapped points on the source surface (source coordinates)."""
        out: FloatArray = np.einsum("ij,ijk->ik", self.barycentric, self.source.vertices[self.source.faces[self.triangle]])
        return out

    def pull(self, source_values: ArrayLike) -> NDArray[Any]:
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

    def pull_labels(self, labels: ArrayLike) -> NDArray[Any]:
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

    def report(self) -> dict[str, Any]:
        """JSON-able summary: mode and reason plus :attr:`stats`."""
        return {"mode": self.mode, "reason": self.reason, **self.stats}


def _check_values(values: ArrayLike, n: int, what: str) -> NDArray[Any]:
    a = np.asarray(values)
    if a.ndim == 0 or a.shape[0] != n:
        raise ValueError(f"{what} must have one row per source vertex ({n}), got shape {a.shape}")
    if not (np.issubdtype(a.dtype, np.number) or a.dtype == bool):
        raise ValueError(f"{what} must be numeric, got dtype {a.dtype}")
    if not np.isfinite(a).all():
        raise ValueError(f"{what} contain {int((~np.isfinite(a)).sum())} non-finite entries")
    return a


def correspond(source: Shape, target: Shape, *, match: str = "auto", landmarks: ArrayLike | None = None,
               refine: bool | None = None, options: MatchOptions | None = None,
               pieces: bool = True) -> Correspondence:
    """Correspondence from every target vertex to the source surface.

    Parameters
    ----------
    source, target : Shape
    match : {"auto", "aligned", "intrinsic"}
    landmarks : list of (source_vertex, target_vertex), optional
        Original vertex indices known to correspond.
    refine : bool, optional
        Intrinsic mode: final point map by nearest neighbours in the product
        embedding augmented with the position in the map's frame. Aligned
        mode: the closest points checked in that embedding. ``None``
        (default): always in intrinsic mode, in aligned mode where the
        surfaces differ; ``True``: always; ``False``: never.
    options : MatchOptions, optional
        Sizes and weights (defaults: :class:`MatchOptions`).
    pieces : bool
        When either mesh has several connected pieces, pair the pieces and
        map each onto its counterpart (:mod:`engine.matching.pieces`);
        False matches each mesh as one surface.

    Returns
    -------
    Correspondence
        Its confidence is the round trip times the checks of
        :mod:`engine.matching.confidence`; ``stats["confidence"]`` summarises
        it (with a ``warning`` sentence, empty when nothing is doubtful), and
        ``stats["pieces"]`` describes the pieces and their counterparts.
    """
    if not isinstance(source, Shape) or not isinstance(target, Shape):
        raise ValueError("source and target must be Shape objects")
    if match not in MATCHES:
        raise ValueError(f"unknown match {match!r}; expected one of {', '.join(MATCHES)}")
    opts = MatchOptions() if options is None else options
    if not (needs_standin(source) or needs_standin(target)):
        skip(*STANDIN_STAGES)   # progress (engine/common/progress.py): matched as they are
    if pieces and (source.prepared.n_components > 1 or target.prepared.n_components > 1):
        return correspond_in_pieces(source, target, lambda s, t, lm: _checked(s, t, match, lm, refine, opts),
                                    landmarks=landmarks, match=match)
    return _checked(source, target, match, landmarks, refine, opts)


def _checked(source: Shape, target: Shape, match: str, landmarks: ArrayLike | None, refine: bool | None,
             opts: MatchOptions) -> Correspondence:
    """One surface each: :func:`correspond_surface` with the checked confidence and the self-check
    of an aligned answer (auto mode may switch; asked-for aligned mode keeps it, its confidence
    lowered where the intrinsic answer disagrees); done on the stand-ins when matched through them."""
    c = correspond_surface(source, target, match, landmarks, refine, opts)
    if "standin" in c.stats:
        return c
    c = with_confidence(c)
    if match in ("auto", "aligned") and c.mode == "aligned":
        c = checked_auto(c, lambda: with_confidence(correspond_surface(source, target, "intrinsic", landmarks,
                                                                       refine, opts)), forced=match == "aligned")
    return c


def correspond_surface(source: Shape, target: Shape, match: str, landmarks: ArrayLike | None,
                       refine: bool | None, opts: MatchOptions) -> Correspondence:
    """The correspondence of one mode (or the overlap's choice), each mesh as one surface,
    with the round-trip confidence only (no checks, no self-check, no pieces)."""
    lm = _check_landmarks(landmarks, source, target)
    t0 = time.perf_counter()
    if needs_standin(source) or needs_standin(target):
        stage(SIMPLIFYING)
    src, tgt = make_standin(source), make_standin(target)
    if src.simplified or tgt.simplified:
        return _through_standins(src, tgt, match, lm, refine, opts, time.perf_counter() - t0)
    stage(MATCHING)
    if src.missing or tgt.missing:
        skip(REFINING)
    slow = (f"; matched at full resolution, much more slowly: a mesh over {STANDIN_ABOVE} vertices is "
            "matched through a simplified copy, which needs the 'fast-simplification' package (not installed)"
            if src.missing or tgt.missing else "")
    loc_s, loc_t = surface_locator(source), surface_locator(target)
    h = max(source.mean_edge, target.mean_edge)
    frac_t, frac_s = _overlap(loc_s, loc_t, source, target, opts.overlap_radius * h)
    overlap = min(frac_t, frac_s)
    overlap_time = time.perf_counter() - t0
    if match == "auto":
        mode = "aligned" if overlap >= opts.overlap_threshold else "intrinsic"
        reason = (f"auto: {frac_t:.0%} of target vertices and {frac_s:.0%} of source vertices lie within "
                  f"{opts.overlap_radius:g} mean edge lengths of the other surface "
                  f"({'>=' if mode == 'aligned' else '<'} {opts.overlap_threshold:.0%}): {mode}")
    else:
        mode = match
        reason = f"requested {mode} (measured overlap {overlap:.0%})"
    if mode == "aligned":
        # the self-check's intrinsic match (auto or aligned asked for) solves this target basis too
        ahead = through_coarse_basis(source, target, opts) if match in ("auto", "aligned") else 0
        result = match_aligned(source, target, (loc_s, loc_t), h, refine,
                               ProductSettings(opts.product_K, opts.product_order), ahead)
        reason = f"{reason}; {result.why}"
    else:
        result = match_intrinsic(source, target, lm, opts, refine, h)
    reason += slow
    result.timings = {"overlap": overlap_time, **result.timings}
    stats: dict[str, Any] = {"overlap": {"target_near_source": frac_t, "source_near_target": frac_s},
                             **result.stats}
    return _finish(source, target, mode, reason, result, stats, 0 if lm is None else len(lm[0]))


def _through_standins(source: StandIn, target: StandIn, match: str, landmarks: tuple[IntArray, IntArray] | None,
                      refine: bool | None, options: MatchOptions, simplify_time: float) -> Correspondence:
    """Match the stand-ins (:mod:`engine.matching.standin`), then lift the map to the full meshes."""
    coarse = _checked(source.coarse, target.coarse, match, standin_landmarks(landmarks, source, target),
                      refine, options)
    t0 = time.perf_counter()
    stage(REFINING)
    lifted = lift_map(source, target, coarse.points(), coarse.confidence, coarse.mode == "aligned")
    stats = dict(coarse.stats)
    stats["timings"] = {"simplify": round(simplify_time, 4), **stats.get("timings", {}),
                        "lift": round(time.perf_counter() - t0, 4)}
    stats["sizes"] = {**stats.get("sizes", {}), "source_vertices": source.full.n_vertices,
                      "target_vertices": target.full.n_vertices}
    stats["standin"] = lifted.stats
    reason = (f"{coarse.reason}; matched through stand-ins of {source.coarse.n_vertices} source and "
              f"{target.coarse.n_vertices} target vertices, lifted to full resolution")
    return Correspondence(source.full, target.full, coarse.mode, reason, lifted.triangle, lifted.barycentric,
                          lifted.confidence, coarse.fmap, stats)


def _finish(source: Shape, target: Shape, mode: str, reason: str, result: ModeResult, stats: dict[str, Any],
            n_landmarks: int) -> Correspondence:
    """The final functional map (intrinsic mode only), the round-trip confidence and the statistics."""
    tri, bary = result.triangle, result.barycentric
    C = np.zeros((0, 0))
    if mode == "intrinsic":
        # functional map of the final point map (unit-area bases); aligned mode
        # has no use for one and skips the two eigenbases
        kf = int(min(result.basis_size, source.n_vertices - 1, target.n_vertices - 1))
        _, ps = source.normalised_basis(kf)
        _, pt = target.normalised_basis(kf)
        mt = target.mass / target.area
        pulled = np.einsum("ij,ijk->ik", bary, ps[source.faces[tri]])
        C = pt.T @ (mt[:, None] * pulled)
    # confidence and consistency: round trip through the reverse map
    t0 = time.perf_counter()
    end = result.back[result.vertex]
    d = np.linalg.norm(target.vertices[end] - target.vertices, axis=1)
    conf = np.exp(-(d / (4 * max(source.mean_edge, target.mean_edge))) ** 2)   # in the coarser mesh's edges
    coverage = _coverage(source, np.einsum("ij,ijk->ik", bary, source.vertices[source.faces[tri]]),
                         2 * max(source.mean_edge, target.mean_edge * np.sqrt(source.area / target.area)))
    timings = {**result.timings, "confidence": time.perf_counter() - t0}
    stats.update({
        "coverage_of_source_area": coverage,
        "consistency": {"median_round_trip_over_sqrt_area": float(np.median(d) / np.sqrt(target.area)),
                        "within_2_edges": float(np.mean(d < 2 * target.mean_edge)),
                        "mean_confidence": float(conf.mean())},
        "sizes": {"source_vertices": source.n_vertices, "target_vertices": target.n_vertices,
                  "fmap": list(C.shape), "landmarks": n_landmarks, **result.sizes},
        "timings": {k_: round(v, 4) for k_, v in timings.items()},
        "cache_hits": {"source": dict(source.hits), "target": dict(target.hits)},
    })
    return Correspondence(source, target, mode, reason, tri.astype(np.int64), bary, conf, C, stats)


OVERLAP_SAMPLE = 4000
"""Vertices per side that measure the overlap: a fraction, which a fixed random
sample of this size gives to about +-1% (binomial)."""


_OVERLAPS: weakref.WeakKeyDictionary[Shape, weakref.WeakKeyDictionary[Shape, dict[float, tuple[float, float]]]] = \
    weakref.WeakKeyDictionary()


def _overlap(loc_s: SurfaceLocator, loc_t: SurfaceLocator, source: Shape, target: Shape,
             radius: float) -> tuple[float, float]:
    """Fractions of target vertices within ``radius`` of the source surface and of source vertices of the target,
    measured once per pair of shapes and radius while both live (the self-check asks again)."""
    kept = _OVERLAPS.setdefault(source, weakref.WeakKeyDictionary()).setdefault(target, {})
    if radius not in kept:
        sample_t = _overlap_sample(target.n_vertices)
        sample_s = _overlap_sample(source.n_vertices)
        kept[radius] = (float(np.mean(loc_s.within(target.vertices[sample_t], radius))),
                        float(np.mean(loc_t.within(source.vertices[sample_s], radius))))
    return kept[radius]


def _overlap_sample(n: int) -> IntArray:
    """Vertex indices used to measure overlap: all of them, or a fixed random sample."""
    if n <= OVERLAP_SAMPLE:
        return np.arange(n)
    return np.sort(np.random.default_rng(0).choice(n, OVERLAP_SAMPLE, replace=False))


def _check_landmarks(landmarks: ArrayLike | None, source: Shape,
                     target: Shape) -> tuple[IntArray, IntArray] | None:
    if landmarks is None or len(landmarks) == 0:    # type: ignore[arg-type]
        return None
    a = np.asarray(landmarks)
    if a.ndim != 2 or a.shape[1] != 2 or not np.issubdtype(a.dtype, np.integer):
        raise ValueError(f"landmarks must be a list of (source_vertex, target_vertex) integer pairs, "
                         f"got shape {a.shape} and dtype {a.dtype}")
    return source.original_index(a[:, 0]), target.original_index(a[:, 1])


def _coverage(source: Shape, points: FloatArray, radius: float) -> float:
    """Fraction of source area within ``radius`` of some mapped point."""
    d, _ = cKDTree(points).query(source.vertices, workers=-1)
    return float(source.mass[d <= radius].sum() / source.area)
