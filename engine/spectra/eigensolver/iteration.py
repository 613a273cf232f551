"""Thick-restarted block Lanczos on the shift-inverted operator.

The operator is ``T = M^(1/2) (L + shift M)^(-1) M^(1/2)`` (symmetric; its
largest-magnitude eigenvalues ``mu = 1 / (lambda + shift)`` belong to the
eigenvalues ``lambda`` nearest to ``-shift``), deflated against the constant
vectors of the components; Rayleigh-Ritz with ``L`` itself at the end (Saad,
Numerical Methods for Large Eigenvalue Problems, 2011, ch. 4 and 6; Stewart
2001 and Wu and Simon 2000 for the Krylov-Schur thick restart).

The basis lives in one preallocated column-major buffer, the constants in its
first columns so that every Gram-Schmidt projection deflates them inside the
same product. After a block the Ritz values of ``H = Q^T T Q`` and the norms
of their residuals ``||T x - mu x|| = ||F y_last||`` are read off ``H`` and the
small Gram matrix ``F^T F`` of the remainder, without forming any Ritz vector
(:func:`estimate`); when every needed pair meets the target the residuals the
caller sees are computed on the purified Ritz vectors (:func:`confirm`). The
factor is dropped before that final Rayleigh-Ritz, whose arrays then take its
memory; a check that fails factors again. A thick restart (:func:`restart`)
happens only when the buffer is full. Figures behind the constants:
docs/measurements.md, "Eigensolver".
"""

from __future__ import annotations

import dataclasses
import time
from typing import Any, Callable

import numpy as np
import scipy.sparse as sp
from numpy.typing import NDArray

from .factor import BlockFactor, ShiftFailed
from .final import final_ritz, purified

Array = NDArray[Any]

# Block size ceil(BLOCK_SQRT * sqrt(p)) within [BLOCK_MIN, BLOCK_MAX]: at least
# as wide as the largest eigenvalue cluster (2l + 1 ~ 2 sqrt(j) on a sphere).
BLOCK_MIN, BLOCK_SQRT, BLOCK_MAX = 16, 2.2, 96
BASIS_FACTOR = 3.0  # the basis holds up to this many times the wanted pairs
# Below this tol the basis gets a second Gram-Schmidt pass (CGS2), and it gets
# one as well after a check that found the true residuals worse than the estimate.
CGS2_BELOW = 1e-6
# While the estimated residual is above SKIP_ABOVE * tol, every other check is skipped.
SKIP_ABOVE = 1e4
MAX_CYCLES, MAX_STALLS, MAX_RETRIES = 60, 3, 3

__all__ = ["Plan", "ShiftedOperator", "Lanczos", "lanczos", "plan_iteration", "orthonormal"]


@dataclasses.dataclass(frozen=True)
class Plan:
    """Sizes and target of one run: ``want`` non-zero pairs computed, the
    first ``need`` of them must meet ``tol``; blocks of ``block`` columns, a
    basis of at most ``basis_max``, ``keep`` Ritz vectors kept at a restart,
    ``nfree`` the dimension off the constants."""

    want: int
    need: int
    block: int
    keep: int
    basis_max: int
    nfree: int
    tol: float


@dataclasses.dataclass
class ShiftedOperator:
    """The factor of ``M^(-1/2) (L + shift M) M^(-1/2)``, held only here so
    that it can be dropped, and made again by ``remake`` when needed.
    ``below`` (None for a shift below ``lambda_1``) is the number of non-zero
    eigenvalues below ``-shift`` that the result must hold."""

    remake: Callable[[], BlockFactor]
    factor: BlockFactor | None
    shift: float
    below: int | None

    def get(self) -> BlockFactor:
        if self.factor is None:
            self.factor = self.remake()
        return self.factor


@dataclasses.dataclass
class Lanczos:
    """The state of one run: the basis buffer ``Qb`` (n, z + basis_max) with
    the ``z`` scaled constants first, ``H`` (basis_max, basis_max), ``m0``
    columns filled, ``lo`` the first column of the block awaiting ``T``,
    ``F`` the remainder of the last block, the last Ritz pairs ``(mu, Y)``
    (computed at ``ritz_at`` columns), the counters and the final answer
    ``(theta, X, residuals)`` once confirmed."""

    Qb: Array
    H: Array
    z: int
    m0: int
    inner: float
    cgs2: bool
    lo: int = 0
    F: Array | None = None
    mu: Array | None = None
    Y: Array | None = None
    ritz_at: int = -1
    solves: int = 0
    cycles: int = 0
    checks: int = 0
    stall: int = 0
    retries: int = 0
    next_check: int = 0
    best: float = np.inf
    worst: float = np.inf
    converged: bool = False
    answer: tuple[Array, Array, Array] | None = None
    times: dict[str, float] = dataclasses.field(
        default_factory=lambda: {"t_solve": 0.0, "t_orth": 0.0, "t_rayleigh_ritz": 0.0})

    @property
    def Q(self) -> Array:
        return self.Qb[:, self.z:self.z + self.m0]

    @property
    def Qz(self) -> Array:
        return self.Qb[:, :self.z + self.m0]


