"""Heat and wave kernel signatures: per-vertex descriptors from the eigenbasis.

Both are built from mass-orthonormal eigenpairs ``L phi = lambda M phi``
(eigenvalues ascending, the zero eigenvalue of the constant first) and their
default times or energies come from the eigenvalues themselves, so one default
fits a mesh of any size: scaling a mesh by ``s`` divides the eigenvalues by
``s^2``, multiplies the default times by ``s^2`` and shifts the default
energies by ``-2 log s``, leaving ``exp(-lambda t)`` and the energy bands
unchanged.
"""

from __future__ import annotations

import math

import numpy as np

from ..common.arrays import ArrayLike, Array, float_matrix, numeric_array

__all__ = ["heat_kernel_rows", "heat_kernel_signature", "heat_times", "wave_energies",
           "wave_kernel_signature"]

_ZERO = 1e-8
"""Eigenvalues at most this fraction of the largest count as zero."""


def heat_times(eigenvalues: ArrayLike, n: int = 16) -> Array:
    """Log-spaced diffusion times for the heat kernel signature.

    From ``4 ln 10 / lambda_max`` to ``4 ln 10 / lambda_1``, ``lambda_1`` the
    smallest non-zero eigenvalue: the rule of Sun, Ovsjanikov and Guibas,
    "A concise and provably informative multi-scale signature based on heat
    diffusion", SGP 2009. At the shortest time the highest eigenfunction's
    weight is ``exp(-4 ln 10) = 1e-4``; at the longest, the first non-constant
    one has fallen to 1e-4.

    Parameters
    ----------
    eigenvalues : (k,) float array
        Non-negative, ascending; zero eigenvalues (at most 1e-8 of the
        largest) are ignored.
    n : int
        Number of times, at least 1.

    Returns
    -------
    (n,) float64 array, ascending
    """
    lam = _check_eigenvalues(eigenvalues)
    if not isinstance(n, (int, np.integer)) or isinstance(n, bool) or n < 1:
        raise ValueError(f"n must be a positive integer, got {n!r}")
    nz = _nonzero(lam)
    c = 4.0 * math.log(10.0)
    return np.geomspace(c / nz.max(), c / nz.min(), int(n))


def heat_kernel_signature(eigenvalues: ArrayLike, eigenvectors: ArrayLike, times: ArrayLike | None = None, *, n_times: int = 16) -> Array:
    """Heat kernel signature ``k_t(x, x) = sum_i exp(-lambda_i t) phi_i(x)^2``.

    Sun, Ovsjanikov and Guibas, SGP 2009. The zero eigenvalue contributes its
    constant term ``phi_0^2 = 1 / area``, as in the full heat kernel.

    Parameters
    ----------
    eigenvalues : (k,) float array
    eigenvectors : (n, k) float array
        Mass-orthonormal.
    times : (T,) float array, optional
        Positive. Default :func:`heat_times` with ``n_times`` times.
    n_times : int
        Number of default times.

    Returns
    -------
    (n, T) float64 array
    """
    lam, phi = _check_pairs(eigenvalues, eigenvectors)
    t = heat_times(lam, n_times) if times is None else _check_positive(times, "times")
    weights = np.exp(-np.outer(np.clip(lam, 0.0, None), t))  # (k, T)
    return np.asarray((phi * phi) @ weights)


def heat_kernel_rows(eigenvalues: ArrayLike, eigenvectors: ArrayLike, vertices_idx: ArrayLike, times: ArrayLike) -> Array:
    """Heat kernel from a few landmark vertices to every vertex.

    ``H[x, l * T + j] = k_{t_j}(x, v_l) = sum_i exp(-lambda_i t_j) phi_i(x) phi_i(v_l)``.

    Parameters
    ----------
    eigenvalues : (k,) float array
    eigenvectors : (n, k) float array
        Mass-orthonormal.
    vertices_idx : (L,) int array
        Landmark vertices, in ``[0, n)``.
    times : (T,) float array
        Positive.

    Returns
    -------
    (n, L * T) float64 array
        Landmark-major: the ``T`` times of landmark 0, then of landmark 1, ...
    """
    lam, phi = _check_pairs(eigenvalues, eigenvectors)
    idx = np.asarray(vertices_idx)
    if idx.ndim != 1 or idx.size == 0 or not np.issubdtype(idx.dtype, np.integer):
        raise ValueError(f"vertices_idx must be a non-empty 1-D integer array, got {idx.dtype} {idx.shape}")
    n = phi.shape[0]
    if idx.min() < 0 or idx.max() >= n:
        bad = int(idx[(idx < 0) | (idx >= n)][0])
        raise ValueError(f"landmark index {bad} out of range for {n} vertices")
    t = _check_positive(times, "times")
    decay = np.exp(-np.outer(np.clip(lam, 0.0, None), t))  # (k, T)
    W = phi[idx].T[:, :, None] * decay[:, None, :]  # (k, L, T)
    return np.asarray(phi @ W.reshape(lam.size, -1))


