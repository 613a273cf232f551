"""Overtone's engine: spectral geometry for carrying per-vertex data between meshes.

Imports only the standard library, numpy and scipy. Public API index:

Mesh intake
    validate_mesh         the one validator at the door

Operators
    cotangent_laplacian   positive semidefinite cotangent stiffness matrix
    mass_matrix           lumped mass (barycentric or mixed Voronoi), 1-D
    face_areas            triangle areas
    intrinsic_laplacian   the same operators from edge lengths alone
"""

from .laplacian import cotangent_laplacian, face_areas, intrinsic_laplacian, mass_matrix
from .mesh import validate_mesh

__all__ = [
    "validate_mesh",
    "cotangent_laplacian",
    "mass_matrix",
    "intrinsic_laplacian",
    "face_areas",
]

__version__ = "0.1.0"
