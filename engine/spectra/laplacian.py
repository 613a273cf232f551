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

from ..intake.preparation import validate_mesh

__all__ = ["cotangent_laplacian", "intrinsic_laplacian", "mass_matrix", "face_areas", "corner_cotangents"]


def face_areas(vertices, faces) -> np.ndarray:
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
    return _areas(v, f)


def _areas(v: np.ndarray, f: np.ndarray) -> np.ndarray:
    e1 = v[f[:, 1]] - v[f[:, 0]]
    e2 = v[f[:, 2]] - v[f[:, 0]]
    return 0.5 * np.linalg.norm(np.cross(e1, e2), axis=1)


def corner_cotangents(vertices, faces) -> np.ndarray:
    """Cotangent of the angle at each corner of each triangle.

    Returns
    -------
    (m, 3) float64 array
        Column c holds the cotangent of the angle at corner c, which lies
        opposite the edge (c+1, c+2). Zero-area triangles get cotangent 0.
    """
    v, f = validate_mesh(vertices, faces)
    return cotangents(v, f)


def cotangents(v: np.ndarray, f: np.ndarray) -> np.ndarray:
    cot = np.empty(f.shape, dtype=np.float64)
    for c in range(3):
        a = v[f[:, (c + 1) % 3]] - v[f[:, c]]
        b = v[f[:, (c + 2) % 3]] - v[f[:, c]]
        dot = np.einsum("ij,ij->i", a, b)
        cross = np.linalg.norm(np.cross(a, b), axis=1)
        with np.errstate(divide="ignore", invalid="ignore"):
            cot[:, c] = np.where(cross > 0, dot / np.where(cross > 0, cross, 1.0), 0.0)
    return cot


def cotangent_laplacian(vertices, faces) -> sp.csr_matrix:
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


def stiffness_from_cotangents(n: int, f: np.ndarray, cot: np.ndarray) -> sp.csr_matrix:
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


def mass_matrix(vertices, faces, *, kind: str = "barycentric") -> np.ndarray:
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
    n = v.shape[0]
    area = _areas(v, f)
    if kind == "barycentric":
        per_corner = np.repeat(area[:, None] / 3.0, 3, axis=1)
    elif kind == "voronoi":
        per_corner = _mixed_voronoi(v, f, area)
    else:
        raise ValueError(f"unknown mass kind {kind!r}; expected 'barycentric' or 'voronoi'")
    return np.bincount(f.ravel(), weights=per_corner.ravel(), minlength=n).astype(np.float64)


def _mixed_voronoi(v: np.ndarray, f: np.ndarray, area: np.ndarray) -> np.ndarray:
    cot = cotangents(v, f)
    sq = np.empty(f.shape)
    for c in range(3):
        # squared length of the edge opposite corner c
        d = v[f[:, (c + 1) % 3]] - v[f[:, (c + 2) % 3]]
        sq[:, c] = np.einsum("ij,ij->i", d, d)
    # Voronoi area at corner c: (|e_b|^2 cot(b) + |e_c|^2 cot(c)) / 8 where
    # e_b, e_c are the two edges at corner c (opposite corners c+1 and c+2).
    vor = np.empty(f.shape)
    for c in range(3):
        b, d = (c + 1) % 3, (c + 2) % 3
        vor[:, c] = (sq[:, b] * cot[:, b] + sq[:, d] * cot[:, d]) / 8.0
    obtuse = cot < 0  # angle above 90 degrees
    any_obtuse = obtuse.any(axis=1)
    out = np.where(any_obtuse[:, None], np.where(obtuse, area[:, None] / 2.0, area[:, None] / 4.0), vor)
    return out


def intrinsic_laplacian(lengths, faces, n_vertices: int) -> tuple[sp.csr_matrix, np.ndarray]:
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
    lengths = np.asarray(lengths, dtype=np.float64)
    f = np.asarray(faces, dtype=np.int64)
    if lengths.shape != f.shape or f.ndim != 2 or f.shape[1] != 3:
        raise ValueError(f"lengths must have the shape of faces (m, 3), got {lengths.shape} and {f.shape}")
    if not np.isfinite(lengths).all() or (lengths < 0).any():
        raise ValueError("edge lengths must be finite and non-negative")
    if f.size and (f.min() < 0 or f.max() >= n_vertices):
        raise ValueError(f"faces index {int(f.max())} out of range for {n_vertices} vertices")
    a, b, c = lengths[:, 0], lengths[:, 1], lengths[:, 2]
    # Heron's formula in its numerically stable form (Kahan): sort descending.
    s = np.sort(lengths, axis=1)[:, ::-1]
    x, y, z = s[:, 0], s[:, 1], s[:, 2]
    prod = (x + (y + z)) * (z - (x - y)) * (z + (x - y)) * (x + (y - z))
    area = 0.25 * np.sqrt(np.clip(prod, 0.0, None))
    cot = np.zeros_like(lengths)
    with np.errstate(divide="ignore", invalid="ignore"):
        denom = np.where(area > 0, 4.0 * area, 1.0)
        cot[:, 0] = np.where(area > 0, (b * b + c * c - a * a) / denom, 0.0)
        cot[:, 1] = np.where(area > 0, (c * c + a * a - b * b) / denom, 0.0)
        cot[:, 2] = np.where(area > 0, (a * a + b * b - c * c) / denom, 0.0)
    L = stiffness_from_cotangents(n_vertices, f, cot)
    mass = np.bincount(f.ravel(), weights=np.repeat(area / 3.0, 3), minlength=n_vertices)
    return L, mass
