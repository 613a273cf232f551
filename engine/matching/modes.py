"""What the two matching modes take and give.

:class:`MatchOptions` holds the tuning of :func:`engine.matching.correspondence.correspond`
(defaults are the measured ones, docs/measurements.md); :class:`ModeResult`
is what :func:`engine.matching.aligned.match_aligned` and
:func:`engine.matching.intrinsic.match_intrinsic` hand back to it.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray

from .embedding import PRODUCT_K

__all__ = ["MatchOptions", "ModeResult"]


@dataclass(frozen=True)
class MatchOptions:
    """Tuning of :func:`~engine.matching.correspondence.correspond`.

    Attributes
    ----------
    k : int
        Final size of the eigenbasis for the intrinsic functional map.
    k_start : int
        Size of the first (descriptor) functional map.
    step : int
        ZoomOut step.
    product_K, product_order : int
        Eigenfunctions and order of the product embedding.
    overlap_radius : float
        In mean edge lengths, for the overlap measure.
    overlap_threshold : float
        Overlap above which ``match="auto"`` picks aligned.
    landmark_weight : float
        Weight of the landmark heat-kernel columns in the nearest-neighbour search.
    commute, orient : float
        Weights of Laplacian commutativity and of the orientation term in the
        descriptor functional map (eigenvalues scaled to [0, 1], descriptor
        coefficients to unit norm).
    align_steps : tuple of float
        Intrinsic mode only: smoothing lengths of the non-rigid ICP that
        deforms the source onto the target (fractions of sqrt(target area),
        :func:`engine.matching.nonrigid.deform_onto`). Empty to skip.
    align_iterations : int
        ICP solves per smoothing length.
    coarse_above, coarse_vertices : int
        Intrinsic mode with the alignment: when either shape has more than
        ``coarse_above`` vertices, the spectral map and the alignment run on
        copies simplified to ``coarse_vertices`` (0: never).
    """

    k: int = 60
    k_start: int = 20
    step: int = 10
    product_K: int = PRODUCT_K
    product_order: int = 3
    overlap_radius: float = 3.0
    overlap_threshold: float = 0.9
    landmark_weight: float = 1.0
    commute: float = 0.1
    orient: float = 1e-3
    align_steps: tuple[float, ...] = (0.1, 0.05, 0.02, 0.01, 0.005)
    align_iterations: int = 3
    coarse_above: int = 10000
    coarse_vertices: int = 5000


@dataclass
class ModeResult:
    """A point map from target vertices to the source surface, as one mode found it.

    Attributes
    ----------
    triangle : (n_t,) int64 array
        Source triangle per target vertex.
    barycentric : (n_t, 3) float64 array
    vertex : (n_t,) int64 array
        A source vertex per target vertex (for the round trip).
    back : (n_s,) int64 array
        The reverse map: a target vertex per source vertex.
    basis_size : int
        Size of the eigenbases of the final functional map.
    timings, sizes, stats : dict
        Seconds per stage; sizes of the product embedding; other JSON-able
        entries for :attr:`Correspondence.stats`.
    why : str
        Appended to the correspondence's reason ("" for nothing).
    """

    triangle: NDArray[np.int64]
    barycentric: NDArray[np.float64]
    vertex: NDArray[np.int64]
    back: NDArray[np.int64]
    basis_size: int
    timings: dict[str, float] = field(default_factory=dict)
    sizes: dict[str, Any] = field(default_factory=dict)
    stats: dict[str, Any] = field(default_factory=dict)
    why: str = ""
