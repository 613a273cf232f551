"""One mesh, its expensive operators computed once and then asked questions.

A :class:`Shape` prepares (cleans) the mesh, then computes lazily and keeps:
the cotangent stiffness and lumped mass, eigenbases of any size, orthogonal
eigenfunction products, heat and wave kernel signatures. With a cache folder
the eigenbasis and the products are also kept on disk, keyed by a hash of the
cleaned geometry and the parameters, so a second session on the same mesh
skips the solves. Everything is computed on the cleaned mesh; :meth:`restore`
carries per-vertex results back to every original vertex.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import NDArray

from ..common.cache import Cache, geometry_key
from .eigensolver import SOLVER_VERSION, Eigenbasis, eigenbasis
from ..intake.preparation import prepare_mesh
from .discretization import mesh_operators
from .descriptors import heat_kernel_rows, heat_kernel_signature, wave_kernel_signature
from .products import ProductBasis, default_product_tolerance, orthogonal_products

__all__ = ["Shape"]

Array = NDArray[Any]


class Shape:
    """A mesh with its spectral quantities, computed on demand and cached.

    Parameters
    ----------
    vertices : (n, 3) float array
    faces : (m, 3) int array, optional
        Triangles; or give polygons as ``corners`` (flat vertex indices) and
        ``sizes`` (corners per polygon).
    corners : (c,) int array, optional
    sizes : (p,) int array, optional
    triangles : ((t, 3) int array, (t,) int array), optional
        With ``corners`` and ``sizes``: the polygons' triangles and the
        polygon of each, used instead of triangulating (see
        :func:`engine.intake.preparation.prepare_mesh`). The cache keys hash
        the cleaned triangles, so another triangulation is another entry.
    cache : Cache or path-like, optional
        Folder cache for eigenbases and products. Eigenbasis entries are keyed
        by the geometry, ``k``, the operator variant and the solver's
        ``SOLVER_VERSION``, so a changed solver never reads an old basis.

    Attributes
    ----------
    prepared : PreparedMesh
    vertices : (n_clean, 3) float64 array
    faces : (m_clean, 3) int64 array
    hits : dict
        How many eigenbasis / products requests were answered from memory or
        disk, or computed.
    """

    def __init__(self, vertices: Any, faces: Any = None, *, corners: Any = None, sizes: Any = None,
                 cache: Any = None, triangles: Any = None) -> None:
        self.prepared = prepare_mesh(vertices, faces, corners=corners, sizes=sizes, triangles=triangles)
        self.vertices: Array = self.prepared.vertices
        self.faces: Array = self.prepared.faces
        if cache is not None and not isinstance(cache, Cache):
            open_cache: Any = Cache  # Cache(folder) is not annotated yet
            cache = open_cache(cache)
        self.cache: Cache | None = cache
        self.key = geometry_key(self.vertices, self.faces)
        self.hits = {"memory": 0, "disk": 0, "computed": 0}
        self._operators: Any = None
        self._mean_edge: float | None = None
        self._eig: Eigenbasis | None = None
        self._products: dict[tuple[int, int, float], ProductBasis] = {}

    # ------------------------------------------------------------------ sizes
    @property
    def n_vertices(self) -> int:
        return len(self.vertices)

    @property
    def n_original(self) -> int:
        return int(self.prepared.n_original)

    @property
    def operators(self) -> Any:
        """Stiffness and mass, the robust (intrinsic) variant when the mesh needs it
        (:func:`.discretization.mesh_operators`)."""
        if self._operators is None:
            self._operators = mesh_operators(self.vertices, self.faces, robust="auto")
        return self._operators

    @property
    def operators_built(self) -> bool:
        """Whether :attr:`operators` has been computed (a mesh matched through a stand-in may never need it)."""
        return self._operators is not None

    @property
    def stiffness(self) -> Any:
        """(n, n) csr_matrix, cotangent stiffness, positive semidefinite."""
        return self.operators.stiffness

    @property
    def mass(self) -> Array:
        """(n,) float64 lumped barycentric mass; sums to the area."""
        mass: Array = self.operators.mass
        return mass

    @property
    def area(self) -> float:
        return float(self.mass.sum())

    @property
    def mean_edge(self) -> float:
        """Mean length of the triangles' edges (each interior edge counted twice), computed once."""
        if self._mean_edge is None:
            e = self.vertices[self.faces] - self.vertices[np.roll(self.faces, 1, axis=1)]
            self._mean_edge = float(np.sqrt((e ** 2).sum(axis=2)).mean())
        return self._mean_edge

    # ------------------------------------------------------------------ bases
    def eigenbasis(self, k: int) -> Eigenbasis:
        """The first ``k`` eigenpairs of ``L phi = lambda M phi``.

        A larger basis computed earlier answers a smaller request.
        """
        k = int(min(k, self.n_vertices - 1))
        if self._eig is not None and self._eig.eigenvectors.shape[1] >= k:
            self.hits["memory"] += 1
            return self._eig if self._eig.k == k else self._eig.truncate(k)
        key = geometry_key(self.vertices, self.faces, what="eigenbasis", k=k,
                           robust=bool(self.operators.robust), solver=SOLVER_VERSION)
        if self.cache is not None:
            n = self.n_vertices
            stored = self.cache.load(key, {"eigenvalues": (k,), "eigenvectors": (n, k), "residuals": (k,)})
            if stored is not None:
                self.hits["disk"] += 1
                self._eig = Eigenbasis(stored["eigenvalues"], stored["eigenvectors"], self.mass,
                                       stored["residuals"], {"cache": "disk"})
                return self._eig
        self.hits["computed"] += 1
        self._eig = eigenbasis(self.stiffness, self.mass, k)
        if self.cache is not None:
            self.cache.save(key, {"eigenvalues": self._eig.eigenvalues, "eigenvectors": self._eig.eigenvectors,
                                  "residuals": self._eig.residuals})
        return self._eig

    def products(self, K: int, order: int, *, tol: float | None = None) -> ProductBasis:
        """Mass-orthonormal products of the first ``K`` eigenfunctions up to ``order``.

        ``tol`` defaults to :func:`.products.default_product_tolerance` for the vertex count.
        """
        if tol is None:
            tol = default_product_tolerance(self.n_vertices)
        key = (int(K), int(order), float(tol))
        if key in self._products:
            self.hits["memory"] += 1
            return self._products[key]
        disk = geometry_key(self.vertices, self.faces, what="products", K=K, order=order, tol=tol,
                            robust=bool(self.operators.robust))
        if self.cache is not None:
            stored = self.cache.load(disk, {"basis": (self.n_vertices, None), "kept": (None,),
                                            "exponents": (None, int(K)), "coefficients": (None, None)})
            if stored is not None:
                self.hits["disk"] += 1
                pb = ProductBasis(stored["basis"], stored["kept"], stored["exponents"], stored["coefficients"],
                                  self.mass, float(tol), int(stored["basis"].shape[1]))
                self._products[key] = pb
                return pb
        eb = self.eigenbasis(K)
        self.hits["computed"] += 1
        pb = orthogonal_products(eb.eigenvectors[:, :K], self.mass, order, K=K, tol=tol)
        self._products[key] = pb
        if self.cache is not None:
            self.cache.save(disk, {"basis": pb.basis, "kept": pb.kept, "exponents": pb.exponents,
                                   "coefficients": pb.coefficients})
        return pb

    # ------------------------------------------------------------------ descriptors
    def hks(self, k: int = 60, count: int = 16) -> Array:
        """Heat kernel signature, (n, count), on the area-normalised shape."""
        lam, phi = self.normalised_basis(k)
        return heat_kernel_signature(lam, phi, n_times=count)

    def wks(self, k: int = 60, count: int = 16) -> Array:
        """Wave kernel signature, (n, count)."""
        lam, phi = self.normalised_basis(k)
        return wave_kernel_signature(lam, phi, n_energies=count)

    def heat_rows(self, k: int, idx: Any, times: Any) -> Array:
        """Heat kernel rows of the vertices ``idx`` at ``times`` (area-normalised)."""
        lam, phi = self.normalised_basis(k)
        return heat_kernel_rows(lam, phi, idx, times)

    def normalised_basis(self, k: int) -> tuple[Array, Array]:
        """Eigenpairs of the shape scaled to unit area: ``(lambda * A, phi * sqrt(A))``."""
        eb = self.eigenbasis(k)
        a = self.area
        return eb.eigenvalues[:k] * a, eb.eigenvectors[:, :k] * np.sqrt(a)

    # ------------------------------------------------------------------ maps
    def restore(self, values: Any) -> Array:
        """Per-clean-vertex values -> per-original-vertex values."""
        return self.prepared.restore(values)

    def to_cleaned(self, values: Any) -> Array:
        """Per-original-vertex values -> per-clean-vertex values."""
        return self.prepared.to_cleaned(values)

    def original_index(self, idx: Any) -> Array:
        """Clean indices of original vertex indices; ValueError for dropped ones."""
        idx = np.asarray(idx, dtype=np.int64)
        if idx.size and (idx.min() < 0 or idx.max() >= self.n_original):
            raise ValueError(f"vertex index {int(idx.max() if idx.max() >= self.n_original else idx.min())} "
                             f"out of range for {self.n_original} vertices")
        clean: Array = np.asarray(self.prepared.to_clean)[idx]
        if (clean < 0).any():
            raise ValueError(f"vertex {int(idx[clean < 0][0])} is in no triangle")
        return clean
