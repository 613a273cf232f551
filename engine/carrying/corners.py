"""Corner-domain signals (per face corner, e.g. colours with seams).

A corner signal holds one value per face corner, so a vertex on a seam has
different values in the faces on each side. It is carried in two steps:

1. The per-vertex average goes through the pair's correspondence like any
   point signal; away from seams this is already exact, because every corner
   of a vertex holds the same value.
2. Target corners whose mapped point lands on a source triangle touching a
   seam are mapped individually: each such corner is moved a little into its
   own face (``inset`` of the way to the face centre, after mapping to the
   source), its closest source triangle is found, and the value is
   interpolated from that triangle's own corners. Each side of a seam then
   reads the source faces on its side.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from ..matching.closest_point import SurfaceLocator
from .faces import polygon_arrays
from .signals import check_signal, clamp

__all__ = ["CornerResult", "Polygons", "carry_corners", "vertex_average", "seam_vertices", "triangle_corners"]


@dataclass(frozen=True)
class CornerResult:
    """Values per target corner and the point transfer's source error."""

    values: NDArray[np.float64]
    source_error: float


def vertex_average(values: ArrayLike, corner_verts: ArrayLike, n: int) -> NDArray[np.float64]:
    """Per-vertex mean of per-corner values, (n, c)."""
    cv = np.asarray(corner_verts, dtype=np.int64)
    flat = np.asarray(values, dtype=np.float64).reshape(len(cv), -1)
    sums = np.zeros((n, flat.shape[1]))
    np.add.at(sums, cv, flat)
    counts = np.bincount(cv, minlength=n).astype(np.float64)
    average: NDArray[np.float64] = sums / np.maximum(counts, 1.0)[:, None]
    return average


def seam_vertices(values: ArrayLike, corner_verts: ArrayLike, n: int) -> NDArray[np.bool_]:
    """(n,) bool: vertices whose corners do not all carry the same value."""
    cv = np.asarray(corner_verts, dtype=np.int64)
    rows = np.ascontiguousarray(np.asarray(values).reshape(len(cv), -1))
    first = np.full(n, -1, dtype=np.int64)
    order = np.arange(len(cv))[::-1]
    first[cv[order]] = order  # lowest corner index of each vertex
    differs = np.any(rows != rows[first[cv]], axis=1)
    seam = np.zeros(n, dtype=bool)
    seam[cv[differs]] = True
    return seam


def _corner_faces(sizes: NDArray[np.int64]) -> NDArray[np.int64]:
    return np.repeat(np.arange(len(sizes), dtype=np.int64), sizes)


def triangle_corners(shape: Any, corner_verts: NDArray[np.int64], face_sizes: NDArray[np.int64],
                     triangles: NDArray[np.int64], name: str) -> NDArray[np.int64]:
    """(q, 3) the polygon corner behind each slot of the given cleaned triangles.

    ``shape`` was built from the polygons ``corner_verts``/``face_sizes``; a
    triangle's slot is the corner of its polygon at the same vertex.
    """
    to_clean = np.asarray(shape.prepared.to_clean)
    n_clean = shape.n_vertices
    keys = _corner_faces(face_sizes) * n_clean + to_clean[corner_verts]
    order = np.argsort(keys, kind="stable")
    tri_poly = np.asarray(shape.prepared.tri_polygon)[triangles]
    slot_keys = tri_poly[:, None] * n_clean + shape.faces[triangles]
    pos = np.clip(np.searchsorted(keys[order], slot_keys), 0, len(keys) - 1)
    slot_corner: NDArray[np.int64] = order[pos]
    if not np.array_equal(keys[slot_corner], slot_keys):
        raise ValueError(f"corner signal {name!r}: source triangles do not match their polygons")
    return slot_corner


Polygons = tuple[ArrayLike, ArrayLike]
"""A mesh's polygons: ``(corner_verts, face_sizes)``, a flat corner list and corners per face."""


def carry_corners(pair: Any, name: str, values: ArrayLike, kind: str, source_polygons: Polygons,
                  target_polygons: Polygons, *, basis: str | None = None, inset: float = 0.25) -> CornerResult:
    """Carry one corner signal from ``pair.source`` to ``pair.target``.

    Parameters
    ----------
    pair : engine.jobs.pair.Pair
        Its shapes must have been built from the same polygons (corner lists
        and face sizes) as given here.
    name : str
    values : (c_source, channels) float array, one row per source corner
    kind : {"color", "weight", "float", "vector"}
    source_polygons, target_polygons : (corner_verts, face_sizes) int arrays
    basis : str, optional
        Basis for the point part (default: the pair's).
    inset : float
        How far into its face a target corner is moved before it is mapped.

    Returns
    -------
    CornerResult
        ``values`` (c_target, channels).
    """
    S, T = pair.source, pair.target
    s_cv, s_sizes = polygon_arrays(*source_polygons)
    t_cv, t_sizes = polygon_arrays(*target_polygons)
    if kind in ("label", "mask"):
        raise ValueError(f"corner signal {name!r}: labels and masks are carried per vertex, not per corner")
    vals = check_signal(name, values, len(s_cv), kind).reshape(len(s_cv), -1)
    if not 0.0 <= inset < 1.0:
        raise ValueError(f"inset must be in [0, 1), got {inset}")
    point = vertex_average(vals, s_cv, S.n_original)
    result = pair.carry({name: (point, kind)}, basis=basis)[name]
    out = np.asarray(result.values, dtype=np.float64).reshape(T.n_original, -1)[t_cv]
    seam = seam_vertices(vals, s_cv, S.n_original)
    if not seam.any():
        return CornerResult(out, float(result.source_error))
    to_clean = np.asarray(S.prepared.to_clean)
    seam_clean = np.zeros(S.n_vertices, dtype=bool)
    seam_clean[to_clean[seam & (to_clean >= 0)]] = True
    near = T.restore(seam_clean[S.faces[pair.correspondence.triangle]].any(axis=1))
    chosen = np.flatnonzero(near[t_cv])
    if chosen.size:
        out[chosen] = _corners_near_seams(pair, name, vals, kind, (s_cv, s_sizes), (t_cv, t_sizes), chosen, inset)
    return CornerResult(out, float(result.source_error))


def _corners_near_seams(pair: Any, name: str, vals: NDArray[np.float64], kind: str,
                        source: tuple[NDArray[np.int64], NDArray[np.int64]],
                        target: tuple[NDArray[np.int64], NDArray[np.int64]],
                        chosen: NDArray[np.intp], inset: float) -> NDArray[np.float64]:
    """Values of the ``chosen`` target corners from the source corner under each, moved ``inset`` into its face."""
    S, T = pair.source, pair.target
    (s_cv, s_sizes), (t_cv, t_sizes) = source, target
    mapped = T.restore(pair.correspondence.points())
    faces = _corner_faces(t_sizes)
    centroids = np.zeros((len(t_sizes), 3))
    np.add.at(centroids, faces, mapped[t_cv])
    centroids /= t_sizes[:, None]
    at = mapped[t_cv[chosen]]
    hit = SurfaceLocator(S.vertices, S.faces).closest(at + inset * (centroids[faces[chosen]] - at))
    slot_corner = triangle_corners(S, s_cv, s_sizes, hit.triangle, name)
    carried: NDArray[np.float64] = np.einsum("qj,qjc->qc", hit.barycentric, vals[slot_corner])
    return clamp(carried, kind, vals)
