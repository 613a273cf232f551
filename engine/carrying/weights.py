"""Vertex-group weights carried together, as a rig needs them.

Skinning weights are a set of groups whose weights at each vertex usually add
up to 1 (a partition of unity) with only a few non-zero influences per vertex
(game engines commonly allow 4; common practice). Carrying each group on its
own loses both: a basis rings below 0 and above 1, and clamping the ringing
changes the sums; interpolation on a source triangle unites the influences of
its three corners.

:func:`carry_weights` carries all groups through one :class:`Transfer` and then

1. clamps every weight to [0, 1];
2. when the source's groups form a partition of unity (every source vertex
   sums to 1 within :data:`PARTITION_TOLERANCE`), divides each target
   vertex's weights by their sum, so they sum to 1 with every basis;
3. drops weights below ``threshold`` (the largest weight of a vertex always
   stays);
4. keeps the ``max_influences`` largest weights per vertex (0: as many as the
   source has at most at one vertex);
5. with ``keep_totals``, scales what is left so each vertex's total is what it
   was before steps 3-4 (1 for a partition of unity), never above 1.

No weight ever leaves [0, 1].
"""

from __future__ import annotations

from collections.abc import Mapping

import time
from dataclasses import dataclass
from typing import Any, cast

import numpy as np
from numpy.typing import ArrayLike, NDArray

from .signals import check_signal
from .transfer import Transfer, TransferResult

__all__ = ["PARTITION_TOLERANCE", "WeightOptions", "is_partition", "influence_counts", "limit_influences",
           "carry_weights"]

PARTITION_TOLERANCE = 1e-4


@dataclass(frozen=True)
class WeightOptions:
    """How carried vertex groups are cleaned up on the target.

    Attributes
    ----------
    max_influences : int
        Most groups a target vertex keeps; 0 means as many as the source has
        at most at one vertex.
    threshold : float
        Weights below this are dropped, in [0, 1).
    keep_totals : bool
        After dropping, scale the remaining weights of each vertex back to
        its total (1 for weights that sum to 1 on the source).
    """

    max_influences: int = 0
    threshold: float = 0.0
    keep_totals: bool = True

    def __post_init__(self) -> None:
        if int(self.max_influences) != self.max_influences or self.max_influences < 0:
            raise ValueError(f"max influences must be a whole number >= 0 (0: as on the source), "
                             f"got {self.max_influences}")
        if not (np.isfinite(self.threshold) and 0.0 <= self.threshold < 1.0):
            raise ValueError(f"weight threshold must be in [0, 1), got {self.threshold}")


def is_partition(weights: NDArray[np.float64], tolerance: float = PARTITION_TOLERANCE) -> bool:
    """True when every row of ``weights`` (n, g) sums to 1 within ``tolerance``."""
    return bool(np.all(np.abs(weights.sum(axis=1) - 1.0) <= tolerance))


def influence_counts(weights: NDArray[np.float64]) -> NDArray[np.int64]:
    """(n,) number of non-zero weights per row."""
    counts: NDArray[np.int64] = np.count_nonzero(weights, axis=1).astype(np.int64)
    return counts


def limit_influences(weights: NDArray[np.float64], totals: NDArray[np.float64], *, max_influences: int,
                     threshold: float, keep_totals: bool) -> NDArray[np.float64]:
    """Steps 3-5 of the module docstring on clamped weights (n, g); returns a new array.

    Parameters
    ----------
    weights : (n, g) float64 in [0, 1]
    totals : (n,) float64
        What each row is scaled back to with ``keep_totals``.
    max_influences : int
        At least 1.
    threshold : float
    keep_totals : bool
    """
    w = np.array(weights, dtype=np.float64)
    rows = np.arange(len(w))
    largest = np.argmax(w, axis=1)
    drop = w < threshold
    drop[rows, largest] = False
    w[drop] = 0.0
    if w.shape[1] > max_influences:
        # everything but the max_influences largest of each row
        rest = np.argpartition(-w, max_influences - 1, axis=1)[:, max_influences:]
        w[rows[:, None], rest] = 0.0
    if keep_totals:
        sums = w.sum(axis=1)
        scale = np.divide(totals, sums, out=np.ones_like(sums), where=sums > 0)
        w *= scale[:, None]
    return np.clip(w, 0.0, 1.0)


