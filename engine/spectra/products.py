"""Products of Laplace-Beltrami eigenfunctions and their mass-orthonormal basis.

The first ``K`` eigenfunctions span smooth signals well but miss signals that
are smooth functions *of* the eigenfunctions (a colour ramp along the first
non-constant eigenfunction squared, say). Pointwise products of eigenfunctions
up to a total degree ``order`` add those. The raw products are badly
conditioned and often exactly dependent (on the unit sphere
``x^2 + y^2 + z^2 = 1``), so they are orthogonalised in the mass inner product
``<f, g> = f^T M g`` and dependent products are dropped.

Conventions: ``eigenvectors`` is ``(n, k)`` mass-orthonormal with the constant
first, ``mass`` the ``(n,)`` lumped mass; a signal is ``(n,)`` or ``(n, c)``.
The monomial with exponent vector ``e`` (length ``K``) is the pointwise product
``prod_i phi_i ** e_i``; the all-zero exponent is the constant function 1.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass

import numpy as np

from ..common.arrays import ArrayLike, Array, check_coefficients, check_eigenvectors_mass, check_vertex_signal, float_matrix
import scipy.linalg as sla

__all__ = [
    "DEFAULT_PRODUCT_TOLERANCE",
    "default_product_tolerance",
    "LeastSquaresProducts",
    "ProductBasis",
    "least_squares_products",
    "orthogonal_products",
    "product_budget",
    "product_exponents",
    "raw_products",
]

MAX_ORDER = 5
"""Highest product degree accepted: orders above five add almost nothing (common practice)."""

DEFAULT_PRODUCT_TOLERANCE = 1e-3
"""Floor of the default tolerance, see :func:`default_product_tolerance`.

A product is kept when the part of it orthogonal (in the mass inner product)
to every product accepted before it has a norm of at least ``tol`` times the
product's own norm. The criterion is relative to each column's own norm, not
to the largest singular value of the whole set: raw products of degree ``d`` of
mass-normalised eigenfunctions scale like ``area ** (-(d - 1) / 2)``, so a
threshold relative to the largest column would depend on the size of the mesh.

