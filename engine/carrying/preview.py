"""How much of each signal a basis can carry: its reconstruction on its own mesh.

This is what the add-on's preview shows on the source and what
``python -m engine approximate`` writes: every signal projected onto a basis
of the mesh and reconstructed, with its relative mass-weighted L2 error. A
signal the basis cannot carry on the source will not arrive on the target
either, so the error is a lower bound for the transfer's.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass
from typing import Any

from numpy.typing import NDArray

from ..spectra.approximation import SPECTRAL_BASES, LaplacianBasis, check_basis_name, relative_error
from ..spectra.products import least_squares_products, product_budget
from .signals import BLENDED, Signal, clamp, signal_to_property, signals_from_properties

__all__ = ["Preview", "basis_for", "approximate_properties", "approximate_signals"]

DEFAULT_LAPLACIAN_SIZE = 100
DEFAULT_PRODUCT_EIGENFUNCTIONS = 20


@dataclass(frozen=True)
class Preview:
    """Reconstructed signals and their errors.

    Attributes
    ----------
    values : dict name -> (n_original, ...) array, in the signal's kind
        (linear colours, float weights, labels and masks unchanged).
    properties : dict name -> array in the file dtype (for PLY output).
    errors : dict name -> float
        Relative mass-weighted L2 error of the reconstruction (0 for labels
        and masks, which are never filtered).
    description : str
        The basis and its size, for reports.
    size : int
        The number of basis functions.
    """

    values: dict[str, NDArray[Any]]
    properties: dict[str, NDArray[Any]]
    errors: dict[str, float]
    description: str
    size: int


def basis_for(shape: Any, name: str, *, k: int | None = None, order: int = 3) -> tuple[Any, str]:
    """The approximation basis ``name`` on ``shape`` and a description of it.

    Parameters
    ----------
    shape : Shape
    name : str
        One of :data:`engine.spectra.approximation.SPECTRAL_BASES`.
    k : int, optional
        Eigenfunctions: the basis size for ``"laplacian"`` (default 100), the
        eigenfunctions multiplied for the product bases (default 20, capped
        by :func:`product_budget` for the vertex count). Counts the constant.
    order : int
        Product order, 1 to 5.
    """
    check_basis_name(name, SPECTRAL_BASES)
    n = shape.n_vertices
    if name == "laplacian":
        size = min(k or DEFAULT_LAPLACIAN_SIZE, n - 1)
        eb = shape.eigenbasis(size)
        return LaplacianBasis(eb.eigenvectors, shape.mass), f"{size} eigenfunctions"
    K = k if k is not None else product_budget(n, DEFAULT_PRODUCT_EIGENFUNCTIONS, order)[0]
    if name == "orthoproducts":
        pb = shape.products(K, order)
        return pb, f"{pb.rank} of {pb.exponents.shape[0]} products (K={K}, order {order})"
    eb = shape.eigenbasis(K)
    ls = least_squares_products(eb.eigenvectors, shape.mass, order, K=K)
    return ls, f"{ls.rank} of {ls.exponents.shape[0]} raw products (K={K}, order {order}, least squares)"


def approximate_signals(shape: Any, signals: dict[str, Signal], *, basis: str = "orthoproducts",
                        k: int | None = None, order: int = 3) -> Preview:
    """Reconstruct every signal through one basis of ``shape``.

    Signals are given per original vertex; blended kinds are filtered and
    clamped to their bounds, labels and masks are returned unchanged.
    """
    b, description = basis_for(shape, basis, k=k, order=order)
    mass = shape.mass
    values: dict[str, NDArray[Any]] = {}
    props: dict[str, NDArray[Any]] = {}
    errors: dict[str, float] = {}
    for name, sig in signals.items():
        if sig.values.shape[0] != shape.n_original:
            raise ValueError(f"signal {name!r} has {sig.values.shape[0]} rows; the mesh has "
                             f"{shape.n_original} vertices")
        if sig.kind not in BLENDED:
            values[name], errors[name] = sig.values, 0.0
        else:
            f = shape.to_cleaned(sig.values)
            recon = b.reconstruct(b.project(f))
            recon = clamp(recon, sig.kind, sig.values)
            errors[name] = float(relative_error(recon, f, mass))
            values[name] = shape.restore(recon)
        props[name] = signal_to_property(sig, values[name])
    return Preview(values, props, errors, description, _size(b))


def approximate_properties(shape: Any, properties: dict[str, NDArray[Any]], *, basis: str = "orthoproducts",
                           k: int | None = None, order: int = 3,
                           names: Iterable[str] | None = None) -> Preview:
    """:func:`approximate_signals` for file vertex properties (as ``read_mesh`` gives them)."""
    signals = signals_from_properties(properties, names=names)
    if not signals:
        raise ValueError("the mesh has no vertex properties to approximate (only coordinates and normals)")
    return approximate_signals(shape, signals, basis=basis, k=k, order=order)


def _size(b: Any) -> int:
    rank = getattr(b, "rank", None)
    return int(rank) if rank is not None else int(b.basis.shape[1])
