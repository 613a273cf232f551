"""Multifrontal block ``L D L^T`` factorisation of a symmetric sparse matrix.

``P A P^T = L D L^T`` with ``L`` unit lower triangular by blocks and ``D``
block diagonal, one block per nested-dissection block, all kept in dense
blocks so that many right-hand sides are solved with matrix-matrix products
(BLAS-3). Multifrontal (Duff and Reid 1983; Liu 1992, "The multifrontal method
for sparse matrix solution"), each nested-dissection block one supernode: the
front of block ``B`` holds ``A``'s entries in ``B``'s columns and the update
matrices of the blocks whose first off-block row falls in ``B``; its leading
part ``F11`` is ``D[B, B]``, ``L[R, B] = F21 F11^-1`` (``R``: the rows below
``B``), and the Schur complement ``F22 - L[R, B] F12`` goes to the block
holding ``R``'s first row. ``F11^-1`` comes from a Cholesky factor when
``F11`` is positive definite (almost every block) and from a Bunch-Kaufman
factorisation otherwise; there is no pivoting across blocks, so an indefinite
``A`` is factored only as accurately as its blocks are conditioned, which
:meth:`BlockFactor.backward_error` measures.

The symbolic pass (:func:`symbolic_structure`) finds the rows below each
block, so that the whole factor goes into one buffer; the numeric pass
(:func:`numeric_factor`) fills it. Figures: docs/measurements.md, "Eigensolver".
"""

from __future__ import annotations

from typing import Any, Callable

import numpy as np
import scipy.linalg as la
import scipy.sparse as sp
from numpy.typing import NDArray

Array = NDArray[Any]
# One factored block: first and end row (a, b), the rows R below it, D[B, B]^-1
# (s, s) and L[R, B] (r, s), views into the factor's buffer.
Block = tuple[int, int, Array, Array, Array]
# An update matrix waiting for its block: its rows and the (r, r) matrix.
Update = tuple[Array, Array]

__all__ = ["BlockFactor", "ShiftFailed", "indefinite_inverse", "numeric_factor", "scaled_shifted",
           "symbolic_structure"]


class ShiftFailed(Exception):
    """The shift gave an inaccurate factor or an inconsistent eigenvalue count."""