def _stack(groups: Mapping[str, ArrayLike], n: int) -> NDArray[np.float64]:
    columns = []
    for name, values in groups.items():
        a = check_signal(name, values, n, "weight")
        if a.ndim != 1:
            raise ValueError(f"vertex group {name!r} must hold one weight per vertex, got shape {a.shape}")
        if a.min() < 0.0 or a.max() > 1.0:
            raise ValueError(f"vertex group {name!r} has weights outside [0, 1] "
                             f"([{a.min():g}, {a.max():g}])")
        columns.append(a)
    return np.column_stack(columns)


def carry_weights(transfer: Transfer, groups: Mapping[str, ArrayLike],
                  options: WeightOptions | None = None) -> tuple[dict[str, TransferResult], dict[str, Any]]:
    """Carry vertex groups together (module docstring).

    Parameters
    ----------
    transfer : Transfer
    groups : dict name -> (n_s_original,) weights in [0, 1]
    options : WeightOptions, optional

    Returns
    -------
    results : dict name -> TransferResult
        Values per original target vertex, float64 in [0, 1].
    report : dict
        JSON-able: whether the source is a partition of unity, the source's
        and the target's most influences per vertex, the options used, how
        many weights were dropped, the target's largest deviation of a sum
        from 1 (for a partition).
    """
    if not groups:
        raise ValueError("no vertex groups to carry")
    opts = options or WeightOptions()
    t0 = time.perf_counter()
    source, target = transfer.source, transfer.target
    weights = _stack(groups, source.n_original)
    clean = np.asarray(source.to_cleaned(weights), dtype=np.float64)
    partition = is_partition(clean)
    source_most = int(influence_counts(clean).max())
    raw, errors = transfer.linear(clean)
    out = np.clip(raw, 0.0, 1.0)
    if partition:
        sums = out.sum(axis=1)
        empty = sums <= 0.0
        if empty.any():  # every weight rang below zero: take the interpolated ones there
            out[empty] = np.asarray(cast(Any, transfer.correspondence).matrix() @ clean)[empty]
            sums = out.sum(axis=1)
        out /= sums[:, None]
        totals = np.ones(len(out))
    else:
        totals = np.minimum(out.sum(axis=1), 1.0)
    before = int(np.count_nonzero(out))
    limit = int(opts.max_influences) or max(source_most, 1)
    out = limit_influences(out, totals, max_influences=limit, threshold=opts.threshold,
                           keep_totals=opts.keep_totals)
    if not np.isfinite(out).all():  # never write NaN
        raise ValueError("carrying the vertex groups produced non-finite weights")
    restored = np.asarray(target.restore(out), dtype=np.float64)
    seconds = round(time.perf_counter() - t0, 4)
    report: dict[str, Any] = {
        "groups": list(groups), "partition_of_unity": partition, "source_most_influences": source_most,
        "max_influences": limit, "threshold": float(opts.threshold), "keep_totals": bool(opts.keep_totals),
        "target_most_influences": int(influence_counts(out).max()),
        "dropped_weights": before - int(np.count_nonzero(out)), "seconds": seconds,
    }
    if partition:
        report["largest_sum_error"] = float(np.abs(out.sum(axis=1) - 1.0).max())
    results = {name: TransferResult(restored[:, i], float(errors[i]),
                                    {"name": name, "kind": "weight", "basis": transfer.basis,
                                     "source_error": float(errors[i]), "seconds": seconds})
               for i, name in enumerate(groups)}
    return results, report
