"""Signals approximated in a basis, and how far off they are.

A basis is anything with ``project(signal) -> coefficients`` and
``reconstruct(coefficients) -> signal`` (:class:`Basis`): the Laplacian
eigenbasis (:class:`LaplacianBasis` here), the orthogonalised eigenfunction
products (:class:`engine.spectra.products.ProductBasis`) and the raw products fitted by
least squares (:class:`engine.spectra.products.LeastSquaresProducts`).

Errors are measured in the mass inner product: for a signal ``f`` and its
approximation ``g``, ``||g - f||_M / ||f||_M`` with ``||f||_M^2 = f^T M f``.
"""

from __future__ import annotations

from dataclasses import dataclass
from collections.abc import Iterable
from typing import Literal, Protocol, overload, runtime_checkable

import numpy as np

from ..common.arrays import ArrayLike, Array, check_coefficients, check_eigenvectors_mass, check_mass, check_vertex_signal

__all__ = ["SPECTRAL_BASES", "check_basis_name", "Approximation", "Basis", "LaplacianBasis", "approximate",
           "relative_error"]

# The names of the spectral bases: Laplacian eigenfunctions, orthogonalised
# eigenfunction products, raw products fitted by least squares.
# ``engine.carrying.transfer.BASES`` adds "pointwise".
SPECTRAL_BASES = ("laplacian", "orthoproducts", "products")


def check_basis_name(name: str, names: tuple[str, ...] = SPECTRAL_BASES) -> str:
    """Return ``name`` if it is one of ``names``; raise ValueError naming the choices otherwise."""
    if name not in names:
        raise ValueError(f"unknown basis {name!r}; expected one of {', '.join(names)}")
    return name


@runtime_checkable
class Basis(Protocol):
    """What :func:`approximate` needs from a basis."""

    def project(self, signal: ArrayLike) -> Array:
        """Coefficients of an ``(n,)`` or ``(n, c)`` signal."""
        ...

    def reconstruct(self, coeffs: ArrayLike) -> Array:
        """The ``(n,)`` or ``(n, c)`` signal for coefficients."""
        ...


@dataclass(frozen=True, eq=False)
class LaplacianBasis:
    """The first eigenfunctions of the Laplacian as a basis.

    Attributes
    ----------
    eigenvectors : (n, k) float64 array
        Mass-orthonormal (``phi^T M phi = I``).
    mass : (n,) float64 array
    """

    eigenvectors: Array
    mass: Array

    def __post_init__(self) -> None:
        phi, m = check_eigenvectors_mass(self.eigenvectors, self.mass)
        object.__setattr__(self, "eigenvectors", phi)
        object.__setattr__(self, "mass", m)

    @property
    def rank(self) -> int:
        return self.eigenvectors.shape[1]

    def project(self, signal: ArrayLike) -> Array:
        """Coefficients ``phi^T M f``: (k,) or (k, c)."""
        f = check_vertex_signal(signal, self.eigenvectors.shape[0])
        return self.eigenvectors.T @ (self.mass[:, None] * f if f.ndim == 2 else self.mass * f)

    def reconstruct(self, coeffs: ArrayLike) -> Array:
        """Signal ``phi @ coeffs``: (n,) or (n, c)."""
        return self.eigenvectors @ check_coefficients(coeffs, self.rank)


@dataclass(frozen=True, eq=False)
class Approximation:
    """A signal carried through a basis.

    Attributes
    ----------
    values : (n,) or (n, c) float64 array
        Reconstruction, clamped when asked.
    relative_error : float
        Over all channels together: ``||g - f||_M / ||f||_M`` with the
        Frobenius-style norm ``sum_c ||.||_M^2``.
    channel_errors : (c,) float64 array
        The same per channel (one entry for an ``(n,)`` signal).
    coefficients : (r,) or (r, c) float64 array
        What the basis produced before reconstruction.
    """

    values: Array
    relative_error: float
    channel_errors: Array
    coefficients: Array


