"""The Laplace-Beltrami operators of a mesh: plain cotangent, or robust when the mesh needs it.

:func:`mesh_operators` returns the stiffness matrix and the lumped mass, choosing
between the plain cotangent Laplacian (:mod:`laplacian`) and the robust one of
Sharp and Crane (2020) (:mod:`robust`), and says which it chose and why.

When the robust variant is chosen (``robust="auto"``)
------------------------------------------------------
The plain cotangent matrix is the finite-element stiffness matrix of the
piecewise-linear functions, a sum of per-triangle positive semidefinite
matrices, so it is positive semidefinite on every mesh; what it loses on bad
meshes is meaning and accuracy. The robust variant is used when any of these
holds:

1. **A non-manifold edge** (more than two faces) **or vertex** (faces around
   it that do not form one fan). The plain matrix then adds up the faces as
   if each were alone and no longer discretises a surface Laplacian; the
   tufted cover does (Sharp and Crane 2020, section 4).
2. **An angle below 1 degree.** Its cotangent exceeds 57, so one edge weight
   dominates its row by orders of magnitude and the weight of an edge depends on a
   detail far below the mesh resolution.
3. **More than 10% of interior edges with a negative cotangent weight.** A
   negative weight breaks the maximum principle (Wardetzky, Mathur, Kaelberer
   and Grinspun, "Discrete Laplace operators: no free lunch", SGP 2007), so
   smoothing and interpolation can overshoot the input range; the intrinsic
   Delaunay weights are all non-negative. On the reference meshes the low
   eigenvalues of the two operators differ by percents above the 10% mark
   and negligibly on clean meshes (figures in docs/measurements.md,
   "Laplacian operators").

The robust construction costs little beside an eigensolve, so the
thresholds err towards it. On a mesh where it changes nothing (all triangles Delaunay and
well shaped) it equals the plain matrix up to mollification.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp

from ..common.arrays import Array, ArrayLike
from .geometry import check_mass_kind, cotangents_from_lengths, edge_lengths, face_edges, heron_areas, lumped_mass
from .laplacian import stiffness_from_cotangents
from ..intake.preparation import group_edges, mesh_topology, validate_mesh
from .robust import check_mollify_factor, robust_operators

__all__ = ["Operators", "mesh_operators", "MeshDefects", "mesh_defects"]

_SLIVER_DEGREES = 1.0
_NEGATIVE_FRACTION = 0.10


@dataclass(frozen=True)
class Operators:
    """Stiffness and mass of one mesh, with what was chosen and why.

    Attributes
    ----------
    stiffness : (n, n) scipy.sparse.csr_matrix
        Positive semidefinite, rows summing to zero.
    mass : (n,) float64 array
        Lumped diagonal mass; sums to the area.
    robust : bool
        True if the robust (intrinsic Delaunay tufted cover) Laplacian was used.
    reason : str
        What was detected, e.g. ``"12 non-manifold edges"``; ``""`` when the
        plain operator was used on a mesh with nothing to report.
    """

    stiffness: sp.csr_matrix
    mass: Array
    robust: bool
    reason: str


@dataclass(frozen=True)
class MeshDefects:
    """Counts behind the choice of Laplacian (see :func:`mesh_defects`)."""

    nonmanifold_edges: int
    nonmanifold_vertices: int
    sliver_triangles: int
    smallest_angle: float
    negative_edges: int
    interior_edges: int

    def reasons(self) -> list[str]:
        """One phrase per criterion of :func:`mesh_operators` that holds."""
        out = []
        if self.nonmanifold_edges:
            out.append(f"{self.nonmanifold_edges} non-manifold edge{'s' * (self.nonmanifold_edges != 1)}")
        if self.nonmanifold_vertices:
            out.append(f"{self.nonmanifold_vertices} non-manifold vert" + ("ices" if self.nonmanifold_vertices != 1 else "ex"))
        if self.sliver_triangles:
            out.append(f"{self.sliver_triangles} triangle{'s' * (self.sliver_triangles != 1)} with an angle "
                       f"below {_SLIVER_DEGREES:g} degree (smallest {self.smallest_angle:.2g} degrees)")
        if self.interior_edges and self.negative_edges > _NEGATIVE_FRACTION * self.interior_edges:
            out.append(f"{100 * self.negative_edges / self.interior_edges:.0f}% of interior edges have a "
                       f"negative cotangent weight")
        return out


def mesh_defects(vertices: ArrayLike, faces: ArrayLike) -> MeshDefects:
    """Count the defects that make the plain cotangent Laplacian unreliable.

    Parameters
    ----------
    vertices : (n, 3) float array
    faces : (m, 3) int array

    Returns
    -------
    MeshDefects
        ``nonmanifold_edges``: edges in more than two faces.
        ``nonmanifold_vertices``: vertices whose faces form more than one
        edge-connected fan (as counted by :func:`prepare_mesh`).
        ``sliver_triangles``: triangles with an angle below 1 degree, and the
        ``smallest_angle`` in degrees. ``negative_edges`` of
        ``interior_edges`` (edges in exactly two faces) have a negative
        cotangent weight ``cot a + cot b``.
    """
    v, f = validate_mesh(vertices, faces)
    return _defects(v, f)


def _defects(v: Array, f: Array) -> MeshDefects:
    n = v.shape[0]
    _, nonmanifold_edges, nonmanifold_vertices = mesh_topology(f, n)
    cot, degenerate = _corner_angle_cotangents(v, f)
    # Interior (two-face) edges and their cotangent weights; face-edge 3t + c
    # lies opposite corner c, from corner c+1 to corner c+2.
    p, q, _ = face_edges(f)
    groups = group_edges(p, q, n)
    pairs = groups.starts[groups.counts == 2]
    x, y = groups.order[pairs], groups.order[pairs + 1]
    negative = int((cot.ravel()[x] + cot.ravel()[y] < 0).sum())

    angles = np.degrees(np.arctan2(1.0, cot))  # in (0, 180); 90 where the triangle is degenerate
    angles[degenerate] = 0.0
    smallest = angles.min(axis=1)
    return MeshDefects(nonmanifold_edges, nonmanifold_vertices, int((smallest < _SLIVER_DEGREES).sum()),
                       float(smallest.min()), negative, int(x.size))


def _corner_angle_cotangents(v: Array, f: Array) -> tuple[Array, Array]:
    """Corner cotangents from edge vectors (``dot / |cross|``), for the defect counts only, and the
    triangles whose cross product is zero.

    The operators take their cotangents from edge lengths (:mod:`geometry`).
    The counts keep this form because their verdict on weights that are zero
    in exact arithmetic (the opposite angles of a cocircular quad, such as the
    isosceles trapezoids of a surface of revolution) is decided by rounding,
    and it decides which operator a mesh gets: another formula would give some
    existing meshes the other operator.
    """
    cot = np.empty(f.shape, dtype=np.float64)
    for c in range(3):
        a = v[f[:, (c + 1) % 3]] - v[f[:, c]]
        b = v[f[:, (c + 2) % 3]] - v[f[:, c]]
        dot = np.einsum("ij,ij->i", a, b)
        cross = np.linalg.norm(np.cross(a, b), axis=1)
        cot[:, c] = np.where(cross > 0, dot / np.where(cross > 0, cross, 1.0), 0.0)
    e1, e2 = v[f[:, 1]] - v[f[:, 0]], v[f[:, 2]] - v[f[:, 0]]
    return cot, np.linalg.norm(np.cross(e1, e2), axis=1) == 0


def mesh_operators(vertices: ArrayLike, faces: ArrayLike, *, robust: bool | str = "auto", mass: str = "barycentric",
              mollify_factor: float = 1e-5) -> Operators:
    """Stiffness matrix and lumped mass of a triangle mesh, plain or robust.

    Parameters
    ----------
    vertices : (n, 3) float array
    faces : (m, 3) int array
    robust : {"auto", True, False}, keyword-only
        ``"auto"`` uses the robust Laplacian when the mesh has a non-manifold
        edge or vertex, an angle below 1 degree, or more than 10% of interior
        edges with a negative cotangent weight (the module docstring gives
        the reasons and the measurements). ``True`` / ``False`` force it.
    mass : {"barycentric", "voronoi"}, keyword-only
        Lumped mass: a third of each triangle's area per corner, or mixed
        Voronoi areas (Meyer et al. 2003); on the intrinsic triangles when
        robust.
    mollify_factor : float, keyword-only
        Passed to :func:`robust_laplacian` when robust.

    Returns
    -------
    Operators
        ``reason`` names what was detected; when ``robust=True`` was asked
        for on a clean mesh it reads ``"requested"``, and when
        ``robust=False`` overrides a detection it starts with
        ``"plain requested despite "``.
    """
    if not (robust is True or robust is False or (isinstance(robust, str) and robust == "auto")):
        raise ValueError(f"robust must be 'auto', True or False, got {robust!r}")
    check_mass_kind(mass)
    check_mollify_factor(mollify_factor)
    v, f = validate_mesh(vertices, faces)
    found = "; ".join(_defects(v, f).reasons())
    use = bool(found) if robust == "auto" else bool(robust)
    if use:
        L, M = robust_operators(v, f, mollify_factor=mollify_factor, mass=mass)[:2]
        return Operators(L, M, True, found or "requested")
    lengths = edge_lengths(v, f)
    area = heron_areas(lengths)
    L = stiffness_from_cotangents(v.shape[0], f, cotangents_from_lengths(lengths, area))
    M = lumped_mass(lengths, f, v.shape[0], mass, area)
    return Operators(L, M, False, f"plain requested despite {found}" if found else "")
