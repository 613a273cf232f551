"""The eigenbasis: low eigenpairs of ``L phi = lambda M phi``.

``L`` is the positive semidefinite stiffness matrix and ``M = diag(mass)`` the
lumped mass (see :mod:`engine.laplacian`). The basis everything else is built
on is the ``k`` eigenpairs of smallest eigenvalue, with these conventions
(DEVELOPERS.md):

- eigenvalues ascending; one zero eigenvalue per connected component, returned
  as exactly 0 with an eigenvector that is constant on its component;
- eigenvectors mass-orthonormal, ``Phi^T M Phi = I``;
- a deterministic sign: in every eigenvector the entry of largest magnitude
  (lowest index on exact ties) is positive;
- relative residuals ``||L phi - lambda M phi||_2 / (lambda ||M phi||_2)``
  (``||L phi||_2 / ||M phi||_2`` for a zero eigenvalue) reported per pair.

Two solvers:

dense
    ``scipy.linalg.eigh`` on the full generalised problem (LAPACK), used up to
    ``_DENSE_MAX`` vertices. Exact to rounding, so no cluster can be missed.
sparse
    A thick-restarted block Lanczos iteration on the shift-inverted operator
    ``(L - sigma M)^{-1} M`` with full re-orthogonalisation, deflated against
    the constant vectors of the components. The shift sits inside the wanted
    part of the spectrum (about 0.4 of the way up, from Weyl's law), which
    separates the last wanted eigenvalues from the unwanted ones about twice
    as well as a shift below ``lambda_1`` and saves a quarter of the solves;
    the inertia of the factor counts the eigenvalues below the shift exactly
    and the result must contain that many (see ``_sparse``), else the solver
    falls back to a shift below ``lambda_1``. The shifted matrix is factored
    once (a multifrontal block ``L D L^T`` in dense blocks, on a
    nested-dissection ordering computed here from the graph), so that a block
    of right-hand sides is solved with matrix-matrix products (BLAS-3) instead
    of one sparse triangular sweep per column. Convergence is checked after every block from
    the small projected matrices alone, then confirmed on the residuals the
    caller sees, so the iteration stops at the first block that suffices.
    Starting blocks wider than any eigenvalue cluster (the width grows as
    ``sqrt(k)``, like the multiplicities on a sphere), extra pairs beyond
    ``k``, and a residual test on all of them, keep every member of a
    degenerate cluster (ARPACK's shift-invert mode can drop one, see
    docs/platform.md).

Cluster at the cut: ``k`` is never changed. When eigenvalue ``k`` (0-based,
the first one not returned) lies within a relative ``cluster_gap`` of
eigenvalue ``k - 1``, the last cluster is split; this is recorded in
``info["split_cluster"]`` as ``(first, last)`` indices of the whole cluster in
the computed spectrum (``last >= k``), and a ``RuntimeWarning`` is not raised
(callers that care read ``info``). Choosing ``k`` to end a cluster is the
caller's business; the information to do so is there.
"""

from __future__ import annotations

import dataclasses
import time

import numpy as np
import scipy.linalg as la
import scipy.sparse as sp
import scipy.sparse.csgraph as csgraph

__all__ = ["Eigenbasis", "eigenbasis"]

# Up to this many vertices the dense LAPACK solver is used. Measured on the
# shared 2-core development machine, 36 pairs of the 2,562-vertex icosphere:
# dense 9.0 s, sparse 1.9 s; at 861 vertices dense takes 0.3 s. Dense is exact
# and immune to cluster trouble, but its O(n^3) cost overtakes the sparse
# solver's set-up well below 2,000 vertices, so the cut is at 1,000.
_DENSE_MAX = 1000
# Row chunk of the in-place updates of (n, k) arrays. Fresh memory is costly
# on the virtual machines this was measured on: the first touch of a new
# 80 MB array took 120-210 ms, against 16 ms for memory the process had
# freed just before, so the final stage updates its arrays in place.
_ROWS = 8192
# Nested-dissection leaf size (vertices). 128 against 64 at 100k vertices:
# factor 2.7 s against 3.0 s, a solve of 24 right-hand sides 263 ms against
# 284 ms (fewer blocks, less Python per block; 192 was slower again).
_LEAF = 128
# Lanczos block size: ceil(_BLOCK_SQRT * sqrt(p)) within [_BLOCK_MIN, _BLOCK_MAX]. A block
# at least as wide as the largest eigenvalue cluster lets every member of the
# cluster into the first Krylov block; on the unit sphere the cluster around
# eigenvalue j has 2l + 1 ~ 2 sqrt(j) members, hence the square root. Narrow
# blocks need fewer solves in all (40k vertices, 120 pairs: 420 solves at
# width 20, 456 at 24, 585 at 39, 826 at 59), wide ones make each solve
# cheaper per column; 2.2 sqrt(p) was the best of these at 40k.
_BLOCK_MIN, _BLOCK_SQRT, _BLOCK_MAX = 16, 2.2, 96
_BASIS_FACTOR = 3.0  # Lanczos basis holds up to this many times the wanted pairs
# Below this tol the Lanczos basis gets a second Gram-Schmidt pass (CGS2),
# and it gets one as well after a check that found the true residuals worse
# than the estimate. With one pass the attainable residual floors where the
# lost orthogonality mixes neighbouring Ritz vectors: near 1e-9 on the
# 2,562-vertex noisy sphere (30 pairs; 3.3e-11 with two passes), near 1.7e-7
# at 40k vertices (120 pairs). Above it one pass reaches the same residuals
# with the same number of solves and takes half the orthogonalisation time
# (40k vertices, 120 pairs at tol 1e-5: 1.9 s against 3.2 s).
_CGS2_BELOW = 1e-6
# While the estimated residual is above _SKIP_ABOVE * tol, every other check is
# skipped (each is an eigen-decomposition of H, up to 357 x 357 at 120 pairs).
_SKIP_ABOVE = 1e4
# Interior shift (see _sparse): at _INTERIOR times Weyl's estimate of the last
# wanted eigenvalue, lowered when more than _INTERIOR_MAX of the wanted pairs
# lie below it. 40k-vertex benchmark mesh, 120 pairs: 475 solves with the
# shift below lambda_1, 400 at 0.25, 350 at 0.4 and 0.5; at 0.6 the nearest
# pairs to the shift were no longer the lowest ones.
_INTERIOR, _INTERIOR_MAX = 0.4, 0.5
# Largest normwise backward error accepted from the indefinite factor (the
# positive definite one reaches about 1e-16).
_BACKWARD_MAX = 1e-10


