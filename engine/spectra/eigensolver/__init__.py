"""The eigenbasis: low eigenpairs of ``L phi = lambda M phi``.

``L`` is the positive semidefinite stiffness matrix and ``M = diag(mass)`` the
lumped mass (see :mod:`engine.spectra.laplacian`). The basis everything else
is built on is the ``k`` eigenpairs of smallest eigenvalue, with these
conventions (DEVELOPERS.md):

- eigenvalues ascending; one zero eigenvalue per connected component, returned
  as exactly 0 with an eigenvector that is constant on its component;
- eigenvectors mass-orthonormal, ``Phi^T M Phi = I``;
- a deterministic sign: in every eigenvector the entry of largest magnitude
  (lowest index on exact ties) is positive;
- relative residuals ``||L phi - lambda M phi||_2 / (lambda ||M phi||_2)``
  (``||L phi||_2 / ||M phi||_2`` for a zero eigenvalue) reported per pair.

Solvers, one module per stage:

dense (:mod:`.dense`)
    ``scipy.linalg.eigh`` on the full problem, up to ``DENSE_MAX`` vertices.
    Exact to rounding, so no cluster can be missed.
sparse (:mod:`.fallback`, the narrow interface)
    The own solver (:mod:`.shifted`): a thick-restarted block Lanczos
    iteration (:mod:`.iteration`) on the shift-inverted operator with full
    re-orthogonalisation, deflated against the constants of the components,
    with the shifted matrix factored once by a multifrontal block
    ``L D L^T`` (:mod:`.factor`) on a nested-dissection ordering
    (:mod:`.ordering`), so that a block of right-hand sides is solved with
    matrix-matrix products; purification, the final Rayleigh-Ritz and the
    assembly in :mod:`.final`. Starting blocks wider than any eigenvalue
    cluster, extra pairs beyond ``k`` and a residual test on all of them keep
    every member of a degenerate cluster (ARPACK's shift-invert mode can drop
    one, docs/platform.md). When it does not converge, or fails inside,
    ``scipy.sparse.linalg.eigsh`` answers instead (``info["fallback"]`` says
    why).

Cluster at the cut: ``k`` is never changed. When eigenvalue ``k`` (0-based,
the first one not returned) lies within a relative ``cluster_gap`` of
eigenvalue ``k - 1``, the last cluster is split; this is recorded in
``info["split_cluster"]`` as ``(first, last)`` indices of the whole cluster in
the computed spectrum (``last >= k``); no warning is raised (callers that
care read ``info``).

``SOLVER_VERSION`` changes whenever the solver's results may change; caches
of eigenbases key on it. Measured speeds and the figures behind the solver's
constants: docs/measurements.md, "Eigensolver".
"""

from __future__ import annotations

import time
from typing import Any

import numpy as np
import scipy.sparse.csgraph as csgraph

from .basis import Eigenbasis
from .dense import solve_dense
from .fallback import solve_sparse
from .final import pair_residuals, signs, split_cluster
from .inputs import check_request, constant_modes, validate_problem
from .ordering import graph_pattern
from .shifted import Problem, Solution

__all__ = ["DENSE_MAX", "SOLVER_VERSION", "Eigenbasis", "eigenbasis"]

SOLVER_VERSION = 2  # 2: the package with the eigsh fallback
# Up to this many vertices the dense LAPACK solver is used (docs/measurements.md).
DENSE_MAX = 1000


