"""Operators and spectra: from a triangle mesh to its Laplacian, eigenbasis, products and descriptors.

geometry        areas, cotangents and lumped masses from edge lengths
laplacian       cotangent stiffness and lumped mass
robust          the intrinsic (tufted-cover, Delaunay) Laplacian for non-manifold meshes
discretization  picks the plain or the robust operators for a mesh and says why
eigensolver     the generalised eigenproblem L phi = lambda M phi
products        mass-orthonormal products of eigenfunctions
descriptors     heat and wave kernel signatures
approximation   projecting a signal on a basis
shape           one mesh, its operators and spectra computed once and then asked questions
"""
