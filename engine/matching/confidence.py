"""How far to trust each mapped vertex, and how to measure that trust.

The confidence of a target vertex is a product of independent checks, each
in [0, 1]:

round trip
    Target vertex -> source point -> back to the target by the reverse map;
    ``exp(-(d / 4h)^2)`` (computed by the correspondence itself).
facing
    In aligned mode, the target's vertex normal against the source's
    (blended vertex normals) at the mapped point: ``((1 + cos) / 2) ** FACING_POWER``. A copy
    turned in place maps many points onto surface facing elsewhere.
signature
    Where the shapes' eigenbases are known (intrinsic mode; in aligned mode
    when asked), the heat kernel signature of the target vertex against the
    source's at the mapped point: ``exp(-(e / SIGNATURE_SCALE)^2)`` with ``e``
    the mean absolute log ratio over the signature's times (area-normalised
    shapes, so scale does not matter). A point of a torus and a point of a
    ball, or a tail tip and a mid-body point, differ there.
intrinsic agreement
    In aligned mode asked for by name, where the surfaces do not coincide
    and auto mode would have preferred the intrinsic answer (see
    :func:`checked_auto`): the distance between the aligned and the
    intrinsic mapped points, ``exp(-(d / (AGREE_SCALE h))^2)``. A copy turned
    in place about an axis it is nearly round around passes every local
    check; only the match by shape says its points belong elsewhere.

Read by an artist: 1 means "this point found a place on the source that looks
like it from every side we checked"; about 0.5 means "one check doubts it,
look here"; near 0 means "this point's data is probably wrong". The mean over
the mesh answers "did the whole transfer work?": below :data:`POOR_MEAN` the
result is poor, and when it is poor in every mode the two meshes are probably
not the same kind of object.

:func:`separation_auc` measures how well a confidence predicts the real
error on a pair with known truth: the probability that a vertex mapped within
one mean edge length of its true partner has a higher confidence than one
mapped more than two edge lengths away (1 is perfect, 0.5 is chance).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import replace
from typing import TYPE_CHECKING, Any

import numpy as np
from numpy.typing import NDArray

from ..carrying.detail import vertex_normals_unchecked
from ..spectra.descriptors import heat_kernel_signature, heat_times
from ..spectra.shape import Shape

__all__ = ["separation_auc", "facing", "signature_agreement", "assess", "confidence_summary", "warning",
           "with_confidence", "checked_auto", "POOR_MEAN"]

if TYPE_CHECKING:
    from .correspondence import Correspondence

Array = NDArray[Any]

FACING_POWER = 2.0
"""Sharpness of the facing check: at 90 degrees it gives 0.25, opposite 0."""

SIGNATURE_SCALE = 0.1
"""Mean absolute log ratio of heat kernel signatures that lowers the signature check to 1/e."""

SIGNATURE_BASIS = 30
"""Eigenpairs used for the signatures of the check."""

SIGNATURE_TIMES = 8
"""Diffusion times of the signature check, spread over the source's (common practice) range."""

POOR_MEAN = 0.5
"""Mean confidence under which a result is called poor."""

DIFFERENT_KIND = 0.065
"""Median signature difference above which two shapes are probably not the same kind of object."""

DISAGREE = 1.0
"""Median distance, in mean edge lengths, between the aligned and the intrinsic
maps' points above which auto mode keeps the one with the higher mean confidence."""

AGREE_SCALE = 2.0
"""Distance, in mean edge lengths, between a forced aligned map's point and the intrinsic
answer's that lowers the agreement check to 1/e (2 edge lengths: the error called wrong)."""


def separation_auc(confidence: Array, error: Array, unit: float, *, good: float = 1.0,
                   bad: float = 2.0) -> float | None:
    """Area under the ROC curve of ``confidence`` separating good from bad vertices.

    Parameters
    ----------
    confidence, error : (n,) float arrays
        Per vertex: the confidence and the true map error.
    unit : float
        Length unit of the thresholds (a mean edge length).
    good, bad : float
        Good vertices have ``error <= good * unit``, bad ones ``error > bad * unit``.

    Returns
    -------
    float or None
        ``P(conf_good > conf_bad) + P(equal) / 2`` (the Mann-Whitney statistic
        over the product of the class sizes); None when a class is empty.
    """
    from scipy.stats import rankdata     # imported when needed: scipy.stats takes 0.3 s to import
    c, e = np.asarray(confidence, float), np.asarray(error, float)
    g, b = e <= good * unit, e > bad * unit
    ng, nb = int(g.sum()), int(b.sum())
    if ng == 0 or nb == 0:
        return None
    r = rankdata(np.concatenate([c[g], c[b]]))
    return float((r[:ng].sum() - ng * (ng + 1) / 2) / (ng * nb))