@dataclasses.dataclass(frozen=True, eq=False)
class Eigenbasis:
    """Low eigenpairs of ``L phi = lambda M phi``.

    Attributes
    ----------
    eigenvalues : (k,) float64 array
        Ascending; exact zeros for the constant modes.
    eigenvectors : (n, k) float64 array
        Mass-orthonormal columns with the deterministic sign.
    mass : (n,) float64 array
        The lumped mass the basis is orthonormal against.
    residuals : (k,) float64 array
        Relative residual of each pair (see the module docstring).
    info : dict
        ``method`` ("dense" or "sparse"), ``components``, ``seconds``,
        ``split_cluster`` (None or ``(first, last)``), solver statistics.
    """

    eigenvalues: np.ndarray
    eigenvectors: np.ndarray
    mass: np.ndarray
    residuals: np.ndarray
    info: dict

    @property
    def k(self) -> int:
        return int(self.eigenvalues.shape[0])

    @property
    def n(self) -> int:
        return int(self.eigenvectors.shape[0])

    def project(self, signal) -> np.ndarray:
        """Spectral coefficients ``Phi^T M f``.

        Parameters
        ----------
        signal : (n,) or (n, c) float array

        Returns
        -------
        (k,) or (k, c) float64 array
        """
        f = np.asarray(signal, dtype=np.float64)
        if f.ndim not in (1, 2) or f.shape[0] != self.n:
            raise ValueError(f"signal must have shape ({self.n},) or ({self.n}, c), got {f.shape}")
        if not np.isfinite(f).all():
            raise ValueError("signal has non-finite values")
        w = f * self.mass if f.ndim == 1 else f * self.mass[:, None]
        return self.eigenvectors.T @ w

    def reconstruct(self, coefficients) -> np.ndarray:
        """Signal ``Phi c`` from coefficients.

        Parameters
        ----------
        coefficients : (k,) or (k, c) float array

        Returns
        -------
        (n,) or (n, c) float64 array
        """
        c = np.asarray(coefficients, dtype=np.float64)
        if c.ndim not in (1, 2) or c.shape[0] != self.k:
            raise ValueError(f"coefficients must have shape ({self.k},) or ({self.k}, c), got {c.shape}")
        return self.eigenvectors @ c

    def truncate(self, k: int) -> "Eigenbasis":
        """The first ``k`` pairs as a new basis (``1 <= k <= self.k``)."""
        k = int(k)
        if not 1 <= k <= self.k:
            raise ValueError(f"cannot truncate a basis of {self.k} eigenpairs to k={k}")
        info = dict(self.info)
        info["truncated_from"] = self.k
        info["split_cluster"] = _split_cluster(self.eigenvalues, k, info.get("cluster_gap", 1e-6))
        return Eigenbasis(self.eigenvalues[:k].copy(), np.ascontiguousarray(self.eigenvectors[:, :k]),
                          self.mass, self.residuals[:k].copy(), info)