def plan_iteration(n: int, ncomp: int, p: int, k_needed: int, tol: float) -> Plan:
    """Sizes for ``p`` pairs (``ncomp`` of them constants) of which the first
    ``k_needed`` are returned, ``n`` unknowns."""
    want = p - ncomp
    nfree = n - ncomp
    b = int(min(max(BLOCK_MIN, np.ceil(BLOCK_SQRT * np.sqrt(p))), BLOCK_MAX, nfree))
    keep = min(want + max(16, want // 4), nfree)
    mmax = min(max(int(BASIS_FACTOR * want), keep + 2 * b), nfree)
    need = min(k_needed + 1, p) - ncomp  # k and the one after, for the cut
    return Plan(want=want, need=need, block=b, keep=keep, basis_max=mmax, nfree=nfree, tol=tol)


def lanczos(L: sp.csr_matrix, m: Array, Z: Array, op: ShiftedOperator, plan: Plan,
            seed: int) -> tuple[Array, Array, dict[str, Any], Array]:
    """Run the iteration on the pencil ``(L, diag(m))`` in elimination order,
    deflated against the M-orthonormal constants ``Z`` (n, ncomp).

    Returns the eigenvalues (ncomp + want,), ascending with the constants'
    zeros first, the eigenvectors (n, need) of the non-zero ones (original
    variable, elimination order), statistics, and the residuals
    (ncomp + need,). Raises :class:`ShiftFailed` when the eigenvalues found
    below an interior shift disagree with the inertia.
    """
    r = np.sqrt(m)
    Zt = Z * r[:, None]  # orthonormal in the scaled variable
    fac = op.get()
    stats: dict[str, Any] = {"factor_nnz": fac.nnz, "factor_stored": fac.stored}
    del fac
    st = start(Zt, plan, seed)
    while True:
        apply_operator(st, op.get())
        full = st.m0 + plan.block > plan.basis_max or st.m0 >= plan.nfree
        if (st.m0 >= plan.need + plan.block and st.m0 >= st.next_check) or full:
            if check(L, m, Zt, st, plan, op):
                break
            if full:
                st.cycles += 1
                st.stall = st.stall + 1 if st.worst > 0.5 * st.best else 0
                st.best = min(st.best, st.worst)
                if st.stall >= MAX_STALLS or st.cycles >= MAX_CYCLES:
                    break
                restart(st, plan)
        if not extend(st, plan):
            break
    return wrap_up(L, m, Z, Zt, st, plan, op, stats)


def start(Zt: Array, plan: Plan, seed: int) -> Lanczos:
    """The basis buffer with the constants ``Zt`` and a seeded random first block."""
    n, z = Zt.shape
    rng = np.random.default_rng(seed)
    V = rng.standard_normal((n, plan.block))
    W = orthonormal(orth_against(orth_against(V, Zt), Zt))
    Qb = np.empty((n, z + plan.basis_max), order="F")  # column blocks contiguous
    Qb[:, :z] = Zt
    m0 = W.shape[1]
    Qb[:, z:z + m0] = W
    return Lanczos(Qb=Qb, H=np.zeros((plan.basis_max, plan.basis_max)), z=z, m0=m0, inner=plan.tol,
                   cgs2=plan.tol < CGS2_BELOW)


def apply_operator(st: Lanczos, fac: BlockFactor) -> None:
    """Solve with the newest block, project it off the basis (first
    Gram-Schmidt pass) into ``st.F``, and fill in the new columns of ``H``."""
    t1 = time.perf_counter()
    z, lo, m0 = st.z, st.lo, st.m0
    Tp = fac.solve(st.Qb[:, z + lo:z + m0])
    st.solves += m0 - lo
    st.times["t_solve"] += time.perf_counter() - t1
    t1 = time.perf_counter()
    Qz = st.Qz
    Cz = Qz.T @ Tp  # also the new columns of H
    F = Tp
    F -= tall(Qz, Cz)  # (I - Q Q^T) T Q_last: the Krylov-Schur remainder, off the constants
    C = Cz[z:]
    st.H[:m0, lo:m0] = C
    st.H[lo:m0, :m0] = C.T
    st.F = F
    st.times["t_orth"] += time.perf_counter() - t1


def check(L: sp.csr_matrix, m: Array, Zt: Array, st: Lanczos, plan: Plan, op: ShiftedOperator) -> bool:
    """Estimate the residuals, and confirm them when they meet the target.
    True when the iteration stops here."""
    t1 = time.perf_counter()
    st.checks += 1
    worst = estimate(st, plan, op.shift)
    st.worst = worst
    # far from the target, skip the next block's check
    st.next_check = st.m0 + (2 * plan.block if worst > SKIP_ABOVE * st.inner else plan.block)
    if worst <= st.inner or st.m0 >= plan.nfree:
        op.factor = None  # the final Rayleigh-Ritz takes the factor's memory
        stop = confirm(L, m, Zt, st, plan)
        st.times["t_rayleigh_ritz"] += time.perf_counter() - t1
        if not stop:
            op.get()
        return stop
    st.times["t_rayleigh_ritz"] += time.perf_counter() - t1
    return False


def estimate(st: Lanczos, plan: Plan, shift: float) -> float:
    """Ritz pairs of ``H`` into ``st.mu``, ``st.Y`` (ordered by
    :func:`ritz_order`) and the worst pencil residual of the needed pairs,
    from ``H`` and ``F^T F`` alone."""
    assert st.F is not None
    m0, need = st.m0, plan.need
    mu, Y = np.linalg.eigh((st.H[:m0, :m0] + st.H[:m0, :m0].T) * 0.5)  # numpy's pool, as orthonormal
    o = ritz_order(mu, plan.want)
    mu, Y = mu[o], Y[:, o]
    st.mu, st.Y, st.ritz_at = mu, Y, m0
    Yl = Y[st.lo:, :need]
    FtF = st.F.T @ st.F
    fres = np.sqrt(np.maximum(np.einsum("ij,ij->j", Yl, FtF @ Yl), 0.0))
    th = 1.0 / mu[:need] - shift
    # pencil residual of the purified vector T x: ||f|| / (mu^2 theta)
    res = fres / (mu[:need] ** 2 * np.maximum(th, 1e-300))
    return float(res.max())


def confirm(L: sp.csr_matrix, m: Array, Zt: Array, st: Lanczos, plan: Plan) -> bool:
    """The residuals the caller sees, on the purified Ritz vectors (the
    estimate lives in the mass-scaled variable). True when they meet ``tol``
    (or nothing more can be done); otherwise tighten the estimate's target,
    switch to two Gram-Schmidt passes and go on."""
    answer = final_answer(L, m, Zt, st, plan)
    true_worst = float(answer[2].max())
    if true_worst <= plan.tol or st.m0 >= plan.nfree or st.retries >= MAX_RETRIES:
        st.converged = true_worst <= plan.tol
        st.worst = true_worst
        st.answer = answer
        return True
    st.retries += 1
    st.cgs2 = True  # an optimistic estimate may be lost orthogonality
    st.inner = min(st.inner, st.worst) * min(0.5, 0.8 * plan.tol / true_worst)
    return False


def final_answer(L: sp.csr_matrix, m: Array, Zt: Array, st: Lanczos,
                 plan: Plan) -> tuple[Array, Array, Array]:
    """Rayleigh-Ritz on the purified needed Ritz vectors of the current basis."""
    assert st.mu is not None and st.Y is not None and st.F is not None
    return final_ritz(L, m, Zt, purified(st.Q, st.Y, st.mu, st.F, st.lo, plan.need))


def restart(st: Lanczos, plan: Plan) -> None:
    """Thick restart (Krylov-Schur): keep the best ``plan.keep`` Ritz vectors."""
    assert st.mu is not None and st.Y is not None
    t1 = time.perf_counter()
    keep = plan.keep
    st.Qb[:, st.z:st.z + keep] = st.Q @ st.Y[:, :keep]
    st.H[:] = 0.0
    st.H[np.arange(keep), np.arange(keep)] = st.mu[:keep]
    st.times["t_rayleigh_ritz"] += time.perf_counter() - t1
    st.m0 = st.lo = keep
    st.next_check = 0


def extend(st: Lanczos, plan: Plan) -> bool:
    """Orthonormalise the remainder into the next block and append it.
    False when the Krylov space is exhausted."""
    assert st.F is not None
    t1 = time.perf_counter()
    # second classical Gram-Schmidt pass (CGS2, Giraud et al. 2005) for tight tolerances only
    W = orthonormal(orth_against(st.F, st.Qz) if st.cgs2 else st.F)
    st.times["t_orth"] += time.perf_counter() - t1
    if W.shape[1] == 0:
        return False
    w = min(W.shape[1], plan.basis_max - st.m0)
    st.lo = st.m0
    st.Qb[:, st.z + st.m0:st.z + st.m0 + w] = W[:, :w]
    st.m0 += w
    return True


def wrap_up(L: sp.csr_matrix, m: Array, Z: Array, Zt: Array, st: Lanczos, plan: Plan,
            op: ShiftedOperator, stats: dict[str, Any]) -> tuple[Array, Array, dict[str, Any], Array]:
    """Eigenvalues, vectors, statistics and residuals at the end of the
    iteration (see :func:`lanczos`)."""
    t1 = time.perf_counter()
    op.factor = None
    if st.answer is None:  # stopped without the final check (stall, basis exhausted)
        if st.ritz_at != st.m0:
            estimate(st, plan, op.shift)
        st.answer = final_answer(L, m, Zt, st, plan)
    th2, X, rt = st.answer
    assert st.mu is not None
    mu, shift, ncomp = st.mu, op.shift, Z.shape[1]
    st.times["t_rayleigh_ritz"] += time.perf_counter() - t1
    stats.update({"converged": bool(st.converged), "solves": int(st.solves), "cycles": int(st.cycles),
                  "checks": int(st.checks), "block": plan.block, "basis_max": int(plan.basis_max),
                  "shift": shift, "worst_residual_estimate": st.worst, "retries": int(st.retries),
                  **st.times})
    st.Qb = st.H = np.empty((0, 0))  # the basis is not needed any more
    st.F = None
    # The pairs beyond the needed ones (kept only for the cluster check at the
    # cut) are reported by their Ritz values, without vectors.
    extra = np.sort(1.0 / mu[plan.need:plan.want] - shift)
    th2 = np.concatenate([th2, np.maximum(extra, th2[-1])])
    if op.below is not None and int((th2 < -shift).sum()) != op.below:
        raise ShiftFailed(f"{int((th2 < -shift).sum())} eigenvalues found below the shift, "
                          f"the inertia says {op.below}")
    lam = np.concatenate([np.zeros(ncomp), th2])
    LZ = L @ Z  # residuals of the constants: ||L z|| / ||M z||
    rz = np.linalg.norm(LZ, axis=0) / np.linalg.norm(Z * m[:, None], axis=0)
    return lam, X, stats, np.concatenate([rz, rt])


def ritz_order(mu: Array, want: int) -> Array:
    """Ritz pairs by distance from the shift (largest ``|mu|`` first), the
    first ``want`` of them re-sorted by ascending eigenvalue ``1/mu - shift``."""
    o = np.argsort(-np.abs(mu), kind="stable")
    sel = o[:want]
    out: Array = np.concatenate([sel[np.argsort(1.0 / mu[sel], kind="stable")], o[want:]])
    return out


def orth_against(W: Array, Q: Array) -> Array:
    """Project the columns of W off the orthonormal columns of Q (one pass of
    classical Gram-Schmidt)."""
    out: Array = W - Q @ (Q.T @ W)
    return out


def orthonormal(W: Array, drop: float = 1e-10) -> Array:
    """Orthonormal basis of span(W) with near-dependent directions dropped
    (eigen-decomposition of the Gram matrix, then one Cholesky-QR pass).

    numpy's LAPACK throughout, like the products around it in the loop (see
    :mod:`.factor` on mixing numpy's and scipy's thread pools)."""
    G = W.T @ W
    w, U = np.linalg.eigh((G + G.T) * 0.5)
    keep = w > drop * max(w.max(), 1e-300)
    W = tall(W, U[:, keep] / np.sqrt(w[keep]))
    G = W.T @ W
    C = np.linalg.cholesky((G + G.T) * 0.5)  # G = C C^T, C lower
    return tall(W, np.linalg.inv(C).T)  # W C^-T; near-orthonormal W: C near I


def tall(A: Array, B: Array) -> Array:
    """``A @ B`` for tall ``A`` (n rows) and small ``B``, column-major,
    written as ``(B^T A^T)^T``, which OpenBLAS runs faster."""
    out: Array = (B.T @ A.T).T
    return out
