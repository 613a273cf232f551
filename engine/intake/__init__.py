"""Mesh files and intake: read and write mesh files, validate at the door, triangulate and clean.

files          PLY / OBJ / OFF reading and PLY writing (``read_mesh``, ``write_ply``)
ply_stream     a PLY body read in chunks straight into the final arrays, and written in chunks
preparation    the one validator (``validate_mesh``) and ``prepare_mesh`` (clean, weld, map back)
triangulation  polygons to triangles
"""
