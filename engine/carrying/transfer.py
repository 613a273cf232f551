"""Carry per-vertex signals from a source Shape to a target Shape.

A :class:`Transfer` is built once per pair from a :class:`Correspondence` and
then carries any number of signals; each signal costs two matrix products
(nothing is solved again). Continuous signals go through a basis on the source
and are then pulled through the point map ("reconstruct on the source, then
pull"): the two meshes' bases never need to correspond, and the source error
(what the basis fails to carry of the signal on the source itself) is
measured exactly.

Bases
    pointwise      pulled back through the map, interpolated on source triangles
    laplacian      the first ``k`` eigenfunctions of the source
    orthoproducts  mass-orthonormal products of the first ``K`` source
                   eigenfunctions up to ``order``
    products       the raw products, fitted by least squares

The default basis is pointwise: on every ground-truth pair of
benchmarks/transfer_accuracy.py the basis routes tie with it or lose to it
(their own source error adds to the map's; figures in the README's accuracy
table), so none earns its cost yet.

Blended values are clamped by :func:`engine.carrying.signals.clamp` (colours,
linear, and weights to [0, 1]; floats and vectors to the source's own
per-channel range); labels and masks are never blended (the weighted majority
of the source triangle's corners).
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from typing import Any, cast

import numpy as np
from numpy.typing import ArrayLike, NDArray

from ..spectra.approximation import SPECTRAL_BASES, check_basis_name
from ..spectra.products import product_exponents, raw_products
from ..matching.correspondence import Correspondence
from ..spectra.shape import Shape
from .signals import KINDS, check_signal, clamp

__all__ = ["BASES", "Transfer", "TransferResult"]

BASES = ("pointwise",) + SPECTRAL_BASES


@dataclass(frozen=True)
class TransferResult:
    """One transferred signal.

    Attributes
    ----------
    values : (n_t_original, ...) array
    source_error : float
        Relative mass-weighted error of the basis reconstruction of the signal
        on the source, ``||f - B B^T M f||_M / ||f||_M`` (0 for pointwise,
        labels and masks).
    report : dict
    """

    values: NDArray[Any]
    source_error: float
    report: dict[str, Any]


class Transfer:
    """Signals from ``source`` to ``target`` through one correspondence.

    Parameters
    ----------
    source, target : Shape
    correspondence : Correspondence
    basis : str
        One of :data:`BASES` (the module docstring describes them).
    k : int
        Size of the Laplacian basis.
    K, order : int
        Eigenfunctions and order of the product bases; ``K`` by default from
        the source vertex count (10 at most 20k vertices, 8 above) so the
        orthogonalisation stays within a few seconds.
    """

    def __init__(self, source: Shape, target: Shape, correspondence: Correspondence, *,
                 basis: str = "pointwise", k: int = 100, K: int | None = None, order: int = 3) -> None:
        check_basis_name(basis, BASES)
        if correspondence.source is not source or correspondence.target is not target:
            raise ValueError("the correspondence was built for another source/target pair")
        self.source, self.target, self.correspondence, self.basis = source, target, correspondence, basis
        t0 = time.perf_counter()
        self._P: Any = cast(Any, correspondence).matrix()          # (n_t, n_s) sparse
        self._B: NDArray[np.float64] | None = None                 # (n_s, r) basis on the source
        self._W: NDArray[np.float64] | None = None                 # (r, n_s) coefficient operator
        if K is None:
            K = 10 if source.n_vertices <= 20000 else 8
        info: dict[str, Any] = {"basis": basis}
        if basis == "laplacian":
            eb = source.eigenbasis(k)
            self._B = eb.eigenvectors
            self._W = (eb.eigenvectors * source.mass[:, None]).T
            info["size"] = int(self._B.shape[1])
        elif basis == "orthoproducts":
            pb = source.products(K, order)
            self._B = pb.basis
            self._W = (pb.basis * source.mass[:, None]).T
            info.update(K=K, order=order, columns=int(len(pb.exponents)), rank=int(pb.basis.shape[1]))
        elif basis == "products":
            eb = source.eigenbasis(K)
            raw = raw_products(eb.eigenvectors[:, :K], product_exponents(K, order))
            s = np.sqrt(source.mass)[:, None]
            self._B = raw
            self._W = np.linalg.pinv(raw * s, rcond=1e-10) * s.T
            info.update(K=K, order=order, columns=int(raw.shape[1]))
        if self._B is not None:
            self._PB = np.asarray(self._P @ self._B)              # (n_t, r)
        self.info = info
        self.info["build_seconds"] = round(time.perf_counter() - t0, 4)

    def linear(self, flat: NDArray[np.float64]) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """The basis route of ``flat`` without any clamping, on the cleaned meshes.

        Parameters
        ----------
        flat : (n_s_clean, c) float64 array

        Returns
        -------
        values : (n_t_clean, c) float64 array
            ``P f`` for pointwise, ``P B W f`` through a basis.
        source_errors : (c,) float64 array
            Per column, ``||f - B W f||_M / ||f||_M`` (0 for pointwise).
        """
        if self._B is None or self._W is None:
            return np.asarray(self._P @ flat, dtype=np.float64), np.zeros(flat.shape[1])
        coef = self._W @ flat
        rec = self._B @ coef
        m = self.source.mass[:, None]
        num = np.sqrt((m * (rec - flat) ** 2).sum(axis=0))
        den = np.sqrt((m * flat ** 2).sum(axis=0))
        errors = np.divide(num, den, out=np.zeros_like(num), where=den > 0)
        return np.asarray(self._PB @ coef, dtype=np.float64), errors

    def transfer(self, values: ArrayLike, *, kind: str = "color", name: str = "signal") -> TransferResult:
        """Carry one signal.

        Parameters
        ----------
        values : (n_s_original,) or (n_s_original, c) array
        kind : {"color", "weight", "float", "vector", "label", "mask"}

        Returns
        -------
        TransferResult
        """
        if kind not in KINDS:
            raise ValueError(f"unknown signal kind {kind!r}; expected one of {', '.join(KINDS)}")
        t0 = time.perf_counter()
        a = check_signal(name, values, self.source.n_original, kind)
        if kind in ("label", "mask"):
            labels = self.correspondence.pull_labels(a)
            return TransferResult(labels, 0.0, {"name": name, "kind": kind, "route": "pointwise",
                                                "seconds": round(time.perf_counter() - t0, 4)})
        f = self.source.to_cleaned(a).astype(np.float64)
        flat = f.reshape(len(f), -1)
        out, errors = self.linear(flat)
        err = 0.0
        if errors.any():  # a pointwise route has no error and needs no source mass
            # the errors of all channels together: sqrt(sum num_c^2) / sqrt(sum den_c^2)
            den_c = np.sqrt((self.source.mass[:, None] * flat ** 2).sum(axis=0))
            den = float(np.sqrt((den_c ** 2).sum()))
            err = float(np.sqrt(((errors * den_c) ** 2).sum())) / den if den > 0 else 0.0
        out = clamp(out, kind, flat).reshape((len(out),) + f.shape[1:])
        if not np.isfinite(out).all():  # never write NaN
            raise ValueError(f"transfer of {name!r} produced non-finite values")
        return TransferResult(self.target.restore(out), err,
                              {"name": name, "kind": kind, "basis": self.basis, "source_error": err,
                               "seconds": round(time.perf_counter() - t0, 4)})

    def report(self) -> dict[str, Any]:
        """JSON-able: the correspondence's report and this transfer's bases."""
        return {"correspondence": self.correspondence.report(), "transfer": dict(self.info)}
