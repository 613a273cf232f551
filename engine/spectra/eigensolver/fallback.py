"""The sparse path behind one narrow interface: the own solver, and
``scipy.sparse.linalg.eigsh`` when it does not converge or fails inside.

The fallback follows the hazards of docs/platform.md for ARPACK shift-invert:
``tol=0``, more pairs asked than kept, and a seeded start vector (a member of
a degenerate cluster can otherwise be dropped). Its shift lies below
``lambda_1``, so ``L - sigma M`` is positive definite. Whatever goes wrong in
it becomes a RuntimeError naming both failures, never a stray exception.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as sla
from numpy.typing import NDArray

from .dense import exact_constants, solve_dense
from .final import pair_residuals
from .shifted import Problem, Solution, solve_shift_invert

Array = NDArray[Any]

# Pairs asked of eigsh beyond the ones kept.
EIGSH_EXTRA = 8

__all__ = ["EIGSH_EXTRA", "solve_sparse", "solve_with_eigsh"]


def solve_sparse(pb: Problem) -> Solution:
    """The own solver's answer when it converges, else the fallback's
    (``stats["fallback"]`` says why). A ValueError about the input (a
    stiffness that is not positive semidefinite) passes through; a failure
    of both solvers is a RuntimeError naming both."""
    own, reason = run_own(pb)
    if own is not None and reason is None:
        return own
    try:
        fb = solve_with_eigsh(pb)
    except RuntimeError as e:
        if own is None:
            raise RuntimeError(f"eigensolver failed: {reason}; {e}") from e
        own.stats["fallback"] = reason
        own.stats["fallback_failed"] = str(e)
        return own
    fb.stats["fallback"] = reason
    if own is not None:
        fb.stats["own_solver"] = {key: own.stats[key] for key in ("solves", "cycles", "retries",
                                                                    "worst_residual_estimate")
                                  if key in own.stats}
    return fb


def run_own(pb: Problem) -> tuple[Solution | None, str | None]:
    """The own solver's answer (None if it failed inside) and why the
    fallback must run (None when the answer converged)."""
    try:
        own = solve_shift_invert(pb)
    except MemoryError:
        raise
    except Exception as e:  # the narrow interface: an internal failure goes to the fallback
        if isinstance(e, ValueError) and not isinstance(e, np.linalg.LinAlgError):
            raise  # a problem with the input, not with the solver
        return None, f"the block Lanczos solver failed ({type(e).__name__}: {e})"
    if own.stats.get("converged"):
        return own, None
    worst = float(own.residuals.max()) if own.residuals is not None else float("nan")
    return own, f"the block Lanczos solver did not converge (worst residual {worst:.2g}, tol {pb.tol:g})"


def solve_with_eigsh(pb: Problem) -> Solution:
    """``pb.p`` pairs by ARPACK shift-invert (residuals of the first ``pb.k``
    computed here); a RuntimeError on any failure inside."""
    try:
        return eigsh_pairs(pb)
    except MemoryError:
        raise
    except Exception as e:  # the narrow interface: nothing else escapes
        raise RuntimeError(f"the fallback solver (scipy.sparse.linalg.eigsh) failed: "
                           f"{type(e).__name__}: {e}") from e


def eigsh_pairs(pb: Problem) -> Solution:
    """See :func:`solve_with_eigsh`; raises whatever ARPACK or SuperLU raise."""
    L, m, Z = pb.L, pb.m, pb.Z
    n = m.shape[0]
    q = min(pb.p + EIGSH_EXTRA, n - 2)  # ARPACK needs fewer than n - 1 pairs
    if q < pb.k:  # too few vertices for ARPACK: the dense solver is exact there
        lam, X = solve_dense(L, m, pb.p, Z)
        method = "dense"
    else:
        shift = float(L.diagonal().mean() / m.sum())  # about 1/area: below lambda_1 for surfaces
        v0 = np.random.default_rng(pb.seed).standard_normal(n)
        mu, V = sla.eigsh(L.tocsc(), k=q, M=sp.diags(m).tocsc(), sigma=-shift, which="LM", tol=0, v0=v0)
        if not (np.isfinite(mu).all() and np.isfinite(V).all()):
            raise RuntimeError("non-finite eigenpairs")
        o = np.argsort(mu, kind="stable")
        lam, X = exact_constants(L, m, V[:, o], Z, min(pb.p, q))
        method = "eigsh"
    Xk = np.ascontiguousarray(X[:, :pb.k])
    lk = np.maximum(lam[:pb.k], 0.0)
    res = pair_residuals(L @ Xk, m, lk, Xk)
    nonzero = res[Z.shape[1]:]
    converged = bool(nonzero.size == 0 or nonzero.max() <= pb.tol)
    return Solution(lam, X, res, {"converged": converged, "fallback_method": method})
