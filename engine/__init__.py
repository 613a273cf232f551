"""Overtone's engine: spectral geometry for carrying per-vertex data between meshes.

Imports only the standard library, numpy and scipy. Public API index:

Mesh intake
    validate_mesh         the one validator at the door

Operators
    cotangent_laplacian   positive semidefinite cotangent stiffness matrix
    mass_matrix           lumped mass (barycentric or mixed Voronoi), 1-D
    face_areas            triangle areas
"""

from .laplacian import cotangent_laplacian, face_areas, mass_matrix
from .mesh import validate_mesh

__all__ = [
    "validate_mesh",
    "cotangent_laplacian",
    "mass_matrix",
    "face_areas",
]

__version__ = "0.1.0"