def wave_energies(eigenvalues: ArrayLike, n: int = 16) -> tuple[Array, float]:
    """Default log-energies and band width for the wave kernel signature.

    Energies ``e`` are evenly spaced over ``[log lambda_1, log lambda_max]``
    (non-zero eigenvalues only) and the band width ``sigma`` equals their
    spacing ``(log lambda_max - log lambda_1) / (n - 1)``. Aubry, Schlickewei
    and Cremers (2011) take ``sigma`` as a multiple of the spacing (seven
    times, with about 100 energies; from memory); with 16 energies one spacing
    is about 7% of the log range, a similar absolute width, and neighbouring
    bands overlap at half their width.

    Parameters
    ----------
    eigenvalues : (k,) float array
        Needs two distinct non-zero eigenvalues.
    n : int
        Number of energies, at least 2.

    Returns
    -------
    energies : (n,) float64 array
    sigma : float
    """
    lam = _check_eigenvalues(eigenvalues)
    if not isinstance(n, (int, np.integer)) or isinstance(n, bool) or n < 2:
        raise ValueError(f"n must be an integer of at least 2, got {n!r}")
    nz = _nonzero(lam)
    lo, hi = math.log(nz.min()), math.log(nz.max())
    if not hi - lo > 1e-12:
        raise ValueError("default wave energies need at least two distinct non-zero eigenvalues, "
                         f"got a single value {nz.min():.6g}")
    return np.linspace(lo, hi, int(n)), (hi - lo) / (n - 1)


def wave_kernel_signature(eigenvalues: ArrayLike, eigenvectors: ArrayLike, energies: ArrayLike | None = None, *, n_energies: int = 16,
                          sigma: float | None = None) -> Array:
    """Wave kernel signature (Aubry, Schlickewei and Cremers, 2011).

    ``WKS(x, e) = sum_k phi_k(x)^2 g_k(e) / sum_k g_k(e)`` with
    ``g_k(e) = exp(-(e - log lambda_k)^2 / (2 sigma^2))`` over the non-zero
    eigenvalues: the average probability of finding a quantum particle of
    log-energy ``e`` at ``x``, normalised per energy.

    Parameters
    ----------
    eigenvalues : (k,) float array
    eigenvectors : (n, k) float array
        Mass-orthonormal.
    energies : (E,) float array, optional
        Log-energies. Default :func:`wave_energies` with ``n_energies``.
    n_energies : int
        Number of default energies.
    sigma : float, optional
        Band width in log-energy. Default: the spacing of the energies
        (:func:`wave_energies`); required when a single energy is given.

    Returns
    -------
    (n, E) float64 array, non-negative
    """
    lam, phi = _check_pairs(eigenvalues, eigenvectors)
    if energies is None:
        e, default_sigma = wave_energies(lam, n_energies)
    else:
        e = np.asarray(energies, dtype=np.float64).ravel()
        if e.size == 0 or not np.isfinite(e).all():
            raise ValueError("energies must be a non-empty array of finite log-energies")
        steps = np.diff(np.sort(e))
        default_sigma = float(steps.mean()) if e.size > 1 and steps.mean() > 0 else float("nan")
    s = default_sigma if sigma is None else sigma
    if not (isinstance(s, (int, float, np.floating)) and np.isfinite(s) and s > 0):
        raise ValueError(f"sigma must be a positive number (give it for a single energy), got {s!r}")
    keep = lam > _ZERO * lam.max()
    if not keep.any():
        raise ValueError("wave kernel signature needs a non-zero eigenvalue")
    d = (e[None, :] - np.log(lam[keep])[:, None]) ** 2 / (2.0 * s * s)  # (k', E)
    g = np.exp(-(d - d.min(axis=0)))  # shifted per energy; the normalisation cancels the shift
    g /= g.sum(axis=0)
    psi = phi[:, keep]
    return np.asarray((psi * psi) @ g)


def _check_eigenvalues(eigenvalues: ArrayLike) -> Array:
    lam = numeric_array(eigenvalues, "eigenvalues")
    if lam.ndim != 1 or lam.size == 0:
        raise ValueError(f"eigenvalues must have shape (k,) with k >= 1, got {lam.shape}")
    lam = lam.astype(np.float64)
    if not np.isfinite(lam).all():
        raise ValueError("eigenvalues must be finite")
    top = max(float(lam.max()), 0.0)
    if lam.min() < -_ZERO * max(top, 1.0):
        raise ValueError(f"eigenvalues must be non-negative (PSD stiffness), got {lam.min():.6g}")
    return lam


def _nonzero(lam: Array) -> Array:
    nz = lam[lam > _ZERO * lam.max()] if lam.max() > 0 else lam[:0]
    if nz.size == 0:
        raise ValueError("need at least one non-zero eigenvalue, all are zero")
    return nz


def _check_pairs(eigenvalues: ArrayLike, eigenvectors: ArrayLike) -> tuple[Array, Array]:
    lam = _check_eigenvalues(eigenvalues)
    phi = float_matrix(eigenvectors, "eigenvectors")
    if phi.shape[1] != lam.size:
        raise ValueError(f"{lam.size} eigenvalues but {phi.shape[1]} eigenvectors")
    return lam, phi


def _check_positive(values: ArrayLike, name: str) -> Array:
    t = np.asarray(values, dtype=np.float64).ravel()
    if t.size == 0 or not np.isfinite(t).all() or (t <= 0).any():
        raise ValueError(f"{name} must be a non-empty array of positive finite numbers")
    return t

