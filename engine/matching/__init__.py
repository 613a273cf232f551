"""Matching: which point of the source surface each target vertex corresponds to.

correspondence  the driver: Correspondence, correspond() (auto / aligned / intrinsic) and its confidence
modes           MatchOptions (tuning) and ModeResult (what each mode hands back)
aligned         aligned mode: closest points, checked in the product embedding where the surfaces differ
intrinsic       intrinsic mode: functional map, ZoomOut, non-rigid alignment, product-embedding search
nonrigid        deforming the source onto the target (non-rigid ICP, as similar as possible)
embedding       the orthogonalised-product embedding through a map and the search in it
functional_map  functional maps, their point-to-point conversion, ZoomOut refinement
closest_point   exact closest points on a triangle mesh
"""