def eigenbasis(stiffness: Any, mass: Any, k: int, *, seed: int = 0, tol: float = 1e-5,
               method: str = "auto", cluster_gap: float = 1e-6) -> Eigenbasis:
    """The ``k`` eigenpairs of smallest eigenvalue of ``L phi = lambda M phi``.

    Parameters
    ----------
    stiffness : (n, n) sparse or dense float matrix
        Symmetric positive semidefinite ``L``.
    mass : (n,) float array
        Strictly positive lumped mass (the diagonal of ``M``).
    k : int
        Number of eigenpairs, ``1 <= k < n``.
    seed : int
        Seed of the random starting block of the sparse solver. Results are
        deterministic for a given seed, and eigenvalues and the spans of
        eigenvalue clusters agree across seeds to within ``tol``.
    tol : float
        Target relative residual ``||L phi - lambda M phi|| / (lambda ||M phi||)``
        of every returned non-zero pair (sparse solver). The eigenvalue error is
        then of order ``tol**2`` relative for a well separated eigenvalue (and
        the spans of eigenvalue clusters are as accurate), the eigenvector
        error of order ``tol / relative gap``. The default 1e-5 keeps
        eigenvalues good to about 1e-10 relative, far below the discretisation
        error of any mesh (docs/platform.md). The dense solver is exact to
        rounding and ignores it. Values below about 1e-11 may not be
        reachable; the residuals reached are in ``residuals`` and
        ``info["converged"]``.
    method : {"auto", "dense", "sparse"}
        ``"auto"`` uses the dense solver up to ``DENSE_MAX`` vertices.
    cluster_gap : float
        Two eigenvalues whose gap is below ``cluster_gap * max(|lambda|, 1)``
        belong to one cluster (for reporting a cluster split at ``k``).

    Returns
    -------
    Eigenbasis

    Raises
    ------
    ValueError
        On a bad shape, a non-finite or non-positive mass, an asymmetric or
        non-finite stiffness, ``k`` out of range, an unknown method, or a
        stiffness that turns out not to be positive semidefinite.
    RuntimeError
        When both the own sparse solver and its fallback fail.
    """
    t0 = time.perf_counter()
    L, m = validate_problem(stiffness, mass)
    n = m.shape[0]
    k = check_request(k, n, method, tol)
    if method == "auto":
        method = "dense" if n <= DENSE_MAX else "sparse"
    ncomp, labels = csgraph.connected_components(graph_pattern(L), directed=False)
    Z = constant_modes(labels, ncomp, m)  # (n, ncomp), M-orthonormal
    p = min(n, k + max(8, k // 5))  # pairs computed beyond k for the cluster check
    info: dict[str, Any] = {"method": method, "components": int(ncomp), "cluster_gap": float(cluster_gap),
                            "computed": int(p), "solver_version": SOLVER_VERSION}
    if method == "dense":
        lam, X = solve_dense(L, m, p, Z)
        sol = Solution(lam, X, None, {"converged": True})
    else:
        sol = solve_sparse(Problem(L=L, m=m, Z=Z, p=p, k=k, seed=int(seed), tol=float(tol)))
    info.update(sol.stats)
    basis = finish(L, m, sol, k, ncomp, cluster_gap, info)
    info["seconds"] = time.perf_counter() - t0
    return basis


def finish(L: Any, m: Any, sol: Solution, k: int, ncomp: int, cluster_gap: float,
           info: dict[str, Any]) -> Eigenbasis:
    """The Eigenbasis of the first ``k`` pairs of ``sol``: the zero modes
    exactly 0, the cluster cut recorded in ``info``, residuals, signs."""
    lam = sol.eigenvalues
    scale = max(float(np.abs(lam).max()), 1.0)
    if lam[ncomp:].size and lam[ncomp:].min() < -1e-8 * scale:
        raise ValueError(f"stiffness matrix is not positive semidefinite: eigenvalue "
                         f"{lam[ncomp:].min():.3g} found")
    lam = np.where(np.arange(lam.size) < ncomp, 0.0, np.maximum(lam, 0.0))
    info["split_cluster"] = split_cluster(lam, k, cluster_gap)
    lam = lam[:k]
    X = np.ascontiguousarray(sol.eigenvectors[:, :k])
    if sol.residuals is None:
        res = pair_residuals(L @ X, m, lam, X)
    else:  # computed by the solver on the same vectors
        res = sol.residuals[:k]
    X *= signs(X)[None, :]
    return Eigenbasis(lam, X, m, res, info)
