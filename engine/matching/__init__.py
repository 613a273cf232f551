"""Matching: which point of the source surface each target vertex corresponds to.

closest_point   exact closest points on a triangle mesh
functional_map  functional maps, their point-to-point conversion, ZoomOut refinement
correspondence  the correspondence itself (aligned, intrinsic, auto) and its confidence
"""