The default is ``max(1e-3, 2 / n)`` for ``n`` vertices. An exact dependency
between products (on the unit sphere ``x^2 + y^2 + z^2 = 1`` among the
degree-1 products) leaves a discretisation remainder of about ``0.8 / n`` of a
product's norm on an icosphere, falling like O(h^2), so ``2 / n`` treats it as
a dependency at every resolution. The floor keeps a product only when at
least a thousandth of it is new: where products have no exact dependencies
there is no gap between dependent and independent ones, and a larger
tolerance only truncates content. ``tol = 0.05`` also counts the
discretisation remainders of higher-degree sphere-harmonic products as
dependencies; below about 1e-6 orthogonality degrades like ``eps / tol``.
The calibration figures are in docs/measurements.md ("Eigenfunction products").
"""

DEFAULT_BLOCK_SIZE = 128
"""Columns orthogonalised together: wide enough for BLAS-3, small enough for memory."""

# product_budget: r * n <= _BUDGET_ENTRIES keeps the basis under ~400 MB of
# float64; r**2 * n <= _BUDGET_WORK keeps the orthogonalisation (about
# 4 n r^2 flops for two Gram-Schmidt passes) to a few seconds on two cores.
_BUDGET_ENTRIES = 5.0e7
_BUDGET_WORK = 1.0e10


def product_exponents(K: int, order: int) -> Array:
    """Exponent vectors of all monomials of degree <= ``order`` in ``K`` eigenfunctions.

    Parameters
    ----------
    K : int
        Number of eigenfunctions (the constant counts as one of them).
    order : int
        Highest total degree, 1 to 5.

    Returns
    -------
    (r, K) int64 array
        ``r = C(K + order, order)`` rows. Degree 0 (the constant 1) first, then
        degree 1, 2, ...; within a degree the multisets of eigenfunction
        indices in lexicographic order (``(0, 0), (0, 1), ..., (1, 1), ...``).
    """
    K, order = _check_K_order(K, order)
    rows = [np.zeros(K, dtype=np.int64)]
    for d in range(1, order + 1):
        for combo in itertools.combinations_with_replacement(range(K), d):
            e = np.zeros(K, dtype=np.int64)
            np.add.at(e, list(combo), 1)
            rows.append(e)
    return np.vstack(rows)


def raw_products(eigenvectors: ArrayLike, exponents: ArrayLike) -> Array:
    """Pointwise products of eigenfunctions given by exponent vectors.

    Parameters
    ----------
    eigenvectors : (n, k) float array
    exponents : (r, K) int array, ``K <= k``, non-negative

    Returns
    -------
    (n, r) float64 array
        Column ``j`` is ``prod_i eigenvectors[:, i] ** exponents[j, i]``.
        When every monomial's parent (one factor fewer) is also listed, as in
        :func:`product_exponents`, degree ``d`` is built from degree ``d - 1``
        columns times one eigenfunction, one vectorised step per degree.
    """
    phi = float_matrix(eigenvectors, "eigenvectors")
    exps = _check_exponents(exponents, phi.shape[1])
    n, r = phi.shape[0], exps.shape[0]
    out = np.empty((n, r))
    degree = exps.sum(axis=1)
    index = {tuple(e): j for j, e in enumerate(exps.tolist())}
    out[:, degree == 0] = 1.0
    for d in range(1, int(degree.max(initial=0)) + 1):
        cols = np.flatnonzero(degree == d)
        # last eigenfunction that appears in each monomial, and its parent
        last = exps.shape[1] - 1 - np.argmax(exps[cols, ::-1] > 0, axis=1)
        parents = exps[cols].copy()
        parents[np.arange(len(cols)), last] -= 1
        pj = np.array([index.get(tuple(p), -1) for p in parents.tolist()], dtype=np.int64)
        have = pj >= 0
        if have.any():
            out[:, cols[have]] = out[:, pj[have]] * phi[:, last[have]]
        if not have.all():
            out[:, cols[~have]] = _monomials(phi, exps[cols[~have]])
    return out


def _monomials(phi: Array, exps: Array) -> Array:
    """Products for a block of exponents, without any parent columns (one block of memory)."""
    n, K = phi.shape
    deg = exps.sum(axis=1)
    top = int(deg.max(initial=0))
    # factor lists padded with index K, a column of ones
    factors = np.full((exps.shape[0], max(top, 1)), K, dtype=np.int64)
    for j, e in enumerate(exps):
        f = np.repeat(np.arange(K), e)
        factors[j, :f.size] = f
    ext = np.empty((n, K + 1))
    ext[:, :K] = phi
    ext[:, K] = 1.0
    out = ext[:, factors[:, 0]]
    for s in range(1, top):
        out *= ext[:, factors[:, s]]
    return out


@dataclass(frozen=True, eq=False)
class ProductBasis:
    """Mass-orthonormal basis of eigenfunction products.

    Attributes
    ----------
    basis : (n, rank) float64 array
        ``basis.T @ diag(mass) @ basis = I``.
    kept : (rank,) int64 array
        Row of ``exponents`` of the product behind each basis column, in the
        order the products were accepted.
    exponents : (r, K) int64 array
        Every product considered (see :func:`product_exponents`).
    coefficients : (rank, r) float64 array
        ``R`` with ``raw_products(eigenvectors, exponents) ~= basis @ R``:
        exact (to rounding) for kept products, within ``tolerance`` of each
        product's norm for dropped ones. ``R[:, kept]`` is upper triangular.
    mass : (n,) float64 array
    tolerance : float
    rank : int
    """

    basis: Array
    kept: Array
    exponents: Array
    coefficients: Array
    mass: Array
    tolerance: float
    rank: int

    def project(self, signal: ArrayLike) -> Array:
        """Coefficients ``basis^T M f``: (rank,) or (rank, c) for an (n,) or (n, c) signal."""
        f = check_vertex_signal(signal, self.basis.shape[0])
        return self.basis.T @ (self.mass[:, None] * f if f.ndim == 2 else self.mass * f)

    def reconstruct(self, coeffs: ArrayLike) -> Array:
        """Signal ``basis @ coeffs``: (n,) or (n, c)."""
        c = check_coefficients(coeffs, self.rank)
        return self.basis @ c


def default_product_tolerance(n_vertices: int) -> float:
    """``max(1e-3, 2 / n)``: the default dependency tolerance for ``n`` vertices (see
    :data:`DEFAULT_PRODUCT_TOLERANCE`)."""
    return max(DEFAULT_PRODUCT_TOLERANCE, 2.0 / max(int(n_vertices), 1))


def orthogonal_products(eigenvectors: ArrayLike, mass: ArrayLike, order: int, *, K: int | None = None,
                        tol: float | None = None,
                        block_size: int = DEFAULT_BLOCK_SIZE) -> ProductBasis:
    """Mass-orthonormal basis of the products of the first ``K`` eigenfunctions.

    Products are generated one block of ``block_size`` columns at a time (in
    the order of :func:`product_exponents`) and never all at once. Each block
    is orthogonalised against the accepted basis by classical Gram-Schmidt
    run twice (CGS2: two BLAS-3 passes, enough for orthogonality to rounding
    level), its columns are scaled by their original norms, and a greedy
    rank-revealing step accepts, again and again, the column with the largest
    remaining norm (the earliest among equal ones) while that is at least
    ``tol`` times its original norm. The rest are dependent on what was
    accepted and are dropped (their coefficients still express them, see
    :class:`ProductBasis`). Inside a block this is a pivoted Cholesky
    factorisation of the small mass Gram matrix, a triangular solve and one
    more Cholesky-QR pass (all the ``n``-sized work BLAS-3); for
    ``tol < 1e-6``, where the Gram matrix cannot resolve remainders,
    column-pivoted Gram-Schmidt. Which products survive depends on
    ``block_size`` only through the pivot order inside a block.

    Parameters
    ----------
    eigenvectors : (n, k) float array
        Mass-orthonormal eigenfunctions, constant first.
    mass : (n,) float array
        Lumped mass, non-negative.
    order : int
        Highest product degree, 1 to 5.
    K : int, optional
        Eigenfunctions to multiply (the constant counts). Default: all ``k``
        given, reduced by :func:`product_budget` for the vertex count.
    tol : float
        Relative remaining norm below which a product is dependent, in (0, 1).
        The default, ``max(1e-3, 2 / n)`` (:func:`default_product_tolerance`),
        treats discretisation-level dependencies as dependencies (see
        :data:`DEFAULT_PRODUCT_TOLERANCE`): on a unit icosphere the order-2
        products of the first four eigenfunctions span 9 dimensions, not 10
        (x^2 + y^2 + z^2 = 1).
    block_size : int
        Columns per block.

    Returns
    -------
    ProductBasis
    """
    phi, m = check_eigenvectors_mass(eigenvectors, mass)
    K = _resolve_K(K, order, phi)
    if tol is None:
        tol = default_product_tolerance(phi.shape[0])
    if not (isinstance(tol, (int, float)) and 0.0 < tol < 1.0):
        raise ValueError(f"tol must be in (0, 1), got {tol!r}")
    if not (isinstance(block_size, (int, np.integer)) and block_size >= 1):
        raise ValueError(f"block_size must be a positive integer, got {block_size!r}")
    exps = product_exponents(K, order)
    phi = phi[:, :K]
    n, r = phi.shape[0], exps.shape[0]
    sw = np.sqrt(m)
    # accepted basis stored transposed, so every slice QT[:k] is contiguous for BLAS
    QT = np.empty((min(r, n), n))
    R = np.zeros((min(r, n), r))
    kept: list[int] = []
    k = 0
    Qk = QT[:0]
    for start in range(0, r, block_size):
        stop = min(start + block_size, r)
        B = _monomials(phi, exps[start:stop])
        norm0 = np.sqrt(m @ (B * B))
        C = np.zeros((k, stop - start))
        for _ in range(2):  # CGS2
            if k:
                Qk = QT[:k]
                c = Qk @ (m[:, None] * B)
                B -= Qk.T @ c
                C += c
        R[:k, start:stop] = C
        live = np.flatnonzero(norm0 > 0)
        room = QT.shape[0] - k
        if live.size == 0 or room == 0:
            continue
        scaled = B[:, live] / norm0[live]
        new, tri, acc = _split_block(scaled, m, sw, tol)
        a = min(acc.size, room)
        if a == 0:
            continue
        QT[k:k + a] = new[:, :a].T
        R[k:k + a, start + live] = tri[:a] * norm0[live]
        kept.extend(int(j) for j in start + live[acc[:a]])
        k += a
    del Qk  # drop the last view into QT before resizing it
    QT.resize((k, n), refcheck=False)  # shrink in place: no second copy of the basis
    basis = QT.T
    return ProductBasis(basis=basis, kept=np.asarray(kept, dtype=np.int64), exponents=exps,
                        coefficients=np.ascontiguousarray(R[:k]), mass=m, tolerance=float(tol), rank=k)


_GRAM_TOLERANCE = 1e-6
"""From this ``tol`` up, blocks are split through their Gram matrix.

