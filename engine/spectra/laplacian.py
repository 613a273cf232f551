"""The cotangent Laplacian and the lumped mass matrix.

Sign convention (used everywhere in the engine): the stiffness matrix ``L`` is
positive semidefinite, ``L_ij = -(cot a_ij + cot b_ij) / 2`` for an edge ij with
opposite angles a_ij and b_ij, and ``L_ii = -sum_j L_ij`` so rows sum to zero.
libigl's ``cotmatrix`` is the negative of this matrix. The mass is lumped and
diagonal and is returned as a 1-D array whose sum is the surface area.
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp

from ..common.arrays import Array, ArrayLike
from ..intake.preparation import validate_mesh
from .geometry import check_lengths, cotangents_from_lengths, edge_lengths, heron_areas, lumped_mass

__all__ = ["cotangent_laplacian", "intrinsic_laplacian", "mass_matrix", "face_areas", "corner_cotangents"]


def face_areas(vertices: ArrayLike, faces: ArrayLike) -> Array:
    """Area of each triangle.

    Parameters
    ----------
    vertices : (n, 3) float array
    faces : (m, 3) int array

    Returns
    -------
    (m,) float64 array
    """
    v, f = validate_mesh(vertices, faces)
    return heron_areas(edge_lengths(v, f))


def corner_cotangents(vertices: ArrayLike, faces: ArrayLike) -> Array:
    """Cotangent of the angle at each corner of each triangle.

    Returns
    -------
    (m, 3) float64 array
        Column c holds the cotangent of the angle at corner c, which lies
        opposite the edge (c+1, c+2). Zero-area triangles get cotangent 0.
    """
    v, f = validate_mesh(vertices, faces)
    return cotangents(v, f)


def cotangents(v: Array, f: Array) -> Array:
    """(m, 3) corner cotangents of a validated mesh (see :func:`corner_cotangents`)."""
    lengths = edge_lengths(v, f)
    return cotangents_from_lengths(lengths, heron_areas(lengths))


def cotangent_laplacian(vertices: ArrayLike, faces: ArrayLike) -> sp.csr_matrix:
    """Cotangent stiffness matrix, positive semidefinite.

    Parameters
    ----------
    vertices : (n, 3) float array
    faces : (m, 3) int array

    Returns
    -------
    (n, n) scipy.sparse.csr_matrix, float64
        Symmetric, rows summing to zero, ``x^T L x >= 0`` for meshes without
        obtuse-angle pathologies (and always for intrinsic Delaunay meshes).
    """
    v, f = validate_mesh(vertices, faces)
    return stiffness_from_cotangents(v.shape[0], f, cotangents(v, f))


def stiffness_from_cotangents(n: int, f: Array, cot: Array) -> sp.csr_matrix:
    """(n, n) stiffness: corner ``c``'s cotangent weights the opposite edge by ``cot / 2``."""
    # corner c's cotangent weights the opposite edge (c+1, c+2)
    i = np.concatenate([f[:, 1], f[:, 2], f[:, 0]])
    j = np.concatenate([f[:, 2], f[:, 0], f[:, 1]])
    w = 0.5 * np.concatenate([cot[:, 0], cot[:, 1], cot[:, 2]])
    off = sp.coo_matrix((-w, (i, j)), shape=(n, n))
    off = (off + off.T).tocsr()
    diag = -np.asarray(off.sum(axis=1)).ravel()
    L = (off + sp.diags(diag)).tocsr()
    L.sum_duplicates()
    L.eliminate_zeros()
    return L


def mass_matrix(vertices: ArrayLike, faces: ArrayLike, *, kind: str = "barycentric") -> Array:
    """Lumped (diagonal) mass per vertex.

    Parameters
    ----------
    vertices : (n, 3) float array
    faces : (m, 3) int array
    kind : {"barycentric", "voronoi"}
        ``"barycentric"`` gives each vertex a third of the area of its
        triangles. ``"voronoi"`` is the mixed Voronoi area of Meyer, Desbrun,
        Schroeder and Barr (2003): Voronoi areas in non-obtuse triangles, half
        the area to the obtuse corner and a quarter to the others otherwise.

    Returns
    -------
    (n,) float64 array
        Sums to the surface area. Vertices in no triangle get 0.
    """
    v, f = validate_mesh(vertices, faces)
    return lumped_mass(edge_lengths(v, f), f, v.shape[0], kind)


def intrinsic_laplacian(lengths: ArrayLike, faces: ArrayLike, n_vertices: int) -> tuple[sp.csr_matrix, Array]:
    """Cotangent stiffness and barycentric mass from edge lengths alone.

    The cotangent Laplacian depends only on the metric, so a mesh given by its
    edge lengths (an intrinsic triangulation, or a flat torus that has no
    embedding in 3D) gets the same operators as an embedded one.

    Parameters
    ----------
    lengths : (m, 3) float array
        ``lengths[t, c]`` is the length of the edge of triangle ``t`` opposite
        its corner ``c``, i.e. of the edge ``(faces[t, c+1], faces[t, c+2])``.
    faces : (m, 3) int array
    n_vertices : int

    Returns
    -------
    stiffness : (n, n) csr_matrix, positive semidefinite convention
    mass : (n,) float64 array, barycentric
    """
    lens, f = check_lengths(lengths, faces)
    if f.size and (f.min() < 0 or f.max() >= n_vertices):
        raise ValueError(f"faces index {int(f.max())} out of range for {n_vertices} vertices")
    area = heron_areas(lens)
    L = stiffness_from_cotangents(n_vertices, f, cotangents_from_lengths(lens, area))
    return L, lumped_mass(lens, f, n_vertices, "barycentric", area)