def facing(source_vertices: Array, source_faces: Array, triangle: Array, barycentric: Array,
           target_vertices: Array, target_faces: Array) -> Array:
    """Cosine between each target vertex normal and the source normal at its mapped point, (n_t,).

    The source normal is the barycentric blend of the source vertex normals
    (area-weighted), so a coarse mesh's facets do not count as turns.
    """
    ns = vertex_normals_unchecked(source_vertices, source_faces)
    fn = np.einsum("ij,ijk->ik", barycentric, ns[source_faces[triangle]])
    fn /= np.maximum(np.linalg.norm(fn, axis=1, keepdims=True), 1e-300)
    nt = vertex_normals_unchecked(target_vertices, target_faces)
    out: Array = np.clip(np.einsum("ij,ij->i", fn, nt), -1.0, 1.0)
    return out


def signature_agreement(source: Shape, target: Shape, triangle: Array, barycentric: Array,
                        k: int = SIGNATURE_BASIS) -> Array:
    """Mean absolute log ratio of heat kernel signatures, target vertex against mapped source point, (n_t,)."""
    kk = int(min(k, source.n_vertices - 1, target.n_vertices - 1))
    ls, ps = source.normalised_basis(kk)
    lt, pt = target.normalised_basis(kk)
    times = heat_times(ls, SIGNATURE_TIMES)      # the same times on both (area-normalised) shapes
    hs, ht = heat_kernel_signature(ls, ps, times), heat_kernel_signature(lt, pt, times)
    pulled = np.einsum("ij,ijk->ik", barycentric, hs[source.faces[triangle]])
    floor = 1e-12
    out: Array = np.abs(np.log(np.maximum(pulled, floor) / np.maximum(ht, floor))).mean(axis=1)
    return out


def assess(c: Correspondence, *, signature: bool | None = None) -> tuple[Array, dict[str, Any]]:
    """Confidence of a correspondence and its summary.

    Parameters
    ----------
    c : Correspondence
        Its ``confidence`` is taken as the round-trip check.
    signature : bool, optional
        Include the signature check; default: in intrinsic mode only.

    Returns
    -------
    confidence : (n_t,) float64 array in [0, 1]
    summary : dict
        ``mean``, ``poor`` (mean below :data:`POOR_MEAN`), ``uncertain_share``
        (fraction of vertices below 0.5) and the mean of each check.
    """
    conf = np.asarray(c.confidence, dtype=np.float64).copy()
    parts = {"round_trip": float(conf.mean())}
    summary: dict[str, Any] = {}
    if c.mode == "aligned":
        cos = facing(c.source.vertices, c.source.faces, c.triangle, c.barycentric, c.target.vertices,
                     c.target.faces)
        f = ((1.0 + cos) / 2.0) ** FACING_POWER
        conf *= f
        parts["facing"] = float(f.mean())
    if signature if signature is not None else c.mode == "intrinsic":
        e = signature_agreement(c.source, c.target, c.triangle, c.barycentric)
        s = np.exp(-(e / SIGNATURE_SCALE) ** 2)
        conf *= s
        parts["signature"] = float(s.mean())
        median = float(np.median(e))
        summary["median_signature_difference"] = round(median, 4)
        summary["different_kind"] = bool(median > DIFFERENT_KIND)
    summary.update(confidence_summary(conf))
    summary["checks"] = {k: round(v, 4) for k, v in parts.items()}
    return conf, summary


def confidence_summary(conf: Array) -> dict[str, Any]:
    """``mean``, ``poor`` (mean below :data:`POOR_MEAN`) and ``uncertain_share`` (below 0.5) of a confidence."""
    mean = float(np.mean(conf))
    return {"mean": round(mean, 4), "poor": mean < POOR_MEAN, "uncertain_share": round(float(np.mean(conf < 0.5)), 4)}