The Gram route resolves remaining norms to about ``sqrt(eps) ~ 1.5e-8`` of a
column's norm, ample for tolerances of 1e-6 and above."""


def _split_block(scaled: Array, m: Array, sw: Array, tol: float) -> tuple[Array, Array, Array]:
    """Greedy rank-revealing split of a block already orthogonal to the accepted basis.

    Each column of ``scaled`` is divided by its original norm, so its
    remaining norm after the columns accepted so far is directly the relative
    remainder compared with ``tol``. Columns are accepted one at a time, always
    the one with the largest remainder (column pivoting: taken in their own
    order, the gap between kept and dropped remainders on the sphere cases
    shrinks until no tolerance separates them; figures in docs/measurements.md,
    "Eigenfunction products"); among remainders equal to within 1e-9 the earliest wins, so rounding does not decide
    ties (the constant 1 is kept, not the constant eigenfunction).

    Returns
    -------
    new : (n, a) float64 array
        Accepted columns, mass-orthonormalised.
    tri : (a, b) float64 array
        ``scaled ~= new @ tri``, exact for accepted columns; ``tri[:, acc]``
        is upper triangular.
    acc : (a,) int64 array
        Positions of the accepted columns in the block, in acceptance order.

    For ``tol >= 1e-6``: pivoted Cholesky of the small ``b x b`` mass Gram
    matrix, the accepted columns by one triangular solve, then one more
    Cholesky-QR pass that restores orthogonality to rounding level (CholQR2):
    all the ``n``-sized work is BLAS-3. For smaller ``tol`` the Gram matrix
    cannot resolve the remainders: column-pivoted Gram-Schmidt (twice per
    accepted column) on the ``sqrt(M)``-weighted block.
    """
    n, b = scaled.shape
    tri = np.zeros((b, b))
    acc: list[int] = []
    live = np.ones(b, dtype=bool)
    if tol >= _GRAM_TOLERANCE:
        G: Array = scaled.T @ (m[:, None] * scaled)
        G = 0.5 * (G + G.T)
        rest: Array = np.diag(G).copy()  # squared remainders
        while live.any():
            j = _pivot(rest, live, tol * tol)
            if j < 0:
                break
            a = len(acc)
            d = math.sqrt(rest[j])
            row = (G[j] - tri[:a, j] @ tri[:a]) / d
            row[~live] = 0.0
            row[j] = d
            tri[a] = row
            rest -= row * row
            live[j] = False
            acc.append(j)
        a = len(acc)
        idx = np.asarray(acc, dtype=np.int64)
        if a == 0:
            return np.empty((n, 0)), np.empty((0, b)), idx
        tri = tri[:a]
        new = sla.solve_triangular(tri[:, idx], scaled[:, idx].T, trans="T", lower=False).T
        G2 = new.T @ (m[:, None] * new)
        U2 = sla.cholesky(0.5 * (G2 + G2.T), lower=False)
        new = sla.solve_triangular(U2, new.T, trans="T", lower=False).T
        return new, U2 @ tri, idx
    W: Array = sw[:, None] * scaled
    Qw = np.empty((n, b))
    rest = np.einsum("ij,ij->j", W, W)
    while live.any():
        j = _pivot(rest, live, tol * tol)
        if j < 0:
            break
        a = len(acc)
        w: Array = W[:, j].copy()
        for _ in range(2):
            if a:
                c = Qw[:, :a].T @ w
                w -= Qw[:, :a] @ c
        d = float(np.linalg.norm(w))
        if d < tol:  # the downdated remainder was optimistic
            live[j] = False
            continue
        q = w / d
        row = q @ W
        row[~live] = 0.0
        row[j] = d
        Qw[:, a] = q
        tri[a] = row
        W[:, live] -= np.outer(q, row[live])
        W[:, j] = 0.0
        rest = np.einsum("ij,ij->j", W, W)
        live[j] = False
        acc.append(j)
    a = len(acc)
    idx = np.asarray(acc, dtype=np.int64)
    new = np.empty((n, a))
    pos = m > 0
    new[pos] = Qw[pos, :a] / sw[pos, None]
    if a and not pos.all():
        # vertices without mass take no part in the inner product; their
        # values follow from the same combination of the products
        new[~pos] = sla.solve_triangular(tri[:a, idx], scaled[~pos][:, idx].T, trans="T", lower=False).T
    return new, tri[:a], idx


