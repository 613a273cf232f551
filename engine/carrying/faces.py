"""Face-domain values (material index, face sets, smooth/flat flags, ...).

A face value is constant over its face, so it is never blended: each target
face takes the value of one source face, the one under the target face's
centre. The centre is found through the pair's correspondence: the mapped
points of the face's corners are averaged and projected onto the source
surface (the closest point), whose triangle names the source polygon.

Why the centre and not a majority vote of the corners: a corner is a vertex,
which on a region border is shared by faces of every region that meets there,
so its mapped point lies on the border and names either side by chance (on a
copy with the same topology, every corner of a face along a border sits on
it). The centre of a face lies inside the face, so it lands inside one source
face: on a copy with the same topology the result is exact, and on a
remeshed copy each target face takes the region that covers its middle.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, cast

import numpy as np
from numpy.typing import ArrayLike, NDArray

from ..matching.closest_point import SurfaceLocator

__all__ = ["FaceHits", "polygon_arrays", "faces_under_centres", "carry_faces"]


@dataclass(frozen=True)
class FaceHits:
    """Where the centre of every target face lands on the source.

    Attributes
    ----------
    triangle : (f_t,) int64
        Source triangle (index into ``source.faces``) under each centre.
    polygon : (f_t,) int64
        The source polygon that triangle belongs to.
    mapped : (n_t_original, 3) float64
        Every target vertex's mapped point on the source.
    """

    triangle: NDArray[np.int64]
    polygon: NDArray[np.int64]
    mapped: NDArray[np.float64]


def polygon_arrays(corner_verts: ArrayLike, face_sizes: ArrayLike) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
    """Checked ``(corner_verts, face_sizes)`` as int64; the sizes must add up to the corners."""
    cv = np.asarray(corner_verts, dtype=np.int64)
    sizes = np.asarray(face_sizes, dtype=np.int64)
    if cv.ndim != 1 or sizes.ndim != 1 or sizes.sum() != len(cv) or (sizes < 1).any():
        raise ValueError("face sizes do not add up to the corner counts")
    return cv, sizes


def faces_under_centres(pair: Any, target_corner_verts: ArrayLike, target_face_sizes: ArrayLike) -> FaceHits:
    """The source triangle and polygon under the centre of every target face.

    Parameters
    ----------
    pair : engine.jobs.pair.Pair
        Its target was built from these polygons; its source from polygons
        whose indices the result's ``polygon`` refers to.
    target_corner_verts, target_face_sizes : int arrays, the target polygons
    """
    S, T = pair.source, pair.target
    t_cv, t_sizes = polygon_arrays(target_corner_verts, target_face_sizes)
    if len(t_cv) and (t_cv.min() < 0 or t_cv.max() >= T.n_original):
        raise ValueError("target corners refer to vertices the target does not have")
    mapped = np.asarray(T.restore(cast(Any, pair.correspondence).points()), dtype=np.float64)
    faces = np.repeat(np.arange(len(t_sizes)), t_sizes)
    centres = np.zeros((len(t_sizes), 3))
    np.add.at(centres, faces, mapped[t_cv])
    centres /= t_sizes[:, None]
    hit = SurfaceLocator(S.vertices, S.faces).closest(centres)
    triangle = np.asarray(hit.triangle, dtype=np.int64)
    polygon = np.asarray(S.prepared.tri_polygon, dtype=np.int64)[triangle]
    return FaceHits(triangle, polygon, mapped)


def carry_faces(hits: FaceHits, name: str, values: ArrayLike, n_source_faces: int) -> NDArray[Any]:
    """One face value per target face: the source face's under its centre, never blended.

    Parameters
    ----------
    hits : FaceHits
        From :func:`faces_under_centres`.
    name : str
    values : (f_s,) or (f_s, c) array of any dtype, one row per source polygon
    n_source_faces : int

    Returns
    -------
    (f_t, ...) array of the same dtype
    """
    a = np.asarray(values)
    if a.ndim == 0 or a.shape[0] != n_source_faces:
        raise ValueError(f"face values {name!r} must have one row per source face ({n_source_faces}), "
                         f"got shape {a.shape}")
    if np.issubdtype(a.dtype, np.floating) and not np.isfinite(a).all():
        raise ValueError(f"face values {name!r} hold a non-finite value")
    if len(hits.polygon) and hits.polygon.max() >= n_source_faces:
        raise ValueError(f"face values {name!r}: the source has more polygons than values")
    return a[hits.polygon]
