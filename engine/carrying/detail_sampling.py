"""Reading a source's detail offsets at the points a correspondence gives.

Two corrections to plain barycentric interpolation of per-vertex offsets:

- :func:`ray_weights` (meshes that overlap in space): a closest point on a
  bumpy source, seen from a target vertex on the smooth shape, slides down
  the bumps' slopes toward where they cross the shape, so the offsets read
  there are too small by about the squared slope. The point where the
  target's base normal through the vertex meets the source's triangle plane
  is where the target vertex sits under or over the detail; the weights are
  moved there (one Newton step of that ray-surface intersection).
- :func:`smooth_sample`: per-vertex gradients of the offsets make the read
  exact for fields quadratic along the surface (``sum_k w_k (v_k + g_k . (p - x_k) / 2)``,
  the mean of the linear interpolant and the blend of the corners' first-order
  Taylor expansions, whose second-order errors are equal and opposite), where
  the linear read flattens a bump sampled by a few edges per wavelength.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import NDArray

from .detail import vertex_gradients

__all__ = ["read_vertices", "ray_weights", "smooth_sample", "RAY_MIN_COSINE", "RAY_REACH"]

RAY_MIN_COSINE = 0.5
"""The ray is followed where the target normal and the source triangle's normal
are within 60 degrees; elsewhere the closest point is kept."""

RAY_REACH = 1.0
"""The moved point stays within this many triangles' reach: no barycentric
weight below ``-RAY_REACH`` (the step is shortened to that)."""


def read_vertices(faces: NDArray[Any], triangle: NDArray[Any]) -> NDArray[Any]:
    """The vertices :func:`smooth_sample` reads, sorted: the corners of the ``triangle`` rows
    of ``faces`` and their neighbours (all vertices of the triangles touching a corner)."""
    near = np.zeros(int(faces.max(initial=-1)) + 1, dtype=bool)
    near[faces[triangle]] = True
    out: NDArray[Any] = np.unique(faces[near[faces].any(axis=1)])
    return out


def ray_weights(vertices: NDArray[Any], faces: NDArray[Any], triangle: NDArray[Any], barycentric: NDArray[Any],
                points: NDArray[Any], normals: NDArray[Any]) -> NDArray[Any]:
    """Barycentric weights, in the same triangles, of where each point's normal line meets the triangle's plane.

    Parameters
    ----------
    vertices, faces : the source mesh, (n, 3) float and (m, 3) int
    triangle : (q,) int, barycentric : (q, 3) float
        The closest point of each query on the source.
    points, normals : (q, 3) float
        The queries (in the source's space) and their unit normals.

    Returns
    -------
    (q, 3) float64, rows summing to 1; weights may be negative (the point lies
    past the triangle's edge, at most :data:`RAY_REACH` triangles) and are the
    given ones where the ray meets the plane at a glancing angle or the
    triangle has no area.
    """
    c = vertices[faces[triangle]]                                       # (q, 3 corners, 3)
    e1, e2 = c[:, 1] - c[:, 0], c[:, 2] - c[:, 0]
    plane = np.cross(e1, e2)
    size = np.linalg.norm(plane, axis=1)
    plane = plane / np.where(size > 0, size, 1.0)[:, None]
    cos = np.einsum("ij,ij->i", normals, plane)
    ok = (np.abs(cos) >= RAY_MIN_COSINE) & (size > 0)
    foot = np.einsum("ij,ijk->ik", barycentric, c)
    step = np.einsum("ij,ij->i", foot - points, plane) / np.where(ok, cos, 1.0)
    rel = points + np.where(ok, step, 0.0)[:, None] * normals - c[:, 0]
    d11, d12, d22 = (np.einsum("ij,ij->i", a, b) for a, b in ((e1, e1), (e1, e2), (e2, e2)))
    r1, r2 = np.einsum("ij,ij->i", rel, e1), np.einsum("ij,ij->i", rel, e2)
    det = np.where(ok, d11 * d22 - d12 * d12, 1.0)
    b1, b2 = (d22 * r1 - d12 * r2) / det, (d11 * r2 - d12 * r1) / det
    moved = np.where(ok[:, None], np.column_stack([1.0 - b1 - b2, b1, b2]), barycentric)
    low, was = moved.min(axis=1), barycentric.min(axis=1)
    shorten = np.where(low < -RAY_REACH, (was + RAY_REACH) / np.maximum(was - low, 1e-300), 1.0)
    out: NDArray[Any] = barycentric + shorten[:, None] * (moved - barycentric)
    return out


def smooth_sample(vertices: NDArray[Any], faces: NDArray[Any], values: NDArray[Any], triangle: NDArray[Any],
                  weights: NDArray[Any]) -> NDArray[Any]:
    """Per-vertex ``values`` read at barycentric points, exact for fields quadratic along the surface.

    Parameters
    ----------
    vertices, faces : the mesh, (n, 3) float and (m, 3) int
    values : (n, c) float
        Needed at :func:`read_vertices` (``faces``, ``triangle``); others are not read.
    triangle : (q,) int, weights : (q, 3) float
        Where to read: a triangle and weights of its corners summing to 1
        (negative weights extrapolate the triangle's fields).

    Returns
    -------
    (q, c) float64
    """
    corners = faces[triangle]
    used = read_vertices(faces, triangle)
    keep = np.zeros(len(vertices), dtype=bool)
    keep[used] = True
    local = np.searchsorted(used, faces[keep[faces].all(axis=1)])
    grads = vertex_gradients(vertices[used], local, values[used])      # (u, c, 3)
    at = np.einsum("ij,ijk->ik", weights, vertices[corners])
    out = np.zeros((len(triangle), values.shape[1]))
    for k in range(3):
        j = corners[:, k]
        half = 0.5 * np.einsum("icd,id->ic", grads[np.searchsorted(used, j)], at - vertices[j])
        out += weights[:, k:k + 1] * (values[j] + half)
    return out