def _pivot(rest: Array, live: Array, floor: float) -> int:
    """Live column with the largest squared remainder (earliest within 1e-9), or -1 below ``floor``."""
    cand = np.where(live, rest, -np.inf)
    best = cand.max()
    if not best >= floor:
        return -1
    return int(np.argmax(cand >= best * (1.0 - 1e-9)))


@dataclass(frozen=True, eq=False)
class LeastSquaresProducts:
    """Raw products used directly, fitted by mass-weighted least squares.

    The baseline from the literature: ``project(f)`` solves
    ``min_c ||sqrt(M) (P c - f)||`` with ``scipy.linalg.lstsq`` (singular values
    below ``rcond`` times the largest are cut), ``reconstruct(c)`` is ``P c``.

    Attributes
    ----------
    products : (n, r) float64 array
        Raw products ``P`` (see :func:`raw_products`).
    exponents : (r, K) int64 array
    mass : (n,) float64 array
    rcond : float or None
        Passed to ``scipy.linalg.lstsq`` as ``cond``; None means machine
        precision times the largest dimension (the LAPACK default).
    """

    products: Array
    exponents: Array
    mass: Array
    rcond: float | None

    @property
    def rank(self) -> int:
        """Number of coefficients (the raw product count; dependent ones are not removed)."""
        return self.products.shape[1]

    def project(self, signal: ArrayLike) -> Array:
        """Least-squares coefficients: (r,) or (r, c)."""
        f = check_vertex_signal(signal, self.products.shape[0])
        sw = np.sqrt(self.mass)
        A = sw[:, None] * self.products
        b = sw[:, None] * f if f.ndim == 2 else sw * f
        c, *_ = sla.lstsq(A, b, cond=self.rcond)
        return np.asarray(c)

    def reconstruct(self, coeffs: ArrayLike) -> Array:
        """Signal ``P @ coeffs``: (n,) or (n, c)."""
        c = check_coefficients(coeffs, self.rank)
        return self.products @ c


