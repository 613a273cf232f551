"""The dense solver (LAPACK on the whole problem, for small meshes) and the
exact constants that replace a computed null space."""

from __future__ import annotations

from typing import Any

import numpy as np
import scipy.linalg as la
import scipy.sparse as sp
from numpy.typing import NDArray

Array = NDArray[Any]

__all__ = ["exact_constants", "m_orthonormalize", "solve_dense"]


def solve_dense(L: sp.csr_matrix, m: Array, p: int, Z: Array) -> tuple[Array, Array]:
    """The ``p`` lowest eigenpairs of ``L x = lambda diag(m) x`` by
    ``scipy.linalg.eigh``: eigenvalues (p,) and M-orthonormal eigenvectors
    (n, p), the constants ``Z`` (n, ncomp) exactly in front."""
    A = L.toarray()
    # Solve in the mass-scaled variable y = M^(1/2) x: a standard symmetric
    # problem, so LAPACK's evr driver with an index subset applies.
    r = 1.0 / np.sqrt(m)
    S = A * r[:, None] * r[None, :]
    lam, Y = la.eigh(S, subset_by_index=[0, p - 1], driver="evr")
    return exact_constants(L, m, Y * r[:, None], Z, p)


def exact_constants(L: sp.csr_matrix, m: Array, X: Array, Z: Array, p: int) -> tuple[Array, Array]:
    """Replace the first ``ncomp`` columns of the eigenvectors ``X`` (n, >= p)
    by the exact per-component constants ``Z`` (n, ncomp), keep the rest
    M-orthogonal to them and rotate it by Rayleigh-Ritz. Returns eigenvalues
    (p,) ascending with exact zeros first, and (n, p) eigenvectors."""
    ncomp = Z.shape[1]
    if ncomp >= p:
        return np.zeros(p), Z[:, :p].copy()
    rest = X[:, ncomp:p]
    rest = rest - Z @ (Z.T @ (m[:, None] * rest))
    rest = m_orthonormalize(rest, m)
    H = rest.T @ (L @ rest)
    th, W = la.eigh((H + H.T) * 0.5)
    return np.concatenate([np.zeros(ncomp), th]), np.hstack([Z, rest @ W])


def m_orthonormalize(X: Array, m: Array) -> Array:
    """M-orthonormal columns spanning those of the near M-orthonormal ``X`` (n, c)."""
    G = X.T @ (m[:, None] * X)
    C = la.cholesky((G + G.T) * 0.5, lower=False)
    # X C^-1 as one matrix product: C is well conditioned here
    out: Array = X @ la.solve_triangular(C, np.eye(C.shape[0]), lower=False)
    return out
