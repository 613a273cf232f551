"""Triangle geometry from edge lengths: areas, corner cotangents, lumped masses.

The plain cotangent Laplacian (:mod:`laplacian`) and the robust one
(:mod:`robust`) both work from per-triangle edge lengths, so an embedded mesh
and an intrinsic triangulation share one formula for each quantity.

Layout: ``lengths[t, c]`` is the length of the edge of triangle ``t`` opposite
its corner ``c``, i.e. of the edge ``(faces[t, c+1], faces[t, c+2])`` (indices
mod 3). Face-edge ``3t + c`` of a face array is that same edge, running from
corner ``c + 1`` to corner ``c + 2``.
"""

from __future__ import annotations

import numpy as np
from ..common.arrays import Array, ArrayLike

__all__ = ["MASS_KINDS", "face_edges", "edge_lengths", "check_lengths", "heron_areas", "cotangents_from_lengths",
           "mixed_voronoi_corners", "check_mass_kind", "lumped_mass"]

MASS_KINDS = ("barycentric", "voronoi")


def face_edges(f: Array) -> tuple[Array, Array, Array]:
    """Per face-edge (row ``3t + c``): endpoints p -> q (corners c+1 -> c+2) and the opposite vertex.

    Parameters
    ----------
    f : (m, 3) int array

    Returns
    -------
    p, q, w : (3 m,) int arrays
    """
    return f[:, [1, 2, 0]].ravel(), f[:, [2, 0, 1]].ravel(), f.ravel()


def edge_lengths(v: Array, f: Array) -> Array:
    """(m, 3) float64 array: ``[t, c]`` is the length of the edge opposite corner ``c`` of triangle ``t``."""
    p, q, _ = face_edges(f)
    return np.asarray(np.linalg.norm(v[q] - v[p], axis=1).reshape(f.shape), dtype=np.float64)


def check_lengths(lengths: ArrayLike, faces: ArrayLike) -> tuple[Array, Array]:
    """Per-triangle edge lengths and faces as float64 / int64, checked to match.

    Raises
    ------
    ValueError
        When ``lengths`` does not have the shape (m, 3) of ``faces``, or has a
        non-finite or negative entry.
    """
    lens = np.asarray(lengths, dtype=np.float64)
    f = np.asarray(faces, dtype=np.int64)
    if lens.ndim != 2 or lens.shape[1] != 3 or lens.shape != f.shape:
        raise ValueError(f"lengths must have the shape of faces (m, 3), got {lens.shape} and {f.shape}")
    if not np.isfinite(lens).all() or (lens < 0).any():
        raise ValueError("edge lengths must be finite and non-negative")
    return lens, f


def heron_areas(lengths: Array) -> Array:
    """Triangle areas from (k, 3) edge lengths: Heron's formula in Kahan's stable form.

    Sides sorted so that ``x >= y >= z``, the area is
    ``sqrt((x + (y + z)) (z - (x - y)) (z + (x - y)) (x + (y - z))) / 4``
    (W. Kahan, "Miscalculating area and angles of a needle-like triangle",
    2014). Lengths that violate the triangle inequality give area 0.
    """
    s = -np.sort(-lengths, axis=1)
    x, y, z = s[:, 0], s[:, 1], s[:, 2]
    prod = (x + (y + z)) * (z - (x - y)) * (z + (x - y)) * (x + (y - z))
    return np.asarray(0.25 * np.sqrt(np.clip(prod, 0.0, None)), dtype=np.float64)


def cotangents_from_lengths(lengths: Array, area: Array) -> Array:
    """(k, 3) cotangent of the angle at each corner, from the law of cosines.

    ``cot(angle at c) = (l_{c+1}^2 + l_{c+2}^2 - l_c^2) / (4 area)``; a triangle
    of zero area gets cotangent 0 at every corner.
    """
    sq = lengths * lengths
    num: Array = sq[:, [1, 2, 0]] + sq[:, [2, 0, 1]] - sq
    pos = area > 0
    denom = np.where(pos, 4.0 * area, 1.0)[:, None]
    return np.asarray(np.where(pos[:, None], num / denom, 0.0), dtype=np.float64)


def mixed_voronoi_corners(lengths: Array, area: Array, cot: Array) -> Array:
    """(k, 3) mixed Voronoi area of each corner (Meyer, Desbrun, Schroeder and Barr 2003).

    In a triangle without an obtuse angle corner ``c`` gets its Voronoi area
    ``(l_b^2 cot b + l_d^2 cot d) / 8`` (``b``, ``d`` the other two corners,
    whose opposite edges meet at ``c``); in an obtuse triangle the obtuse
    corner gets half the area and the others a quarter each.
    """
    sq = lengths * lengths
    weighted = sq * cot
    vor = (weighted[:, [1, 2, 0]] + weighted[:, [2, 0, 1]]) / 8.0
    obtuse = cot < 0
    split = np.where(obtuse, area[:, None] / 2.0, area[:, None] / 4.0)
    return np.asarray(np.where(obtuse.any(axis=1)[:, None], split, vor), dtype=np.float64)


def check_mass_kind(kind: str) -> None:
    """Raise ValueError unless ``kind`` is one of :data:`MASS_KINDS`."""
    if kind not in MASS_KINDS:
        raise ValueError(f"unknown mass kind {kind!r}; expected 'barycentric' or 'voronoi'")


def lumped_mass(lengths: Array, faces: Array, n: int, kind: str = "barycentric",
                area: Array | None = None) -> Array:
    """(n,) lumped mass per vertex: sums to the total area; vertices in no triangle get 0.

    ``kind="barycentric"`` gives each corner a third of its triangle's area,
    ``kind="voronoi"`` the mixed Voronoi area (:func:`mixed_voronoi_corners`).
    ``area`` may pass the :func:`heron_areas` of ``lengths`` already computed.
    """
    check_mass_kind(kind)
    a = heron_areas(lengths) if area is None else area
    if kind == "barycentric":
        per_corner = np.repeat(a[:, None] / 3.0, 3, axis=1)
    else:
        per_corner = mixed_voronoi_corners(lengths, a, cotangents_from_lengths(lengths, a))
    return np.bincount(faces.ravel(), weights=per_corner.ravel(), minlength=n).astype(np.float64)