def least_squares_products(eigenvectors: ArrayLike, mass: ArrayLike, order: int, *, K: int | None = None,
                           rcond: float | None = None) -> LeastSquaresProducts:
    """Raw eigenfunction products with a mass-weighted least-squares fit.

    Parameters
    ----------
    eigenvectors : (n, k) float array
    mass : (n,) float array
    order : int
        Highest product degree, 1 to 5.
    K : int, optional
        As in :func:`orthogonal_products`.
    rcond : float, optional
        Relative singular-value cut-off for the fit, in [0, 1).

    Returns
    -------
    LeastSquaresProducts
    """
    phi, m = check_eigenvectors_mass(eigenvectors, mass)
    K = _resolve_K(K, order, phi)
    if rcond is not None and not (isinstance(rcond, (int, float)) and 0.0 <= rcond < 1.0):
        raise ValueError(f"rcond must be None or in [0, 1), got {rcond!r}")
    exps = product_exponents(K, order)
    return LeastSquaresProducts(products=raw_products(phi, exps), exponents=exps, mass=m, rcond=rcond)


def product_budget(n_vertices: int, K: int, order: int) -> tuple[int, int]:
    """Largest ``(K, order)`` not above the request whose products fit the budget.

    Rule: with ``r = C(K + order, order)`` products on ``n`` vertices, keep
    ``r * n <= 5e7`` (the basis in float64 stays under 400 MB) and
    ``r**2 * n <= 1e10`` (two Gram-Schmidt passes cost about ``4 n r^2``
    flops: several seconds on one core at the bound, figure in
    docs/measurements.md, "Eigenfunction products"). ``K`` is lowered first,
    down to 2 (the constant and one eigenfunction); then ``order``, down to 1.

    Parameters
    ----------
    n_vertices : int
    K : int
    order : int
        1 to 5.

    Returns
    -------
    (K, order) : tuple of int
        E.g. (20, 3) stays (20, 3) at 2,500 vertices (1,771 products), becomes
        (16, 3) at 10,000 (969), (12, 3) at 41,000 (455) and (10, 3) at
        100,000 (286); (20, 2) (231 products) stays at 100,000.
    """
    K, order = _check_K_order(K, order)
    if not (isinstance(n_vertices, (int, np.integer)) and n_vertices >= 1):
        raise ValueError(f"n_vertices must be a positive integer, got {n_vertices!r}")
    n = int(n_vertices)

    def fits(k: int, o: int) -> bool:
        r = math.comb(k + o, o)
        return r * n <= _BUDGET_ENTRIES and r * r * n <= _BUDGET_WORK

    while not fits(K, order) and K > 2:
        K -= 1
    while not fits(K, order) and order > 1:
        order -= 1
    return K, order


