"""Overtone's engine: spectral geometry for carrying per-vertex data between meshes.

Imports only the standard library, numpy and scipy. Public API index:

Mesh intake
    validate_mesh         the one validator at the door
    prepare_mesh          triangulate, clean, keep the map back to every original vertex
    PreparedMesh          the cleaned mesh and its maps (restore / to_cleaned)
    read_mesh             PLY (ascii / binary), OBJ, OFF geometry and PLY vertex properties
    write_ply             PLY writer, atomic, lossless
    MeshData              what read_mesh returns

Operators
    cotangent_laplacian   positive semidefinite cotangent stiffness matrix
    mass_matrix           lumped mass (barycentric or mixed Voronoi), 1-D
    face_areas            triangle areas
    intrinsic_laplacian   the same operators from edge lengths alone
"""

from .laplacian import cotangent_laplacian, face_areas, intrinsic_laplacian, mass_matrix
from .mesh import PreparedMesh, prepare_mesh, validate_mesh
from .meshio import MeshData, read_mesh, write_ply

__all__ = [
    "validate_mesh",
    "prepare_mesh",
    "PreparedMesh",
    "read_mesh",
    "write_ply",
    "MeshData",
    "cotangent_laplacian",
    "mass_matrix",
    "intrinsic_laplacian",
    "face_areas",
]

__version__ = "0.1.0"
