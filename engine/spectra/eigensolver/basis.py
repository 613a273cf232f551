"""The result type of the eigensolver: low eigenpairs with the mass they are
orthonormal against, and projection onto them."""

from __future__ import annotations

import dataclasses
from typing import Any

import numpy as np
from numpy.typing import NDArray

from .final import split_cluster

Array = NDArray[Any]

__all__ = ["Eigenbasis"]


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
        Relative residual of each pair (see :mod:`engine.spectra.eigensolver`).
    info : dict
        ``method`` ("dense" or "sparse"), ``components``, ``seconds``,
        ``split_cluster`` (None or ``(first, last)``), ``solver_version``,
        ``converged``, ``fallback`` (why the fallback solver ran, when it
        did), solver statistics.
    """

    eigenvalues: Array
    eigenvectors: Array
    mass: Array
    residuals: Array
    info: dict[str, Any]

    @property
    def k(self) -> int:
        return int(self.eigenvalues.shape[0])

    @property
    def n(self) -> int:
        return int(self.eigenvectors.shape[0])

    def project(self, signal: Any) -> Array:
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
        out: Array = self.eigenvectors.T @ w
        return out

    def reconstruct(self, coefficients: Any) -> Array:
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
        info["split_cluster"] = split_cluster(self.eigenvalues, k, info.get("cluster_gap", 1e-6))
        return Eigenbasis(self.eigenvalues[:k].copy(), np.ascontiguousarray(self.eigenvectors[:, :k]),
                          self.mass, self.residuals[:k].copy(), info)
