"""The own sparse solver: shift-invert block Lanczos, first with a shift inside
the wanted part of the spectrum, else (or when that fails) with one below it.

Interior shift: ``sigma`` at ``INTERIOR`` times Weyl's estimate of the last
wanted eigenvalue (``lambda_j ~ 4 pi j / area`` on a surface, Weyl 1911), so
the operator's eigenvalues ``1 / (lambda - sigma)`` are largest in magnitude
on both sides of ``sigma`` and the last wanted ones are better separated from
the unwanted ones than with a shift below ``lambda_1``. ``L - sigma M`` is then
indefinite; the factor's inertia (Sylvester) counts the eigenvalues below
``sigma`` exactly, the shift is lowered when more than ``INTERIOR_MAX`` of the
wanted pairs lie below it, and the result is accepted only if exactly that
many computed eigenvalues lie below ``sigma``, so no member of a cluster there
can be dropped unnoticed. A factor with a backward error above
``BACKWARD_MAX`` (a block nearly singular at this shift) or a count that
disagrees falls back to the shift below ``lambda_1``, where the matrix is
positive definite. Figures: docs/measurements.md, "Eigensolver".
"""

from __future__ import annotations

import dataclasses
import time
from typing import Any

import numpy as np
import scipy.sparse as sp
from numpy.typing import NDArray

from .factor import BlockFactor, ShiftFailed, scaled_shifted
from .final import assemble
from .iteration import ShiftedOperator, lanczos, plan_iteration
from .ordering import graph_pattern, nested_dissection

Array = NDArray[Any]

INTERIOR, INTERIOR_MAX = 0.4, 0.5
# Largest normwise backward error accepted from the indefinite factor (the
# positive definite one reaches about 1e-16).
BACKWARD_MAX = 1e-10

__all__ = ["BACKWARD_MAX", "INTERIOR", "INTERIOR_MAX", "Problem", "Solution", "solve_shift_invert"]


@dataclasses.dataclass(frozen=True)
class Problem:
    """A validated request: ``L`` (n, n) symmetric CSR, ``m`` (n,) positive,
    ``Z`` (n, ncomp) the M-orthonormal constants of the components, ``p``
    pairs computed of which the first ``k`` are returned, the sparse solver's
    ``seed`` and ``tol``."""

    L: sp.csr_matrix
    m: Array
    Z: Array
    p: int
    k: int
    seed: int
    tol: float


@dataclasses.dataclass
class Solution:
    """Eigenvalues (p,) ascending, eigenvectors (n, c) with ``c >= k``
    (original vertex order), residuals (at least k) or None when the caller
    is to compute them, and statistics (``converged`` among them)."""

    eigenvalues: Array
    eigenvectors: Array
    residuals: Array | None
    stats: dict[str, Any]


def solve_shift_invert(pb: Problem) -> Solution:
    """The own sparse solver (see the module docstring)."""
    stats: dict[str, Any] = {}
    L, m, Z = pb.L, pb.m, pb.Z
    ncomp = Z.shape[1]
    want = pb.p - ncomp  # non-zero pairs to compute
    if want <= 0:
        return Solution(np.zeros(pb.p), Z[:, :pb.p].copy(), None, {"converged": True, "solves": 0})
    t = time.perf_counter()
    perm, bounds = nested_dissection(graph_pattern(L), m)
    # The whole iteration runs in elimination order, so no solve permutes its right-hand sides
    inv = np.empty_like(perm)
    inv[perm] = np.arange(perm.size)
    L, m, Z = L[perm][:, perm].tocsr(), m[perm], Z[perm]
    stats["t_order"] = time.perf_counter() - t
    plan = plan_iteration(m.shape[0], ncomp, pb.p, pb.k, pb.tol)
    op = interior_operator(L, m, bounds, ncomp, want, stats)
    if op is not None:
        try:
            lam, X, more, res = lanczos(L, m, Z, op, plan, pb.seed)
            stats.update(more)
            return Solution(lam, assemble(Z, X, inv, pb.k), res, stats)
        except ShiftFailed as e:
            stats["interior_failed"] = str(e)
    t = time.perf_counter()
    shift = float(L.diagonal().mean() / m.sum())  # about 1/area: below lambda_1 for surfaces
    op = ShiftedOperator(remake=lambda: BlockFactor(scaled_shifted(L, m, shift), None, bounds, definite=True),
                         factor=None, shift=shift, below=None)
    op.get()
    stats["t_factor"] = stats.get("t_factor", 0.0) + time.perf_counter() - t
    lam, X, more, res = lanczos(L, m, Z, op, plan, pb.seed)
    stats.update(more)
    return Solution(lam, assemble(Z, X, inv, pb.k), res, stats)


def interior_operator(L: sp.csr_matrix, m: Array, bounds: Array, ncomp: int, want: int,
                      stats: dict[str, Any]) -> ShiftedOperator | None:
    """The factored operator at an interior shift (``L``, ``m`` in
    elimination order, ``bounds`` its blocks, ``want`` non-zero pairs), or
    None when no accurate factor with few enough eigenvalues below the shift
    was found (the reason in ``stats["interior_failed"]``)."""
    t = time.perf_counter()
    sigma = INTERIOR * 4.0 * np.pi * want / m.sum()
    fac: BlockFactor | None = None
    below = 0
    for _ in range(3):
        try:
            fac = BlockFactor(scaled_shifted(L, m, -sigma), None, bounds, definite=False)
        except ShiftFailed as e:
            stats["interior_failed"] = str(e)
            fac = None
            break
        below = fac.negative - ncomp
        if below <= INTERIOR_MAX * want:
            break
        sigma *= INTERIOR * want / below
        fac = None
    else:
        stats["interior_failed"] = "too many eigenvalues below every shift tried"
    if fac is not None:
        err = fac.backward_error()
        if err > BACKWARD_MAX:
            stats["interior_failed"] = f"backward error {err:.2g} of the factor"
            fac = None
    stats["t_factor"] = time.perf_counter() - t
    if fac is None:
        return None
    stats.update({"interior_shift": float(sigma), "below_shift": int(below)})
    return ShiftedOperator(
        remake=lambda: BlockFactor(scaled_shifted(L, m, -sigma), None, bounds, definite=False),
        factor=fac, shift=-sigma, below=below)
