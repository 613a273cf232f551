"""Overtone's engine: spectral geometry for carrying per-vertex data between meshes.

Imports only the standard library, numpy and scipy. Public API index:

Mesh intake
    validate_mesh         the one validator at the door
    prepare_mesh          triangulate, clean, keep the map back to every original vertex
    PreparedMesh          the cleaned mesh and its maps (restore / to_cleaned)
    read_mesh             PLY (ascii / binary), OBJ, OFF geometry and PLY vertex properties
    write_ply             PLY writer, atomic, lossless
    MeshData              what read_mesh returns

Eigenbasis and cache
    eigenbasis            k smallest eigenpairs of L phi = lambda M phi (Eigenbasis)
    Cache                 on-disk .npz cache, atomic, validated, never trusted blindly
    geometry_key          stable hash of arrays and parameters

Eigenfunction products (products.py)
    product_exponents     monomials of the first K eigenfunctions up to an order
    raw_products          their pointwise products
    orthogonal_products   mass-orthonormal products, dependent ones dropped (ProductBasis)
    least_squares_products  the raw-products baseline with a least-squares fit
    product_budget        caps (K, order) by the vertex count

Approximation and descriptors
    approximate           project a signal on a basis and reconstruct it (Approximation)
    relative_error        mass-weighted relative L2 error
    LaplacianBasis        the eigenbasis as an approximation basis
    heat_kernel_signature, wave_kernel_signature, heat_kernel_rows, heat_times, wave_energies

Shapes, correspondence and transfer
    Shape                 one mesh: operators, eigenbasis, products, descriptors, computed once
    correspond            target vertex -> point on the source surface (Correspondence)
    Transfer              carries signals through a basis of choice (TransferResult)
    Pair, Settings        the whole job for one source/target pair (pipeline.py)
    run_transfer_job, run_detail_job   file in, file out: one pair per call (JobFiles, JobOptions)
    SurfaceLocator        closest points on a triangle mesh

Operators
    mesh_operators        stiffness and mass, robust variant when the mesh needs it (Operators)
    robust_laplacian      non-manifold Laplacian: tufted cover, mollification, intrinsic Delaunay
    mesh_defects          what makes a mesh need the robust variant (MeshDefects)
    cotangent_laplacian   positive semidefinite cotangent stiffness matrix
    mass_matrix           lumped mass (barycentric or mixed Voronoi), 1-D
    face_areas            triangle areas
    intrinsic_laplacian   the same operators from edge lengths alone
"""

import sys as _sys

if _sys.argv[:1] == ["-m"]:  # ``python -m engine`` is importing the package: see engine.jobs.cli
    from .common.atomic import quiet_interrupts_while_starting

    quiet_interrupts_while_starting()

from .matching.closest_point import SurfaceLocator, SurfacePoints
from .matching.correspondence import Correspondence, correspond
from .jobs.pair import Pair, Settings
from .jobs.file_jobs import JobFiles, JobOptions, run_detail_job, run_transfer_job
from .spectra.shape import Shape
from .carrying.transfer import Transfer, TransferResult
from .spectra.discretization import MeshDefects, Operators, mesh_defects, mesh_operators
from .spectra.robust import robust_laplacian
from .spectra.eigensolver import Eigenbasis, eigenbasis
from .common.cache import Cache, geometry_key
from .spectra.laplacian import cotangent_laplacian, face_areas, intrinsic_laplacian, mass_matrix
from .spectra.approximation import Approximation, Basis, LaplacianBasis, approximate, relative_error
from .spectra.descriptors import heat_kernel_rows, heat_kernel_signature, heat_times, wave_energies, wave_kernel_signature
from .spectra.products import (DEFAULT_PRODUCT_TOLERANCE, LeastSquaresProducts, ProductBasis, least_squares_products,
                       orthogonal_products, product_budget, product_exponents, raw_products)
from .intake.preparation import PreparedMesh, prepare_mesh, validate_mesh
from .intake.files import MeshData, read_mesh, write_ply

__all__ = [
    "Shape",
    "correspond",
    "Correspondence",
    "Transfer",
    "TransferResult",
    "Pair",
    "Settings",
    "run_transfer_job",
    "run_detail_job",
    "JobFiles",
    "JobOptions",
    "SurfaceLocator",
    "SurfacePoints",
    "validate_mesh",
    "prepare_mesh",
    "PreparedMesh",
    "read_mesh",
    "write_ply",
    "MeshData",
    "product_exponents",
    "raw_products",
    "ProductBasis",
    "orthogonal_products",
    "LeastSquaresProducts",
    "least_squares_products",
    "product_budget",
    "DEFAULT_PRODUCT_TOLERANCE",
    "Basis",
    "LaplacianBasis",
    "Approximation",
    "approximate",
    "relative_error",
    "heat_times",
    "heat_kernel_signature",
    "heat_kernel_rows",
    "wave_energies",
    "wave_kernel_signature",
    "mesh_operators",
    "Operators",
    "mesh_defects",
    "MeshDefects",
    "robust_laplacian",
    "eigenbasis",
    "Eigenbasis",
    "Cache",
    "geometry_key",
    "cotangent_laplacian",
    "mass_matrix",
    "intrinsic_laplacian",
    "face_areas",
]

__version__ = "0.1.0"