def warning(summary: dict[str, Any]) -> str:
    """One sentence for the artist when the result is doubtful, else ``""``."""
    if "intrinsic_apart_over_h" in summary:
        return (f"matched by position, but matching by shape puts the points elsewhere (a median "
                f"{summary['intrinsic_apart_over_h']:.1f} mean edge lengths away; mean confidence "
                f"{summary['mean']:.2f}): the meshes may be turned or moved; check the result or try auto")
    if summary.get("different_kind"):
        return (f"the two meshes are probably not the same kind of object (their shapes differ at "
                f"{summary['median_signature_difference']:.3f} > {DIFFERENT_KIND:g}); check the result")
    if summary.get("poor"):
        return f"poor match: mean confidence {summary['mean']:.2f} < {POOR_MEAN:g}; check the result"
    return ""


def with_confidence(c: Correspondence) -> Correspondence:
    """``c`` with the checked confidence of :func:`assess` and ``stats["confidence"]`` (plus ``warning``)."""
    conf, summary = assess(c)
    summary["warning"] = warning(summary)
    return replace(c, confidence=conf, stats={**c.stats, "confidence": summary})


def checked_auto(aligned: Correspondence, intrinsic: Callable[[], Correspondence], *,
                 forced: bool = False) -> Correspondence:
    """Auto mode's check of an aligned answer (both arguments with :func:`with_confidence` applied).

    Where the aligned surfaces coincide the closest points stand. Elsewhere
    the intrinsic answer is made too; if the two put the median target vertex
    more than :data:`DISAGREE` mean edge lengths apart, the one with the
    higher mean confidence is kept and the reason says why.

    ``forced`` (aligned mode asked for): the aligned map is always kept, but
    when the intrinsic answer would have won, each vertex's confidence is
    multiplied by its agreement with the intrinsic answer,
    ``exp(-(d / (AGREE_SCALE h))^2)`` with ``d`` the distance between the two
    mapped points, and the summary's warning says so.
    """
    checked = aligned.stats.get("aligned_refine", {})
    if checked.get("closest_distance_over_h", 0.0) < checked.get("coincide_below", np.inf):
        return aligned
    try:
        other = intrinsic()
    except (ValueError, RuntimeError, ArithmeticError, np.linalg.LinAlgError):
        if not forced:
            raise
        return aligned          # asked for aligned and the intrinsic answer cannot be made: no check
    h = max(aligned.source.mean_edge, aligned.target.mean_edge)
    d = np.linalg.norm(aligned.points() - other.points(), axis=1) / h
    apart = float(np.median(d))
    ma, mi = aligned.stats["confidence"]["mean"], other.stats["confidence"]["mean"]
    better = apart > DISAGREE and mi > ma
    keep = other if better and not forced else aligned
    why = (f"self-check: the intrinsic answer lies {apart:.2f} mean edge lengths from the aligned one "
           f"(median); mean confidence aligned {ma:.2f}, intrinsic {mi:.2f}: kept {keep.mode}")
    stats = {**keep.stats, "self_check": {"apart_over_h": round(apart, 4), "aligned_mean": ma,
                                          "intrinsic_mean": mi, "kept": keep.mode}}
    if forced and better:
        return doubted(aligned, np.exp(-(d / AGREE_SCALE) ** 2), apart, stats, why)
    first = aligned.reason.split("; ")[0]       # the overlap test's sentence
    return replace(keep, reason=f"{aligned.reason if keep is aligned else first}; {why}", stats=stats)


def doubted(aligned: Correspondence, agreement: Array, apart: float, stats: dict[str, Any],
            why: str) -> Correspondence:
    """A forced aligned answer whose confidence is lowered by its ``agreement`` with the intrinsic one."""
    conf = np.asarray(aligned.confidence, np.float64) * agreement
    old = stats.get("confidence", {})
    summary = {**old, **confidence_summary(conf), "intrinsic_apart_over_h": round(apart, 4),
               "checks": {**old.get("checks", {}), "intrinsic_agreement": round(float(agreement.mean()), 4)}}
    summary["warning"] = warning(summary)
    return replace(aligned, confidence=conf, reason=f"{aligned.reason}; {why}",
                   stats={**stats, "confidence": summary})