class BlockFactor:
    """Block ``L D L^T`` of a symmetric nonsingular ``A`` (n, n), see the module docstring.

    ``perm`` is the elimination order (None: ``A`` is in elimination order
    already) and ``bounds`` (nb + 1,) the boundaries of its blocks.
    ``definite`` says ``A`` must be positive definite (a ValueError
    otherwise). ``negative`` counts the negative eigenvalues of ``A``
    (Sylvester's law of inertia: ``A`` and ``D`` have the same inertia), so
    for ``A = L - sigma M`` it is the number of eigenvalues of the pencil
    below ``sigma``. ``nnz`` and ``stored`` count the factor's entries and the
    floats held.
    """

    def __init__(self, A: sp.csr_matrix, perm: Array | None, bounds: Array, *, definite: bool):
        self.A = A
        self.perm = perm
        Ap = (A if perm is None else A[perm][:, perm]).tocsc()
        Ap.sort_indices()
        structure = symbolic_structure(Ap, bounds)
        sizes = np.diff(bounds)
        counts = np.array([R.size for R in structure], dtype=np.int64)
        ends = np.cumsum(sizes * sizes + counts * sizes)
        # one buffer: one allocation, returned to the system when the factor is dropped
        self.buffer = np.empty(int(ends[-1]) if len(structure) else 0)
        self.blocks, self.negative = numeric_factor(Ap, bounds, structure, self.buffer, definite=definite)
        self.nnz = int(sum(s * (s + 1) // 2 + s * r for s, r in zip(sizes.tolist(), counts.tolist())))
        self.stored = int(sum(s * s + r * s for s, r in zip(sizes.tolist(), counts.tolist())))

    def solve(self, B: Array) -> Array:
        """``A^{-1} B`` for (n, r) ``B``."""
        y = np.array(B if self.perm is None else B[self.perm], dtype=np.float64, order="C")
        for a, b, R, Finv, L21 in self.blocks:  # L z = b, then w = D^-1 z
            z = y[a:b]
            if R.size:
                y[R] -= L21 @ z
            y[a:b] = Finv @ z
        for a, b, R, Finv, L21 in reversed(self.blocks):  # L^T x = w
            if R.size:
                y[a:b] -= L21.T @ y[R]
        if self.perm is None:
            return y
        x = np.empty_like(y)
        x[self.perm] = y
        return x

    def backward_error(self, seed: int = 0) -> float:
        """Normwise backward error ``||A x - b|| / (||A|| ||x|| + ||b||)`` of a
        solve with a random right-hand side (Higham 2002, ch. 7)."""
        b = np.random.default_rng(seed).standard_normal((self.A.shape[0], 1))
        x = self.solve(b)
        nA = float(abs(self.A).sum(axis=0).max())
        return float(np.linalg.norm(self.A @ x - b, 1) / (nA * np.linalg.norm(x, 1) + np.linalg.norm(b, 1)))


def symbolic_structure(Ap: sp.csc_matrix, bounds: Array) -> list[Array]:
    """The sorted rows below each block of the factor of ``Ap`` (CSC, sorted
    indices, elimination order): a block's own rows below it and those of the
    update matrices it receives."""
    ip, ix = Ap.indptr, Ap.indices
    nb = len(bounds) - 1
    owner = np.repeat(np.arange(nb), np.diff(bounds))  # block of each (permuted) row
    below_rows: list[list[Array] | None] = [[] for _ in range(nb)]
    structure: list[Array] = []
    for j in range(nb):
        a, b = int(bounds[j]), int(bounds[j + 1])
        rows = ix[ip[a]:ip[b]]
        kids = below_rows[j] or []
        R = np.unique(np.concatenate([rows[rows >= b]] + [Rc[Rc >= b] for Rc in kids]))
        below_rows[j] = None
        if R.size:
            parent = below_rows[owner[R[0]]]
            assert parent is not None  # a block's parent comes after it
            parent.append(R)
        structure.append(R)
    return structure


def numeric_factor(Ap: sp.csc_matrix, bounds: Array, structure: list[Array], buffer: Array, *,
                   definite: bool) -> tuple[list[Block], int]:
    """Factor ``Ap`` block by block into ``buffer`` (laid out by ``structure``
    from :func:`symbolic_structure`). Returns the blocks and the number of
    negative eigenvalues."""
    owner = np.repeat(np.arange(len(structure)), np.diff(bounds))
    pending: list[list[Update] | None] = [[] for _ in structure]  # update matrices waiting for their block
    potrf, potri = la.get_lapack_funcs(("potrf", "potri"), (np.zeros(1),))
    gemm = la.get_blas_funcs("gemm", (np.zeros(1),))
    blocks: list[Block] = []
    negative = start = 0
    for j, R in enumerate(structure):
        a, b = int(bounds[j]), int(bounds[j + 1])
        s, r = b - a, R.size
        F = frontal_matrix(Ap, a, b, R, pending[j] or [])
        pending[j] = None
        Finv, neg = pivot_inverse(F[:s, :s], potrf, potri, definite=definite)
        negative += neg
        if r:
            # scipy's BLAS, like potrf/potri: with numpy and scipy on two
            # OpenBLAS thread pools, alternating between them in this loop
            # made the factor many times slower on a busy machine
            F21 = F[s:, :s]
            L21 = gemm(1.0, F21, Finv)
            waiting = pending[owner[R[0]]]
            assert waiting is not None  # a block's parent comes after it
            waiting.append((R, gemm(-1.0, L21, F21, 1.0, F[s:, s:], trans_b=1)))
        else:
            L21 = np.zeros((0, s))
        Fv = buffer[start:start + s * s].reshape(s, s)
        Fv[...] = Finv
        Lv = buffer[start + s * s:start + s * s + r * s].reshape(r, s)
        Lv[...] = L21
        start += s * s + r * s
        blocks.append((a, b, R, Fv, Lv))
    return blocks, int(negative)


def frontal_matrix(Ap: sp.csc_matrix, a: int, b: int, R: Array, kids: list[Update]) -> Array:
    """The (s + r, s + r) front of block ``a:b`` with rows ``R`` below it:
    ``Ap``'s entries in the block's columns plus the extend-add of the update
    matrices ``kids``."""
    ip, ix, dt = Ap.indptr, Ap.indices, Ap.data
    s, r = b - a, R.size
    lo, hi = ip[a], ip[b]
    rows = ix[lo:hi]
    cols = np.repeat(np.arange(s), np.diff(ip[a:b + 1]))
    vals = dt[lo:hi]
    below = rows >= b
    inside = (rows >= a) & ~below
    F = np.zeros((s + r, s + r))
    F[rows[inside] - a, cols[inside]] = vals[inside]
    if r:
        F[s + np.searchsorted(R, rows[below]), cols[below]] = vals[below]
    Ff = F.reshape(-1)
    for Rc, Uc in kids:  # extend-add, on flat indices
        pos = np.where(Rc < b, Rc - a, s + np.searchsorted(R, Rc))
        # Uc[i, j] goes to F[pos[i], pos[j]], read in Uc's memory order
        # (gemm returns it column-major)
        flat = pos[None, :] * (s + r) + pos[:, None] if Uc.flags.f_contiguous else \
            pos[:, None] * (s + r) + pos[None, :]
        Ff[flat.ravel()] += Uc.ravel(order="K")
    return F


def pivot_inverse(F11: Array, potrf: Callable[..., Any], potri: Callable[..., Any], *,
                  definite: bool) -> tuple[Array, int]:
    """Inverse of the (s, s) pivot block and its number of negative
    eigenvalues: by Cholesky (LAPACK potrf/potri) when it is positive
    definite, else a ValueError if ``definite``, else Bunch-Kaufman
    (:func:`indefinite_inverse`)."""
    s = F11.shape[0]
    C, info = potrf(F11, lower=1, clean=1)
    if info == 0:
        # potri writes the lower triangle of the inverse and leaves the upper
        # one as potrf's clean=1 left it: zero
        Finv, info = potri(C, lower=1)
        Finv = Finv + Finv.T
        Finv.flat[::s + 1] *= 0.5
        return Finv, 0
    if definite:
        raise ValueError("shifted stiffness matrix is not positive definite: "
                         "the stiffness matrix is not positive semidefinite")
    return indefinite_inverse(F11)


def indefinite_inverse(F: Array) -> tuple[Array, int]:
    """Inverse and number of negative eigenvalues of a symmetric indefinite
    (s, s) block, from its Bunch-Kaufman factorisation ``F = L D L^T`` (LAPACK
    sytrf/sytri; ``D`` has the inertia of ``F``, Sylvester). A block whose
    estimated reciprocal condition number is below 1e-13 counts as singular
    at this shift (:class:`ShiftFailed`)."""
    sytrf, sytri, sycon = la.get_lapack_funcs(("sytrf", "sytri", "sycon"), (F,))
    s = F.shape[0]
    ldu, ipiv, info = sytrf(F, lower=1, lwork=max(64 * s, 1))
    if info != 0:
        raise ShiftFailed("a block of the shifted matrix is singular")
    rcond, info = sycon(ldu, ipiv, float(np.abs(F).sum(axis=0).max()), lower=1)
    if info != 0 or not rcond > 1e-13:
        raise ShiftFailed("a block of the shifted matrix is singular")
    d, off = np.diag(ldu), np.diag(ldu, -1)
    negative, k = 0, 0
    while k < s:
        if ipiv[k] > 0:  # 1 x 1 pivot
            negative += int(d[k] < 0)
            k += 1
        else:  # 2 x 2 pivot [[d_k, off_k], [off_k, d_k+1]]
            det = d[k] * d[k + 1] - off[k] * off[k]
            negative += 1 if det < 0 else 2 * int(d[k] < 0)
            k += 2
    Finv, info = sytri(ldu, ipiv, lower=1)
    if info != 0:
        raise ShiftFailed("a block of the shifted matrix is singular")
    Finv = np.tril(Finv)
    return Finv + np.tril(Finv, -1).T, negative


def scaled_shifted(L: sp.csr_matrix, m: Array, shift: float) -> sp.csr_matrix:
    """``M^(-1/2) (L + shift M) M^(-1/2)`` (n, n): its inverse is the Lanczos
    operator itself, so a solve needs no scaling of its right-hand sides; it
    is congruent to ``L + shift M``, so it has the same inertia."""
    d = 1.0 / np.sqrt(m)
    A = L.tocoo()
    out: sp.csr_matrix = sp.csr_matrix((A.data * d[A.row] * d[A.col], (A.row, A.col)), shape=A.shape) + \
        sp.diags(np.full(m.shape[0], shift), format="csr")
    return out