def approximate(signal: ArrayLike, basis: Basis, mass: ArrayLike, *, clamp: tuple[float, float] | None = None) -> Approximation:
    """Project a signal onto a basis, reconstruct it and measure the error.

    Parameters
    ----------
    signal : (n,) or (n, c) float array
        Scalar, vector or colour per vertex.
    basis : Basis
        Any object with ``project`` and ``reconstruct``.
    mass : (n,) float array
        Lumped mass, for the error.
    clamp : (low, high), optional
        For bounded signals (colours and weights in ``(0, 1)``): the
        reconstruction is clipped to this range before the error is measured.

    Returns
    -------
    Approximation
    """
    m = check_mass(mass, _length(mass, "mass"))
    f = check_vertex_signal(signal, m.shape[0])
    if not isinstance(basis, Basis):
        raise ValueError(f"basis must have project() and reconstruct(), got {type(basis).__name__}")
    lo_hi = _check_clamp(clamp)
    coeffs = np.asarray(basis.project(f))
    values = np.asarray(basis.reconstruct(coeffs), dtype=np.float64)
    if values.shape != f.shape:
        raise ValueError(f"basis reconstructed shape {values.shape} for a signal of shape {f.shape}")
    if lo_hi is not None:
        values = np.clip(values, lo_hi[0], lo_hi[1])
    return Approximation(values=values, relative_error=relative_error(values, f, m),
                         channel_errors=relative_error(values, f, m, per_channel=True), coefficients=coeffs)


@overload
def relative_error(approx: ArrayLike, exact: ArrayLike, mass: ArrayLike, *,
                   per_channel: Literal[False] = False) -> float: ...


@overload
def relative_error(approx: ArrayLike, exact: ArrayLike, mass: ArrayLike, *,
                   per_channel: Literal[True]) -> Array: ...


def relative_error(approx: ArrayLike, exact: ArrayLike, mass: ArrayLike, *,
                   per_channel: bool = False) -> float | Array:
    """Mass-weighted relative L2 error ``||approx - exact||_M / ||exact||_M``.

    Parameters
    ----------
    approx, exact : (n,) or (n, c) float arrays, same shape
    mass : (n,) float array
    per_channel : bool
        Return one error per channel instead of one over all channels.

    Returns
    -------
    float, or (c,) float64 array when ``per_channel``
        A zero ``exact`` (channel) reproduced exactly has error 0; a zero
        ``exact`` with a non-zero ``approx`` has error ``inf`` (no relative
        scale exists). Never NaN.
    """
    m = check_mass(mass, _length(mass, "mass"))
    f = check_vertex_signal(exact, m.shape[0])
    g = check_vertex_signal(approx, m.shape[0])
    if g.shape != f.shape:
        raise ValueError(f"approx and exact must have the same shape, got {g.shape} and {f.shape}")
    d2 = f.reshape(f.shape[0], -1)
    diff = (g - f).reshape(d2.shape)
    num = m @ (diff * diff)
    den = m @ (d2 * d2)
    if per_channel:
        return _ratio(num, den)
    return float(_ratio(np.array([num.sum()]), np.array([den.sum()]))[0])


def _length(a: ArrayLike, name: str) -> int:
    shape = np.shape(a)
    if len(shape) != 1:
        raise ValueError(f"{name} must be a 1-D array (one value per vertex), got shape {shape}")
    return shape[0]


def _ratio(num: Array, den: Array) -> Array:
    out = np.zeros_like(num)
    pos = den > 0
    out[pos] = np.sqrt(num[pos] / den[pos])
    out[~pos & (num > 0)] = np.inf
    return out


def _check_clamp(clamp: Iterable[float] | None) -> tuple[float, float] | None:
    if clamp is None:
        return None
    try:
        lo, hi = (float(x) for x in clamp)
    except (TypeError, ValueError):
        raise ValueError(f"clamp must be a (low, high) pair of numbers, got {clamp!r}") from None
    if not (np.isfinite(lo) and np.isfinite(hi) and lo <= hi):
        raise ValueError(f"clamp must be finite with low <= high, got ({lo}, {hi})")
    return lo, hi