def eigenbasis(stiffness, mass, k: int, *, seed: int = 0, tol: float = 1e-5, method: str = "auto",
               cluster_gap: float = 1e-6) -> Eigenbasis:
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
        error of order ``tol / relative gap``. The default 1e-5 keeps every
        residual a decade below 1e-4 and eigenvalues good to about 1e-10
        relative, far below the discretisation error of any mesh (1e-3 on a
        10k-vertex sphere, docs/platform.md); asking 1e-8 instead costs about a
        third more solves (40k vertices, 120 pairs: 585 against 456 at equal
        block size). The dense solver is exact to rounding and ignores it.
        Values below about 1e-11 may not be reachable; the solver stops when
        it stops improving and reports the residuals reached in
        ``residuals`` and ``info["converged"]``.
    method : {"auto", "dense", "sparse"}
        ``"auto"`` uses the dense solver up to 1,000 vertices.
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
    """
    t0 = time.perf_counter()
    L, m = _validate(stiffness, mass)
    n = m.shape[0]
    if isinstance(k, bool) or not isinstance(k, (int, np.integer)):
        raise ValueError(f"k must be an integer, got {k!r}")
    k = int(k)
    if k < 1:
        raise ValueError(f"k must be at least 1, got k={k}")
    if k >= n:
        raise ValueError(f"k={k} eigenpairs requested but the mesh has only n={n} vertices")
    if method not in ("auto", "dense", "sparse"):
        raise ValueError(f"unknown method {method!r}; expected 'auto', 'dense' or 'sparse'")
    if not (np.isfinite(tol) and tol > 0):
        raise ValueError(f"tol must be a positive number, got {tol!r}")
    if method == "auto":
        method = "dense" if n <= _DENSE_MAX else "sparse"

    ncomp, labels = csgraph.connected_components(_pattern(L), directed=False)
    Z = _constant_modes(labels, ncomp, m)  # (n, ncomp), M-orthonormal
    extra = max(8, k // 5)  # pairs computed beyond k for the cluster check
    p = min(n, k + extra)
    info: dict = {"method": method, "components": int(ncomp), "cluster_gap": float(cluster_gap),
                  "computed": int(p)}
    if method == "dense":
        lam, X = _dense(L, m, p, Z)
        res = None
        info["converged"] = True
    else:
        lam, X, stats, res = _sparse(L, m, p, Z, seed=seed, tol=tol, k_needed=k)
        info.update(stats)
    scale = max(float(np.abs(lam).max()), 1.0)
    if lam[ncomp:].size and lam[ncomp:].min() < -1e-8 * scale:
        raise ValueError(f"stiffness matrix is not positive semidefinite: eigenvalue "
                         f"{lam[ncomp:].min():.3g} found")
    lam = np.where(np.arange(lam.size) < ncomp, 0.0, np.maximum(lam, 0.0))
    info["split_cluster"] = _split_cluster(lam, k, cluster_gap)
    lam = lam[:k]
    if res is None:  # dense
        X = np.ascontiguousarray(X[:, :k])
        res = _residuals(L @ X, m, lam, X)
    else:  # sparse: X is the solver's own (n, k) array, residuals computed there
        res = res[:k]
    X *= _signs(X)[None, :]
    info["seconds"] = time.perf_counter() - t0
    return Eigenbasis(lam, X, m, res, info)


# ----------------------------------------------------------------- validation

def _validate(stiffness, mass) -> tuple[sp.csr_matrix, np.ndarray]:
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
    return L, m


def _pattern(L: sp.csr_matrix) -> sp.csr_matrix:
    G = L.copy()
    G.setdiag(0)
    G.eliminate_zeros()
    G.data = np.ones_like(G.data)
    return G


def _constant_modes(labels: np.ndarray, ncomp: int, m: np.ndarray) -> np.ndarray:
    """Indicator of each component scaled to unit mass norm; components ordered
    by their lowest vertex index (connected_components numbers them so)."""
    n = labels.shape[0]
    Z = np.zeros((n, ncomp))
    Z[np.arange(n), labels] = 1.0
    Z /= np.sqrt(np.bincount(labels, weights=m, minlength=ncomp))[None, :]
    return Z


def _split_cluster(lam: np.ndarray, k: int, gap: float):
    """(first, last) of the cluster straddling the cut at k, or None."""
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


def _signs(X: np.ndarray) -> np.ndarray:
    """+-1 per column making its entry of largest magnitude positive (the
    one of lowest index where a positive and a negative entry tie)."""
    hi, lo = X.max(axis=0), X.min(axis=0)  # two reductions: 4x faster than argmax(abs(X)) at 100k x 100
    s = np.where(hi >= -lo, 1.0, -1.0)
    for j in np.flatnonzero((hi == -lo) & (hi != 0)):
        s[j] = 1.0 if X[np.argmax(np.abs(X[:, j])), j] > 0 else -1.0
    return s


def _residuals(LX, m, lam, X, rows: int = _ROWS) -> np.ndarray:
    """Relative residuals from ``X`` and ``L X`` (the first ``lam.size``
    columns), summed over row chunks so that no temporary of the size of
    ``X`` is made (at 100k vertices and 120 pairs each one is 96 MB)."""
    c = lam.size
    num = np.zeros(c)
    den = np.zeros(c)
    for i in range(0, X.shape[0], rows):
        MX = X[i:i + rows, :c] * m[i:i + rows, None]
        R = LX[i:i + rows, :c] - MX * lam[None, :]
        num += np.einsum("ij,ij->j", R, R)
        den += np.einsum("ij,ij->j", MX, MX)
    return np.sqrt(num) / (np.sqrt(den) * np.where(lam > 0, lam, 1.0))


# ---------------------------------------------------------------------- dense

def _dense(L, m, p, Z):
    ncomp = Z.shape[1]
    A = L.toarray()
    # Solve in the mass-scaled variable y = M^(1/2) x: a standard symmetric
    # problem, so LAPACK's evr driver with an index subset applies.
    r = 1.0 / np.sqrt(m)
    S = A * r[:, None] * r[None, :]
    lam, Y = la.eigh(S, subset_by_index=[0, p - 1], driver="evr")
    X = Y * r[:, None]
    if ncomp >= p:
        return np.zeros(p), Z[:, :p].copy()
    # Replace the null space by the exact per-component constants and keep the
    # rest M-orthogonal to them.
    rest = X[:, ncomp:]
    rest = rest - Z @ (Z.T @ (m[:, None] * rest))
    rest = _m_orthonormalize(rest, m)
    H = rest.T @ (L @ rest)
    th, W = la.eigh((H + H.T) * 0.5)
    return np.concatenate([np.zeros(ncomp), th]), np.hstack([Z, rest @ W])


def _m_orthonormalize(X, m):
    G = X.T @ (m[:, None] * X)
    C = la.cholesky((G + G.T) * 0.5, lower=False)
    # X C^-1 as one GEMM: the columns are near orthonormal already, so C is
    # well conditioned (a triangular solve with n rows is several times slower)
    return X @ la.solve_triangular(C, np.eye(C.shape[0]), lower=False)


# --------------------------------------------------------------------- sparse

def _nested_dissection(G: sp.csr_matrix, m: np.ndarray, leaf: int = _LEAF):
    """Fill-reducing ordering from the graph alone.

    Coordinates are distances (Dijkstra, edge length ``sqrt(m_i) + sqrt(m_j)``
    as a proxy of the mesh spacing) to four far-apart landmarks per component;
    each part is bisected at the median of its most spread coordinate and the
    vertices of one side touching the other form the separator, ordered after
    both halves (George 1973, nested dissection; here with level-set
    separators, a simple form of the geometric variant).

    Returns the permutation and the boundaries of its blocks (leaves and
    separators) in elimination order.
    """
    n = G.shape[0]
    h = np.sqrt(m)
    Gc = G.tocoo()
    W = sp.csr_matrix((h[Gc.row] + h[Gc.col], (Gc.row, Gc.col)), shape=G.shape)
    ncomp, labels = csgraph.connected_components(G, directed=False)
    coords = np.zeros((n, 4))
    order_comp = np.argsort(labels, kind="stable")
    starts = np.searchsorted(labels[order_comp], np.arange(ncomp + 1))
    for c in range(ncomp):
        verts = order_comp[starts[c]:starts[c + 1]]
        if verts.size <= leaf:
            continue
        d = csgraph.dijkstra(W, indices=int(verts[0]))
        mind = np.full(n, np.inf)
        for j in range(4):
            cand = d[verts] if j == 0 else mind[verts]
            land = int(verts[np.argmax(cand)])
            dj = csgraph.dijkstra(W, indices=land)
            coords[verts, j] = dj[verts]
            mind[verts] = np.minimum(mind[verts], dj[verts])
    U = sp.triu(G, 1).tocoo()
    ei, ej = U.row.astype(np.int64), U.col.astype(np.int64)
    out: list[np.ndarray] = []
    side = np.zeros(n, np.int8)
    sep = np.zeros(n, bool)

    # An explicit stack instead of recursion, so that a part's edge lists are
    # released as soon as its halves have theirs (the recursion kept every
    # level's lists alive: 57 MB at 100k vertices). Popping A before B before
    # the separator keeps the post-order.
    stack: list = []
    for c in reversed(range(ncomp)):
        verts = order_comp[starts[c]:starts[c + 1]]
        inc = labels[ei] == c
        stack.append((np.sort(verts), ei[inc], ej[inc]))
    del ei, ej
    while stack:
        idx, pi, pj = stack.pop()
        if pi is None:  # a separator, after both its halves
            out.append(idx)
            continue
        if idx.size <= leaf:
            if idx.size:
                out.append(idx)
            continue
        X = coords[idx]
        spread = X.max(axis=0) - X.min(axis=0)
        ax = int(np.argmax(spread))
        if spread[ax] <= 0:
            out.append(idx)
            continue
        half = idx.size // 2
        side[idx] = 2
        side[idx[np.argpartition(X[:, ax], half)[:half]]] = 1  # median split (introselect, deterministic)
        cut = side[pi] != side[pj]
        ci, cj = pi[cut], pj[cut]
        a = np.where(side[ci] == 1, ci, cj)
        sep[a] = True
        keep = ~(sep[pi] | sep[pj])
        e1, e2 = pi[keep], pj[keep]
        del pi, pj, cut, ci, cj, keep
        ma = side[e1] == 1
        sm, sd = sep[idx], side[idx]
        iA, iB, iS = idx[(sd == 1) & ~sm], idx[sd == 2], idx[sm]
        sep[a] = False
        if iS.size:
            stack.append((iS, None, None))
        stack.append((iB, e1[~ma], e2[~ma]))
        stack.append((iA, e1[ma], e2[ma]))
        del e1, e2, ma
    perm = np.concatenate(out)
    bounds = np.cumsum([0] + [o.size for o in out])
    return perm, bounds


class _ShiftFailed(Exception):
    """The interior shift gave an inaccurate factor or an inconsistent count."""


class _BlockFactor:
    """Block factorisation ``P A P^T = L D L^T`` of a symmetric nonsingular
    ``A``, computed and kept in dense blocks so that many right-hand sides are
    solved with GEMM; ``L`` is unit lower triangular by blocks, ``D`` block
    diagonal, one block per nested-dissection block.

    Multifrontal (Duff and Reid 1983; Liu 1992, "The multifrontal method for
    sparse matrix solution"), each nested-dissection block one supernode: the
    front of block ``B`` holds ``A``'s entries in ``B``'s columns and the
    update matrices of the blocks whose first off-block row falls in ``B``;
    its leading part ``F11`` is ``D[B, B]``, ``L[R, B] = F21 F11^-1`` (``R``:
    the rows below ``B``), and the Schur complement ``F22 - L[R, B] F12`` goes
    to the block holding ``R``'s first row. ``F11^-1`` comes from a Cholesky
    factor when ``F11`` is positive definite (almost every block) and from its
    eigen-decomposition otherwise; there is no pivoting across blocks, so an
    indefinite ``A`` is factored only as accurately as its blocks are
    conditioned, which :meth:`backward_error` measures.

    ``negative`` counts the negative eigenvalues of ``A`` (Sylvester's law of
    inertia: ``A`` and ``D`` have the same inertia), so for ``A = L - sigma M``
    it is the number of eigenvalues of the pencil below ``sigma``.

    Against SuperLU on the same ordering followed by repacking into dense
    blocks (100k-vertex benchmark mesh, positive definite, one thread): 0.92 s
    against 1.84 s, and no upper factor held in memory.
    """

    def __init__(self, A: sp.csr_matrix, perm: np.ndarray, bounds: np.ndarray, *, definite: bool):
        self.A = A
        self.perm = perm  # None: A is in elimination order already
        Ap = (A if perm is None else A[perm][:, perm]).tocsc()
        Ap.sort_indices()
        ip, ix, dt = Ap.indptr, Ap.indices, Ap.data
        nb = len(bounds) - 1
        owner = np.repeat(np.arange(nb), np.diff(bounds))  # block of each (permuted) row
        # Symbolic pass: the rows R below each block, so that the whole factor
        # goes into one buffer (one allocation, returned to the system when the
        # factor is dropped; thousands of small arrays would stay in the heap).
        below_rows: list = [[] for _ in range(nb)]
        structure = []
        for j in range(nb):
            a, b = int(bounds[j]), int(bounds[j + 1])
            rows = ix[ip[a]:ip[b]]
            R = np.unique(np.concatenate([rows[rows >= b]] + [Rc[Rc >= b] for Rc in below_rows[j]]))
            below_rows[j] = None
            if R.size:
                below_rows[owner[R[0]]].append(R)
            structure.append(R)
        sizes = np.diff(bounds)
        counts = np.array([R.size for R in structure])
        ends = np.cumsum(sizes * sizes + counts * sizes)
        self.buffer = np.empty(int(ends[-1]) if nb else 0)
        pending: list = [[] for _ in range(nb)]  # update matrices waiting for their block
        potrf, potri = la.get_lapack_funcs(("potrf", "potri"), (np.zeros(1),))
        gemm = la.get_blas_funcs("gemm", (np.zeros(1),))
        self.blocks = []
        nnz = stored = negative = 0
        for j in range(nb):
            a, b = int(bounds[j]), int(bounds[j + 1])
            s = b - a
            lo, hi = ip[a], ip[b]
            rows = ix[lo:hi]
            cols = np.repeat(np.arange(s), np.diff(ip[a:b + 1]))
            vals = dt[lo:hi]
            below = rows >= b
            inside = (rows >= a) & ~below
            kids = pending[j]
            pending[j] = None
            R = structure[j]
            r = R.size
            F = np.zeros((s + r, s + r))
            F[rows[inside] - a, cols[inside]] = vals[inside]
            if r:
                F[s + np.searchsorted(R, rows[below]), cols[below]] = vals[below]
            Ff = F.reshape(-1)
            for Rc, Uc in kids:  # extend-add, on flat indices (2x faster than np.ix_)
                pos = np.where(Rc < b, Rc - a, s + np.searchsorted(R, Rc))
                # Uc[i, j] goes to F[pos[i], pos[j]], read in Uc's memory order
                # (gemm returns it column-major)
                flat = pos[None, :] * (s + r) + pos[:, None] if Uc.flags.f_contiguous else \
                    pos[:, None] * (s + r) + pos[None, :]
                Ff[flat.ravel()] += Uc.ravel(order="K")
            C, info = potrf(F[:s, :s], lower=1, clean=1)
            if info == 0:
                # potri writes the lower triangle of the inverse and leaves
                # the upper one as potrf's clean=1 left it: zero
                Finv, info = potri(C, lower=1)
                Finv = Finv + Finv.T
                Finv.flat[::s + 1] *= 0.5
            elif definite:
                raise ValueError("shifted stiffness matrix is not positive definite: "
                                 "the stiffness matrix is not positive semidefinite")
            else:
                Finv, neg = _indefinite_inverse(F[:s, :s])
                negative += neg
            if r:
                # scipy's BLAS, like potrf/potri above: with numpy and scipy on
                # two OpenBLAS thread pools, alternating between them in this
                # loop made the factor 20x slower on a busy 2-core machine
                F21 = F[s:, :s]
                L21 = gemm(1.0, F21, Finv)
                pending[owner[R[0]]].append((R, gemm(-1.0, L21, F21, 1.0, F[s:, s:], trans_b=1)))
            else:
                L21 = np.zeros((0, s))
            nnz += s * (s + 1) // 2 + s * r
            stored += s * s + r * s
            start = int(ends[j]) - s * s - r * s
            Fv = self.buffer[start:start + s * s].reshape(s, s)
            Fv[...] = Finv
            Lv = self.buffer[start + s * s:start + s * s + r * s].reshape(r, s)
            Lv[...] = L21
            self.blocks.append((a, b, R, Fv, Lv))
        self.nnz = int(nnz)
        self.stored = int(stored)
        self.negative = int(negative)

    def solve(self, B: np.ndarray) -> np.ndarray:
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


def _indefinite_inverse(F):
    """Inverse and number of negative eigenvalues of a symmetric indefinite
    block, from its Bunch-Kaufman factorisation ``F = L D L^T`` (LAPACK
    sytrf/sytri; ``D`` has the inertia of ``F``, Sylvester). Against the
    eigen-decomposition used before: 5-7x less arithmetic on the largest
    separators. A block whose estimated reciprocal condition number is below
    1e-13 counts as singular at this shift (:class:`_ShiftFailed`)."""
    sytrf, sytri, sycon = la.get_lapack_funcs(("sytrf", "sytri", "sycon"), (F,))
    s = F.shape[0]
    ldu, ipiv, info = sytrf(F, lower=1, lwork=max(64 * s, 1))
    if info != 0:
        raise _ShiftFailed("a block of the shifted matrix is singular")
    rcond, info = sycon(ldu, ipiv, float(np.abs(F).sum(axis=0).max()), lower=1)
    if info != 0 or not rcond > 1e-13:
        raise _ShiftFailed("a block of the shifted matrix is singular")
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
        raise _ShiftFailed("a block of the shifted matrix is singular")
    Finv = np.tril(Finv)
    return Finv + np.tril(Finv, -1).T, negative


def _orth_against(W, Q):
    """Project the columns of W off the orthonormal columns of Q (one pass of
    classical Gram-Schmidt; callers do two, CGS2, Giraud et al. 2005)."""
    return W - Q @ (Q.T @ W)


def _orthonormal(W, drop=1e-10):
    """Orthonormal basis of span(W) with near-dependent directions dropped
    (eigen-decomposition of the Gram matrix, then one Cholesky-QR pass).

    numpy's LAPACK throughout, like the products around it in the Lanczos
    loop (see _BlockFactor on mixing numpy's and scipy's thread pools)."""
    G = W.T @ W
    w, U = np.linalg.eigh((G + G.T) * 0.5)
    keep = w > drop * max(w.max(), 1e-300)
    W = _tall(W, U[:, keep] / np.sqrt(w[keep]))
    G = W.T @ W
    C = np.linalg.cholesky((G + G.T) * 0.5)  # G = C C^T, C lower
    return _tall(W, np.linalg.inv(C).T)  # W C^-T; near-orthonormal W: C near I


def _purified(Q, Y, mu, F, lo, want):
    """Ritz vectors purified by one more application of T:
    ``T x = mu x + F y_last`` (scaled variable), C-ordered (what ``L @ X``
    and the row gathers after it read), with no other ``(n, want)`` array."""
    X = np.empty((Q.shape[0], want))
    np.matmul(Q, Y[:, :want] * mu[None, :want], out=X)
    Yl = Y[lo:, :want]
    for i in range(0, X.shape[0], _ROWS):
        X[i:i + _ROWS] += F[i:i + _ROWS] @ Yl
    return X


def _tall(A, B):
    """``A @ B`` for tall ``A`` (n rows) and small ``B``, column-major: written
    as ``(B^T A^T)^T`` OpenBLAS runs it about 1.5-1.9x faster than ``A @ B``
    at n = 100k (100k x 350 by 350 x 100: 203 against 311 ms; 100k x 120 by
    120 x 120: 83 against 142 ms, one thread)."""
    return (B.T @ A.T).T


def _sparse(L, m, p, Z, *, seed, tol, k_needed):
    """Shift-invert block Lanczos, first with a shift inside the wanted part
    of the spectrum, else (or when that fails) with one below it.

    Interior shift: ``sigma`` at ``_INTERIOR`` times Weyl's estimate of the
    last wanted eigenvalue (``lambda_j ~ 4 pi j / area`` on a surface, Weyl
    1911), so the operator's eigenvalues ``1 / (lambda - sigma)`` are largest
    in magnitude on both sides of ``sigma`` and the last wanted ones are about
    twice as well separated from the unwanted ones as with a shift below
    ``lambda_1``. ``L - sigma M`` is then indefinite; the factor's inertia
    (Sylvester) counts the eigenvalues below ``sigma`` exactly, the shift is
    lowered when more than ``_INTERIOR_MAX`` of the wanted pairs lie below it,
    and the result is accepted only if exactly that many computed eigenvalues
    lie below ``sigma``, so no member of a cluster there can be dropped
    unnoticed. A factor with a large backward error (a block nearly singular
    at this shift) or a count that disagrees falls back to the shift below
    ``lambda_1``, where the matrix is positive definite.
    """
    stats: dict = {}
    t = time.perf_counter()
    ncomp = Z.shape[1]
    want = p - ncomp  # non-zero pairs to compute
    if want <= 0:
        return np.zeros(p), Z[:, :p].copy(), {"converged": True, "solves": 0}, None
    perm, bounds = _nested_dissection(_pattern(L), m)
    # The whole iteration runs in elimination order, so no solve permutes its
    # right-hand sides (two gathers of (n, b) per solve, 0.4 s at 100k)
    inv = np.empty_like(perm)
    inv[perm] = np.arange(perm.size)
    L, m, Z = L[perm][:, perm].tocsr(), m[perm], Z[perm]
    stats["t_order"] = time.perf_counter() - t
    t = time.perf_counter()
    sigma = _INTERIOR * 4.0 * np.pi * want / m.sum()
    fac = None
    for _ in range(3):
        try:
            fac = _BlockFactor(_scaled(L, m, -sigma), None, bounds, definite=False)
        except _ShiftFailed as e:
            stats["interior_failed"] = str(e)
            fac = None
            break
        below = fac.negative - ncomp
        if below <= _INTERIOR_MAX * want:
            break
        sigma *= _INTERIOR * want / below
        fac = None
    else:
        stats["interior_failed"] = "too many eigenvalues below every shift tried"
    if fac is not None:
        err = fac.backward_error()
        if err > _BACKWARD_MAX:
            stats["interior_failed"] = f"backward error {err:.2g} of the factor"
            fac = None
    stats["t_factor"] = time.perf_counter() - t
    if fac is not None:
        stats.update({"interior_shift": float(sigma), "below_shift": int(below)})
        held, fac = [fac], None  # _shift_invert holds the only reference (see there)
        try:
            lam, X, stats, res = _shift_invert(
                L, m, p, Z, held, -sigma, below, stats, seed=seed, tol=tol, k_needed=k_needed,
                remake=lambda: _BlockFactor(_scaled(L, m, -sigma), None, bounds, definite=False))
            return lam, _assemble(Z, X, inv, k_needed), stats, res
        except _ShiftFailed as e:
            stats["interior_failed"] = str(e)
    t = time.perf_counter()
    shift = float(L.diagonal().mean() / m.sum())  # about 1/area: below lambda_1 for surfaces
    held = [_BlockFactor(_scaled(L, m, shift), None, bounds, definite=True)]
    stats["t_factor"] = stats["t_factor"] + time.perf_counter() - t
    lam, X, stats, res = _shift_invert(
        L, m, p, Z, held, shift, None, stats, seed=seed, tol=tol, k_needed=k_needed,
        remake=lambda: _BlockFactor(_scaled(L, m, shift), None, bounds, definite=True))
    return lam, _assemble(Z, X, inv, k_needed), stats, res


def _assemble(Z, X, inv, k):
    """The first ``k`` eigenvectors, constants first, rows back in the
    original order, as one new C-contiguous array (np.take on C-ordered rows:
    25 ms at 100k x 101, against 65-230 ms on column-major ones and 95-122
    ms for ``X[inv]``)."""
    ncomp = Z.shape[1]
    out = np.empty((X.shape[0], k))
    out[:, :ncomp] = np.take(Z, inv, axis=0)[:, :k]
    for i in range(0, X.shape[0], _ROWS):  # no second (n, k) array
        if k > ncomp:
            out[i:i + _ROWS, ncomp:] = np.take(X, inv[i:i + _ROWS], axis=0)[:, :k - ncomp]
    return out


def _scaled(L, m, shift):
    """``M^(-1/2) (L + shift M) M^(-1/2)``: its inverse is the Lanczos operator
    ``T`` itself, so a solve needs no scaling of its right-hand sides; it is
    congruent to ``L + shift M``, so it has the same inertia."""
    d = 1.0 / np.sqrt(m)
    A = L.tocoo()
    return sp.csr_matrix((A.data * d[A.row] * d[A.col], (A.row, A.col)), shape=A.shape) + sp.diags(
        np.full(m.shape[0], shift), format="csr")


def _ritz_order(mu, want):
    """Ritz pairs by distance from the shift (largest ``|mu|`` first), the
    first ``want`` of them re-sorted by ascending eigenvalue ``1/mu - shift``."""
    o = np.argsort(-np.abs(mu), kind="stable")
    sel = o[:want]
    return np.concatenate([sel[np.argsort(1.0 / mu[sel], kind="stable")], o[want:]])


def _shift_invert(L, m, p, Z, held, shift, below, stats, *, seed, tol, k_needed, remake):
    """Thick-restarted block Lanczos for the eigenvalues of largest magnitude
    of ``T = M^(1/2) (L + shift M)^(-1) M^(1/2)`` (symmetric), deflated against
    the constants; Rayleigh-Ritz with ``L`` itself (Saad, Numerical Methods
    for Large Eigenvalue Problems, 2011, ch. 4 and 6; Stewart 2001 and Wu and
    Simon 2000 for the Krylov-Schur thick restart). ``held`` is a list
    holding the only reference to the factor of ``M^(-1/2) (L + shift M)
    M^(-1/2)`` (:func:`_scaled`), which ``remake()`` computes again; ``below``
    (None for a shift below ``lambda_1``) is the number of non-zero
    eigenvalues below ``-shift`` that the result must hold.

    The basis ``Q`` lives in one preallocated buffer. After every block the
    Ritz values of ``H = Q^T T Q`` and the norms of their residuals
    ``||T x - mu x|| = ||F y_last||`` are read off ``H`` and the small Gram
    matrix ``F^T F`` of the remainder, without forming any Ritz vector, so the
    iteration stops at the first block where every needed pair meets ``tol``;
    a thick restart happens only when the buffer is full.
    """
    n = m.shape[0]
    ncomp = Z.shape[1]
    want = p - ncomp
    r = np.sqrt(m)
    Zt = Z * r[:, None]  # orthonormal in the scaled variable
    # The factor is dropped before the final Rayleigh-Ritz, whose arrays then
    # take its memory (125 MB at 100k vertices) instead of fresh memory; a
    # check that fails and needs more solves has ``remake()`` factor again.
    fac = held.pop()
    stats["factor_nnz"] = fac.nnz
    stats["factor_stored"] = fac.stored

    nfree = n - ncomp
    b = int(min(max(_BLOCK_MIN, np.ceil(_BLOCK_SQRT * np.sqrt(p))), _BLOCK_MAX, nfree))
    keep = min(want + max(16, want // 4), nfree)  # Ritz vectors kept at a restart
    mmax = min(max(int(_BASIS_FACTOR * want), keep + 2 * b), nfree)
    need = min(k_needed + 1, p) - ncomp  # pairs that must meet tol (k and the one after, for the cut)
    cgs2 = tol < _CGS2_BELOW
    rng = np.random.default_rng(seed)
    V = rng.standard_normal((n, b))
    W = _orthonormal(_orth_against(_orth_against(V, Zt), Zt))
    # The constants sit in the first columns of the basis buffer, ahead of the
    # Lanczos vectors, so that every Gram-Schmidt projection deflates them as
    # well, inside the same product (a separate deflation of each block cost
    # 0.2 s at 100k vertices); they take no part in H.
    z = ncomp
    Qb = np.empty((n, z + mmax), order="F")  # column blocks contiguous: the projections run ~15% faster
    Qb[:, :z] = Zt
    m0 = W.shape[1]
    Qb[:, z:z + m0] = W
    H = np.zeros((mmax, mmax))
    lo = 0  # first column of the block awaiting T
    solves = cycles = checks = stall = retries = 0
    inner = tol  # target of the cheap residual estimate
    next_check = 0
    X = None
    converged = False
    best = np.inf
    worst = np.inf
    t_solve = t_orth = t_rr = 0.0
    while True:
        t1 = time.perf_counter()
        Tp = fac.solve(Qb[:, z + lo:z + m0])
        solves += m0 - lo
        t_solve += time.perf_counter() - t1
        t1 = time.perf_counter()
        Q = Qb[:, z:z + m0]
        Qz = Qb[:, :z + m0]  # with the constants
        Cz = Qz.T @ Tp  # first Gram-Schmidt pass; also the new columns of H
        F = Tp
        F -= _tall(Qz, Cz)  # (I - Q Q^T) T Q_last: the Krylov-Schur remainder, off the constants
        C = Cz[z:]
        H[:m0, lo:m0] = C
        H[lo:m0, :m0] = C.T
        t_orth += time.perf_counter() - t1
        full = m0 + b > mmax or m0 >= nfree
        if (m0 >= need + b and m0 >= next_check) or full:
            # Ritz values and residual norms from H and F^T F alone
            t1 = time.perf_counter()
            checks += 1
            mu, Y = np.linalg.eigh((H[:m0, :m0] + H[:m0, :m0].T) * 0.5)  # numpy's pool, as _orthonormal
            o = _ritz_order(mu, want)
            mu, Y = mu[o], Y[:, o]
            Yl = Y[lo:, :need]
            FtF = F.T @ F
            fres = np.sqrt(np.maximum(np.einsum("ij,ij->j", Yl, FtF @ Yl), 0.0))
            th = 1.0 / mu[:need] - shift
            # pencil residual of the purified vector T x: ||f|| / (mu^2 theta)
            res = fres / (mu[:need] ** 2 * np.maximum(th, 1e-300))
            worst = float(res.max())
            # far from the target, skip the next block's check (each is an
            # eigen-decomposition of H)
            next_check = m0 + (2 * b if worst > _SKIP_ABOVE * inner else b)
            if worst <= inner or m0 >= nfree:
                # The estimate lives in the mass-scaled variable; check the
                # residual the caller sees on the purified Ritz vectors and
                # tighten the estimate's target if it was optimistic.
                fac = None
                th2, X, rt = _final_ritz(L, m, Zt, _purified(Q, Y, mu, F, lo, need))
                true_worst = float(rt.max())
                t_rr += time.perf_counter() - t1
                if true_worst <= tol or m0 >= nfree or retries >= 3:
                    converged = true_worst <= tol
                    worst = true_worst
                    break
                retries += 1
                cgs2 = True  # an optimistic estimate may be lost orthogonality
                inner = min(inner, worst) * min(0.5, 0.8 * tol / true_worst)
                X = None
                fac = remake()
            else:
                t_rr += time.perf_counter() - t1
            if full:
                cycles += 1
                stall = stall + 1 if worst > 0.5 * best else 0
                best = min(best, worst)
                if stall >= 3 or cycles >= 60:
                    break
                # thick restart (Krylov-Schur): keep the best Ritz vectors
                t1 = time.perf_counter()
                Qb[:, z:z + keep] = Q @ Y[:, :keep]
                H[:] = 0.0
                H[np.arange(keep), np.arange(keep)] = mu[:keep]
                t_rr += time.perf_counter() - t1
                m0 = lo = keep
                next_check = 0
                Q = Qb[:, z:z + m0]
                Qz = Qb[:, :z + m0]
        t1 = time.perf_counter()
        # Second classical Gram-Schmidt pass (CGS2; C above was the first,
        # Giraud et al. 2005) for tight tolerances only, see _CGS2_BELOW.
        W = _orthonormal(_orth_against(F, Qz) if cgs2 else F)
        t_orth += time.perf_counter() - t1
        if W.shape[1] == 0:
            break
        w = min(W.shape[1], mmax - m0)
        lo = m0
        Qb[:, z + m0:z + m0 + w] = W[:, :w]
        m0 += w
    t1 = time.perf_counter()
    if X is None:  # stopped without the final check (stall, basis exhausted)
        th2, X, rt = _final_ritz(L, m, Zt, _purified(Q, Y, mu, F, lo, need))
    del Qb, Q, Qz, F, Tp
    t_rr += time.perf_counter() - t1
    stats.update({"converged": bool(converged), "solves": int(solves), "cycles": int(cycles),
                  "checks": int(checks), "block": b, "basis_max": int(mmax), "shift": shift,
                  "worst_residual_estimate": worst, "retries": int(retries), "t_solve": t_solve, "t_orth": t_orth,
                  "t_rayleigh_ritz": t_rr})
    # The pairs beyond the needed ones (kept only for the cluster check at the
    # cut) are reported by their Ritz values, without vectors: purifying and
    # Rayleigh-Ritz on them cost 0.2 s of 7 at 100k vertices, 120 pairs.
    extra = np.sort(1.0 / mu[need:want] - shift)
    th2 = np.concatenate([th2, np.maximum(extra, th2[-1])])
    if below is not None and int((th2 < -shift).sum()) != below:
        raise _ShiftFailed(f"{int((th2 < -shift).sum())} eigenvalues found below the shift, "
                           f"the inertia says {below}")
    lam = np.concatenate([np.zeros(ncomp), th2])
    LZ = L @ Z  # residuals of the constants: ||L z|| / ||M z||
    rz = np.linalg.norm(LZ, axis=0) / np.linalg.norm(Z * m[:, None], axis=0)
    return lam, X, stats, np.concatenate([rz, rt])


def _final_ritz(L, m, Zt, Xs):
    """Rayleigh-Ritz on purified Ritz vectors ``Xs`` (scaled variable, from
    :func:`_purified`) in the original pencil, deflated exactly against the
    constants: the pencil ``(X^T L X, X^T M X)`` gives M-orthonormal Ritz
    vectors in one step. Returns the Ritz values, the vectors (C-ordered,
    original variable, elimination order) and their relative residuals.

    ``X^T M X`` is the Gram matrix of the scaled vectors (a symmetric rank-k
    update), and ``L X`` is rotated along with ``X`` rather than recomputed.
    (A symmetric orthonormalisation ``X G^(-1/2)`` instead of Rayleigh-Ritz
    saves one tall product but, inside eigenvalue clusters, left eigenvalue
    errors of 3e-10 relative at tol 1e-9, first order in the vectors'
    non-orthogonality.)"""
    c = Zt.T @ Xs
    for i in range(0, Xs.shape[0], _ROWS):  # in place, in row chunks: no (n, k) temporaries
        Xs[i:i + _ROWS] -= Zt[i:i + _ROWS] @ c
    G = Xs.T @ Xs
    X = Xs
    X /= np.sqrt(m)[:, None]
    LX = L @ X
    Hf = X.T @ LX
    th, Yf = la.eigh((Hf + Hf.T) * 0.5, (G + G.T) * 0.5)
    for i in range(0, X.shape[0], _ROWS):
        X[i:i + _ROWS] = X[i:i + _ROWS] @ Yf
        LX[i:i + _ROWS] = LX[i:i + _ROWS] @ Yf
    return th, X, _residuals(LX, m, np.maximum(th, 1e-300), X)
