"""Accuracy metrics on ground-truth pairs (tests/pairs.py), shared by the tests and the benchmarks.

The README's accuracy table (benchmarks/transfer_accuracy.py) is printed with
these functions. A pair ``p`` has rest positions ``p.source_rest`` and
``p.target_rest`` per original vertex, where rest positions of corresponding
points coincide; ``c`` is a :class:`engine.matching.correspondence.Correspondence`
from the pair's source Shape to its target Shape.

colour RMSE
    Root mean square, over every target vertex and channel, of the carried
    colour minus the true colour: ``sqrt(mean((carried - truth) ** 2))``.
mask error
    Fraction of target vertices whose carried mask (or label) differs from
    the true one.
map error
    Per target vertex: the distance between the rest position of the point
    the map sends it to (barycentric on a source triangle) and the vertex's
    own rest position, divided by ``sqrt(source area)`` so that it is
    scale-free. Its mean over the target's vertices is the table's figure.
"""

from __future__ import annotations

import numpy as np


def colour_rmse(carried, truth) -> float:
    """Root mean square of ``carried - truth`` over all vertices and channels."""
    d = np.asarray(carried, dtype=np.float64) - np.asarray(truth, dtype=np.float64)
    return float(np.sqrt((d ** 2).mean()))


def mask_error(carried, truth) -> float:
    """Fraction of vertices whose carried mask or label differs from the true one."""
    return float((np.asarray(carried) != np.asarray(truth)).mean())


def map_errors(p, c) -> np.ndarray:
    """(n_t_clean,) per cleaned target vertex: rest distance of its mapped point from its true one, over sqrt(source area)."""
    rest = p.source_rest[c.source.prepared.from_clean][c.source.faces[c.triangle]]
    pts = np.einsum("ij,ijk->ik", c.barycentric, rest)
    return np.asarray(np.linalg.norm(pts - p.target_rest[c.target.prepared.from_clean], axis=1)
                      / np.sqrt(c.source.area))


def map_error(p, c) -> float:
    """Mean of :func:`map_errors` over the target's vertices."""
    return float(map_errors(p, c).mean())


def unblended_labels(c, labels, carried) -> np.ndarray:
    """Per target vertex: is ``carried`` the heaviest label among the corners of its source triangle?

    The definition of carrying a label without blending (common practice): each
    target vertex takes the label with the largest summed barycentric weight over
    the corners of the source triangle it maps to, so it is always one of those
    corners' labels and never a value in between. ``c`` is the Correspondence,
    ``labels`` the per-original-source-vertex labels, ``carried`` per original
    target vertex.
    """
    tri = c.target.restore(c.triangle)
    bary = c.target.restore(c.barycentric)
    corner = labels[c.source.prepared.from_clean[c.source.faces[tri]]]
    weight = np.array([(bary * (corner == corner[:, [j]])).sum(axis=1) for j in range(3)]).T
    mine = (bary * (corner == np.asarray(carried)[:, None])).sum(axis=1)
    return mine >= weight.max(axis=1) - 1e-9
