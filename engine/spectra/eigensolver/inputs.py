"""Checks of the eigenproblem's inputs, each failure a ValueError naming the problem."""

from __future__ import annotations

from typing import Any

import numpy as np
import scipy.sparse as sp
from numpy.typing import NDArray

Array = NDArray[Any]

METHODS = ("auto", "dense", "sparse")

__all__ = ["METHODS", "check_request", "constant_modes", "validate_problem"]


def validate_problem(stiffness: Any, mass: Any) -> tuple[sp.csr_matrix, Array]:
    """``(L, m)``: the stiffness as a symmetric (n, n) CSR float64 matrix with
    sorted indices (exactly symmetrised), the mass as (n,) float64."""
    m = validate_mass(mass)
    n = m.shape[0]
    L = sp.csr_matrix(stiffness, dtype=np.float64) if sp.issparse(stiffness) else None
    if L is None:
        a = np.asarray(stiffness)
        if a.dtype == object or a.ndim != 2:
            raise ValueError(f"stiffness must be a 2-D matrix, got shape {a.shape}")
        L = sp.csr_matrix(a.astype(np.float64))
    if L.shape != (n, n):
        raise ValueError(f"stiffness has shape {L.shape} but mass has {n} entries; expected ({n}, {n})")
    if not np.isfinite(L.data).all():
        raise ValueError("stiffness has non-finite entries")
    return symmetrized(L), m


def validate_mass(mass: Any) -> Array:
    """The lumped mass as (n,) float64, every entry finite and positive, n >= 2."""
    m = np.asarray(mass)
    if m.dtype == object or not (np.issubdtype(m.dtype, np.floating) or np.issubdtype(m.dtype, np.integer)):
        raise ValueError(f"mass must be a numeric array, got dtype {m.dtype}")
    m = np.asarray(m, dtype=np.float64)
    if m.ndim != 1:
        raise ValueError(f"mass must be a 1-D array of shape (n,), got shape {m.shape}")
    n = m.shape[0]
    if n < 2:
        raise ValueError(f"need at least 2 vertices, got n={n}")
    bad = ~np.isfinite(m)
    if bad.any():
        raise ValueError(f"mass entry {int(np.flatnonzero(bad)[0])} is not finite "
                         f"({int(bad.sum())} such entries)")
    bad = m <= 0
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise ValueError(f"mass entry {i} is {m[i]:g}; every mass must be positive "
                         f"({int(bad.sum())} entries are not; vertices in no triangle?)")
    return m


def symmetrized(L: sp.csr_matrix) -> sp.csr_matrix:
    """``(L + L^T) / 2`` as a new CSR matrix with sorted indices; a ValueError
    when ``L`` is not symmetric to 1e-10 of its largest entry."""
    L = L.copy()
    L.sum_duplicates()  # also sorts the indices
    Lt = L.T.tocsr()
    Lt.sort_indices()
    scale = float(np.abs(L.data).max()) if L.nnz else 0.0
    if np.array_equal(L.indptr, Lt.indptr) and np.array_equal(L.indices, Lt.indices):
        # symmetric pattern (the usual case): compare and average the values in place
        gap = float(np.abs(L.data - Lt.data).max()) if L.nnz else 0.0
        L.data += Lt.data
        L.data *= 0.5
    else:
        asym = abs(L - Lt)
        gap = float(asym.max()) if asym.nnz else 0.0
        L = ((L + Lt) * 0.5).tocsr()
        L.sort_indices()
    if gap > 1e-10 * max(scale, 1e-300):
        raise ValueError(f"stiffness must be symmetric; largest asymmetry {gap:.3g} "
                         f"against largest entry {scale:.3g}")
    return L


def check_request(k: Any, n: int, method: str, tol: float) -> int:
    """``k`` as an int after checking it, ``method`` and ``tol`` (ValueError otherwise)."""
    if isinstance(k, bool) or not isinstance(k, (int, np.integer)):
        raise ValueError(f"k must be an integer, got {k!r}")
    count = int(k)
    if count < 1:
        raise ValueError(f"k must be at least 1, got k={count}")
    if count >= n:
        raise ValueError(f"k={count} eigenpairs requested but the mesh has only n={n} vertices")
    if method not in METHODS:
        raise ValueError(f"unknown method {method!r}; expected 'auto', 'dense' or 'sparse'")
    if not (np.isfinite(tol) and tol > 0):
        raise ValueError(f"tol must be a positive number, got {tol!r}")
    return count


def constant_modes(labels: Array, ncomp: int, m: Array) -> Array:
    """(n, ncomp): the indicator of each component scaled to unit mass norm;
    components ordered by their lowest vertex index (as
    ``scipy.sparse.csgraph.connected_components`` numbers them)."""
    n = labels.shape[0]
    Z = np.zeros((n, ncomp))
    Z[np.arange(n), labels] = 1.0
    Z /= np.sqrt(np.bincount(labels, weights=m, minlength=ncomp))[None, :]
    return Z