# --- validation shared with approximation.py and descriptors.py ---------------------------------

def _check_K_order(K: object, order: object) -> tuple[int, int]:
    if not isinstance(order, (int, np.integer)) or isinstance(order, bool) or not 1 <= order <= MAX_ORDER:
        raise ValueError(f"order must be an integer from 1 to {MAX_ORDER}, got {order!r}")
    if not isinstance(K, (int, np.integer)) or isinstance(K, bool) or K < 1:
        raise ValueError(f"K must be a positive integer, got {K!r}")
    return int(K), int(order)


def _resolve_K(K: int | None, order: int, phi: Array) -> int:
    k = phi.shape[1]
    if K is None:
        _check_K_order(k, order)
        return product_budget(phi.shape[0], k, order)[0]
    K, _ = _check_K_order(K, order)
    if K > k:
        raise ValueError(f"K={K} exceeds the {k} eigenvectors given")
    return K


def _check_exponents(exponents: ArrayLike, k: int) -> Array:
    e = np.asarray(exponents)
    if e.ndim != 2 or e.shape[0] == 0 or not np.issubdtype(e.dtype, np.integer):
        raise ValueError(f"exponents must be a non-empty (r, K) integer array, got {e.dtype} {e.shape}")
    if e.shape[1] > k:
        raise ValueError(f"exponents use {e.shape[1]} eigenfunctions but only {k} are given")
    if (e < 0).any():
        raise ValueError("exponents must be non-negative")
    return e.astype(np.int64)


