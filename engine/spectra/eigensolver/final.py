"""The final stage: purified Ritz vectors, the last Rayleigh-Ritz, assembly in
the original vertex order, residuals, the sign convention and the cluster cut.

Arrays of shape ``(n, k)`` are updated in place in row chunks of ``ROWS``, so
that the final stage makes no temporary of the size of the basis (the reason
and the figures: docs/measurements.md, "Eigensolver").
"""

from __future__ import annotations

from typing import Any

import numpy as np
import scipy.linalg as la
import scipy.sparse as sp
from numpy.typing import NDArray

Array = NDArray[Any]

# Row chunk of the in-place updates of (n, k) arrays.
ROWS = 8192

__all__ = ["ROWS", "assemble", "final_ritz", "pair_residuals", "purified", "signs", "split_cluster"]


def purified(Q: Array, Y: Array, mu: Array, F: Array, lo: int, want: int) -> Array:
    """Ritz vectors purified by one more application of T.

    ``T x = mu x + F y_last`` in the scaled variable, for the first ``want``
    Ritz pairs ``(mu, Y)`` of the basis ``Q`` (n, m) with the remainder ``F``
    of its last block (columns ``lo:``). Returns a C-ordered (n, want) array
    (what ``L @ X`` and the row gathers after it read); no other ``(n, want)``
    array is made.
    """
    X = np.empty((Q.shape[0], want))
    np.matmul(Q, Y[:, :want] * mu[None, :want], out=X)
    Yl = Y[lo:, :want]
    for i in range(0, X.shape[0], ROWS):
        X[i:i + ROWS] += F[i:i + ROWS] @ Yl
    return X


def final_ritz(L: sp.csr_matrix, m: Array, Zt: Array, Xs: Array) -> tuple[Array, Array, Array]:
    """Rayleigh-Ritz on purified Ritz vectors in the original pencil.

    ``Xs`` (n, c) are purified vectors in the scaled variable (from
    :func:`purified`), deflated here exactly against the scaled constants
    ``Zt``; the pencil ``(X^T L X, X^T M X)`` gives M-orthonormal Ritz vectors
    in one step. ``X^T M X`` is the Gram matrix of the scaled vectors and
    ``L X`` is rotated along with ``X`` rather than recomputed. ``Xs`` is
    overwritten. Returns the Ritz values (c,), the vectors (n, c; C-ordered,
    original variable, elimination order) and their relative residuals (c,).
    """
    c = Zt.T @ Xs
    for i in range(0, Xs.shape[0], ROWS):  # in place, in row chunks: no (n, k) temporaries
        Xs[i:i + ROWS] -= Zt[i:i + ROWS] @ c
    G = Xs.T @ Xs
    X = Xs
    X /= np.sqrt(m)[:, None]
    LX: Array = L @ X
    Hf = X.T @ LX
    th, Yf = la.eigh((Hf + Hf.T) * 0.5, (G + G.T) * 0.5)
    for i in range(0, X.shape[0], ROWS):
        X[i:i + ROWS] = X[i:i + ROWS] @ Yf
        LX[i:i + ROWS] = LX[i:i + ROWS] @ Yf
    return th, X, pair_residuals(LX, m, np.maximum(th, 1e-300), X)


def assemble(Z: Array, X: Array, inv: Array, k: int) -> Array:
    """The first ``k`` eigenvectors, constants ``Z`` first, then the columns of
    ``X``, rows put back in the original order by the inverse permutation
    ``inv``, as one new C-contiguous (n, k) array (``np.take`` on C-ordered
    rows, in row chunks: no second (n, k) array)."""
    ncomp = Z.shape[1]
    out = np.empty((X.shape[0], k))
    out[:, :ncomp] = np.take(Z, inv, axis=0)[:, :k]
    for i in range(0, X.shape[0], ROWS):
        if k > ncomp:
            out[i:i + ROWS, ncomp:] = np.take(X, inv[i:i + ROWS], axis=0)[:, :k - ncomp]
    return out


def pair_residuals(LX: Array, m: Array, lam: Array, X: Array, rows: int = ROWS) -> Array:
    """Relative residuals ``||L x - lambda M x|| / (lambda ||M x||)`` (the
    denominator without ``lambda`` for ``lambda = 0``) of the first
    ``lam.size`` columns of ``X`` (n, c) from ``X`` and ``L X``, summed over
    row chunks so that no temporary of the size of ``X`` is made."""
    c = lam.size
    num = np.zeros(c)
    den = np.zeros(c)
    for i in range(0, X.shape[0], rows):
        MX = X[i:i + rows, :c] * m[i:i + rows, None]
        R = LX[i:i + rows, :c] - MX * lam[None, :]
        num += np.einsum("ij,ij->j", R, R)
        den += np.einsum("ij,ij->j", MX, MX)
    out: Array = np.sqrt(num) / (np.sqrt(den) * np.where(lam > 0, lam, 1.0))
    return out


def signs(X: Array) -> Array:
    """+-1 per column of ``X`` (n, k) making its entry of largest magnitude
    positive (the one of lowest index where a positive and a negative entry
    tie)."""
    hi, lo = X.max(axis=0), X.min(axis=0)  # two reductions, not argmax(abs(X))
    s = np.where(hi >= -lo, 1.0, -1.0)
    for j in np.flatnonzero((hi == -lo) & (hi != 0)):
        s[j] = 1.0 if X[np.argmax(np.abs(X[:, j])), j] > 0 else -1.0
    return s


def split_cluster(lam: Array, k: int, gap: float) -> tuple[int, int] | None:
    """(first, last) indices of the eigenvalue cluster straddling the cut at
    ``k`` in the ascending ``lam``, or None. Neighbours closer than
    ``gap * max(|lambda|, 1)`` belong to one cluster."""
    if k >= lam.size:
        return None
    tol = gap * max(abs(float(lam[k])), 1.0)
    if lam[k] - lam[k - 1] > tol:
        return None
    first = k - 1
    while first > 0 and lam[first] - lam[first - 1] <= gap * max(abs(float(lam[first])), 1.0):
        first -= 1
    last = k
    while last + 1 < lam.size and lam[last + 1] - lam[last] <= gap * max(abs(float(lam[last + 1])), 1.0):
        last += 1
    return (int(first), int(last))
