"""The smooth base of a huge surface, through a stand-in.

:func:`engine.carrying.detail.smooth_base` low-passes a surface by sparse
factorisations of its own size, and the detail frames follow the gradients of its
first eigenfunctions: both grow faster than linearly with the vertex count.
Neither needs the full resolution. The filter removes everything shorter than
the detail wavelength, so a simplified copy of the surface with
:data:`EDGES_PER_WAVELENGTH` edges per wavelength (quadric simplification,
:func:`engine.matching.standin.simplify_mesh`) has the same base: the
stand-in is smoothed and its first eigenfunctions computed, and every full
vertex takes both by a local quadratic fit over the nearest stand-in vertices in
their tangent plane (:func:`local_fit`: near-linear, no closest-point search
over the stand-in's triangles). The vertex's offset from that base is its detail. The
stand-in's size follows the band (the wavelength against the area), not the
input's vertex count.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import NDArray

from ..matching import standin
from ..spectra.shape import Shape
from .detail import smooth_base, split_detail, vertex_normals

__all__ = ["EDGES_PER_WAVELENGTH", "FIT_NEIGHBOURS", "band_vertices", "lifted_layer", "local_fit", "surface_area"]

FIT_NEIGHBOURS = 16
"""Stand-in vertices in each local fit (:func:`local_fit`): about two rings around the query,
well over the six terms of the quadratic fit."""

EDGES_PER_WAVELENGTH = 12.0
"""Stand-in edges per detail wavelength: the filter's response at the
wavelength is resolved to well within a percent at this sampling (common
practice: ten or more samples per wavelength for a discrete Laplacian)."""


def band_vertices(area: float, wavelength: float) -> int:
    """Vertices of a stand-in with :data:`EDGES_PER_WAVELENGTH` edges per ``wavelength``
    (equilateral triangles of edge ``e`` tile ``area`` with about ``2 area / (sqrt(3) e^2)`` vertices),
    at least :data:`~engine.matching.standin.STANDIN_VERTICES`."""
    edge = wavelength / EDGES_PER_WAVELENGTH
    return int(max(standin.STANDIN_VERTICES, 2.0 * area / (np.sqrt(3.0) * edge ** 2)))


def surface_area(vertices: NDArray[Any], faces: NDArray[Any]) -> float:
    """Sum of the triangle areas (what the lumped mass sums to), without building the Laplacian."""
    e1, e2 = vertices[faces[:, 1]] - vertices[faces[:, 0]], vertices[faces[:, 2]] - vertices[faces[:, 0]]
    return 0.5 * float(np.linalg.norm(np.cross(e1, e2), axis=1).sum())


def lifted_layer(shape: Shape, wavelength: float, rows: NDArray[Any],
                 n_guides: int = 3) -> tuple[NDArray[Any], NDArray[Any]] | None:
    """Detail offsets and guide fields of ``shape`` at the vertices ``rows``, through a stand-in.

    The base and the guides come from the stand-in (:func:`local_fit`); the
    offsets are :func:`~engine.carrying.detail.split_detail`'s, computed on the
    triangles around ``rows`` only (a vertex's frame needs its one-ring), so a
    target-sized set of rows costs little on a huge source.

    Parameters
    ----------
    shape : Shape
    wavelength : float
        Features shorter than this are detail (:func:`~engine.carrying.detail.smooth_base`).
    rows : (r,) int array
        The vertices wanted (those a correspondence reads).
    n_guides : int
        Guide fields: the stand-in's eigenfunctions 1..n_guides.

    Returns
    -------
    offsets (n, 3) float64, guides (n, n_guides) float64, zero outside ``rows``;
    None when the stand-in would have more than half the shape's vertices or
    the simplifier is not installed (then work on the shape itself).
    """
    v, f = shape.vertices, shape.faces
    n_coarse = band_vertices(surface_area(v, f), wavelength)
    if 2 * n_coarse > shape.n_vertices:
        return None
    try:
        coarse = standin.simplified_shape(shape, n_coarse)
    except standin.SimplifierMissing:     # slower, but the same result: smooth the shape itself
        return None
    base_c = smooth_base(coarse.vertices, coarse.stiffness, coarse.mass, wavelength=wavelength)
    guides_c = coarse.eigenbasis(n_guides + 1).eigenvectors[:, 1:n_guides + 1]
    wanted = np.zeros(shape.n_vertices, dtype=bool)
    wanted[rows] = True
    used, ring = np.unique(f[wanted[f].any(axis=1)], return_inverse=True)
    ring = ring.reshape(-1, 3)
    fields = local_fit(coarse.vertices, vertex_normals(coarse.vertices, coarse.faces),
                       np.hstack([base_c, guides_c]), v[used])
    layer = split_detail(v[used], ring, fields[:, :3], guides=fields[:, 3:])
    offsets, guides = np.zeros((shape.n_vertices, 3)), np.zeros((shape.n_vertices, n_guides))
    offsets[used], guides[used] = layer.offsets, fields[:, 3:]
    return offsets, guides


def local_fit(points: NDArray[Any], normals: NDArray[Any], values: NDArray[Any], query: NDArray[Any], *,
              neighbours: int = FIT_NEIGHBOURS, chunk: int = 100_000) -> NDArray[Any]:
    """Smooth per-vertex fields of a surface evaluated at nearby points, by local quadratic fits.

    Each query takes its ``neighbours`` nearest surface vertices, projects
    them into the tangent plane of the nearest one (its normal), and fits
    ``value = c + a u + b v + d u^2 + e u v + f v^2`` over the tangent
    coordinates ``(u, v)`` relative to the query by least squares weighted
    ``1 / (d^2 + r^2)`` (``d`` the distance, ``r`` the nearest one's); ``c``
    is the answer. Exact for fields quadratic along the surface (so a curved
    base is not flattened by the fit); the query's offset along the normal
    (its detail) does not enter.

    Parameters
    ----------
    points, normals : (n, 3) float64
    values : (n, c) float64
    query : (q, 3) float64

    Returns
    -------
    (q, c) float64
    """
    from scipy.spatial import cKDTree

    tree = cKDTree(points)
    k = int(min(neighbours, len(points)))
    out = np.empty((len(query), values.shape[1]))
    for s in range(0, len(query), chunk):
        q = query[s:s + chunk]
        d, idx = tree.query(q, k=k, workers=-1)
        d, idx = d.reshape(len(q), k), idx.reshape(len(q), k)
        n = normals[idx[:, 0]]
        t1 = np.cross(n, np.where(np.abs(n[:, :1]) < 0.9, [[1.0, 0.0, 0.0]], [[0.0, 1.0, 0.0]]))
        t1 /= np.linalg.norm(t1, axis=1, keepdims=True)
        t2 = np.cross(n, t1)
        rel = points[idx] - q[:, None, :]                                   # (m, k, 3)
        u, v = np.einsum("mkj,mj->mk", rel, t1), np.einsum("mkj,mj->mk", rel, t2)
        terms = [np.ones(idx.shape), u, v, u * u, u * v, v * v][:min(6, k)]  # fewer points: fewer terms
        design = np.stack(terms, axis=2)                                    # (m, k, terms)
        w = 1.0 / (d ** 2 + d[:, :1] ** 2 + 1e-300)
        gram = np.einsum("mk,mki,mkj->mij", w, design, design)
        gram += 1e-12 * np.trace(gram, axis1=1, axis2=2)[:, None, None] * np.eye(len(terms))
        rhs = np.einsum("mk,mki,mkc->mic", w, design, values[idx])
        out[s:s + chunk] = np.linalg.solve(gram, rhs)[:, 0, :]
    return out
