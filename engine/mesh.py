"""Mesh intake: the one validator at the door, triangulation and cleaning.

Every public entry point of the engine that takes a mesh calls
:func:`validate_mesh` first.
"""

from __future__ import annotations

import numpy as np

__all__ = ["validate_mesh"]


def validate_mesh(vertices, faces) -> tuple[np.ndarray, np.ndarray]:
    """Check a triangle mesh and return it as contiguous float64 / int64 arrays.

    Parameters
    ----------
    vertices : (n, 3) float array
    faces : (m, 3) integer array
        Indices into ``vertices``.

    Returns
    -------
    vertices : (n, 3) float64 array
    faces : (m, 3) int64 array

    Raises
    ------
    ValueError
        With a message naming the problem: no vertices, no faces, a wrong
        shape or dtype, an index out of range, a non-finite coordinate.
    """
    v = np.asarray(vertices)
    f = np.asarray(faces)
    if v.dtype == object or not (np.issubdtype(v.dtype, np.floating) or np.issubdtype(v.dtype, np.integer)):
        raise ValueError(f"vertices must be a numeric array, got dtype {v.dtype}")
    if v.ndim != 2 or v.shape[1] != 3:
        raise ValueError(f"vertices must have shape (n, 3), got {v.shape}")
    if v.shape[0] == 0:
        raise ValueError("mesh has no vertices")
    if f.dtype == object or not np.issubdtype(f.dtype, np.integer):
        if f.size == 0:
            f = f.reshape(0, 3).astype(np.int64) if f.ndim == 2 or f.size == 0 else f
        else:
            raise ValueError(f"faces must be an integer array, got dtype {f.dtype}")
    if f.ndim != 2 or f.shape[1] != 3:
        raise ValueError(f"faces must have shape (m, 3) (triangles), got {f.shape}")
    if f.shape[0] == 0:
        raise ValueError("mesh has no faces")
    v = np.ascontiguousarray(v, dtype=np.float64)
    bad = ~np.isfinite(v).all(axis=1)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise ValueError(f"vertex {i} has a non-finite coordinate {v[i].tolist()} "
                         f"({int(bad.sum())} such vertices)")
    n = v.shape[0]
    lo, hi = int(f.min()), int(f.max())
    if lo < 0 or hi >= n:
        which = np.flatnonzero((f < 0).any(axis=1) | (f >= n).any(axis=1))[0]
        value = hi if hi >= n else lo
        raise ValueError(f"faces index {value} out of range for {n} vertices (face {int(which)})")
    return v, np.ascontiguousarray(f, dtype=np.int64)
