"""Functional maps between two eigenbases.

Convention: a functional map ``C`` of shape ``(k_t, k_s)`` takes the
coefficients of a function in the source eigenbasis to its coefficients in
the target eigenbasis (Ovsjanikov et al., Functional Maps, SIGGRAPH 2012).
A point map from target vertices to source points ``Pi`` (``n_t x n_s``, rows
of barycentric weights) induces ``C = Phi_t^T M_t Pi Phi_s``; conversely a
point map is recovered from ``C`` by matching each target row of
``Phi_t C`` to its nearest source row of ``Phi_s``.

Refinement is spectral upsampling (Melzi et al., ZoomOut, SIGGRAPH Asia 2019):
alternate point map and functional map while the basis grows.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Sequence

import numpy as np
from numpy.typing import NDArray
from scipy.spatial import cKDTree

__all__ = ["MapWeights", "fmap_from_descriptors", "fmap_from_pointmap", "pointmap_from_fmap", "zoomout",
           "orientation_operator", "orientation_operators", "nearest_rows"]

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.int64]
SpectralSide = tuple[FloatArray, FloatArray, FloatArray, FloatArray]
"""Eigenvalues (k,), basis (n, k), mass (n,), descriptors (n, q) of one shape."""


@dataclass(frozen=True)
class MapWeights:
    """Weights of the regularisers of :func:`fmap_from_descriptors`.

    ``commute``: Laplacian commutativity; ``orient``: the orientation term,
    over the operator pairs ``orient_s[f]``, ``orient_t[f]`` ((k, k) arrays,
    one pair per descriptor used, :func:`orientation_operator`).
    """

    commute: float = 1e-2
    orient: float = 0.0
    orient_s: Sequence[FloatArray] = ()
    orient_t: Sequence[FloatArray] = ()


def fmap_from_descriptors(source: SpectralSide, target: SpectralSide, weights: MapWeights = MapWeights()
                          ) -> FloatArray:
    """Least-squares functional map from corresponding descriptors.

    Minimises ``||C A - B||^2 + commute ||C Lambda_s - Lambda_t C||^2
    + orient sum_f ||C O_s^f - O_t^f C||^2`` over ``C``, where ``A, B`` are the
    descriptors' coefficients, ``Lambda`` the eigenvalues (scaled to unit
    range) and ``O^f`` the orientation operators of descriptor ``f`` (Ren,
    Poulenard, Wonka and Ovsjanikov, Continuous and orientation-preserving
    correspondences via functional maps, 2018).

    Parameters
    ----------
    source : (eigenvalues (k_s,), basis (n_s, k_s), mass (n_s,), descriptors (n_s, q))
    target : the same on the target
    weights : MapWeights

    Returns
    -------
    (k_t, k_s) float64 array
    """
    lam_s, phi_s, mass_s, desc_s = source
    lam_t, phi_t, mass_t, desc_t = target
    A = phi_s.T @ (mass_s[:, None] * desc_s)
    B = phi_t.T @ (mass_t[:, None] * desc_t)
    norm = np.linalg.norm(A, axis=0) + 1e-300
    A, B = A / norm, B / norm
    ks, kt = A.shape[0], B.shape[0]
    scale = max(lam_s[-1], lam_t[-1])
    ls, lt = lam_s / scale, lam_t / scale
    It, Is = np.eye(kt), np.eye(ks)
    # vec(C X) = (X^T kron I_t) vec(C), vec(Y C) = (I_s kron Y) vec(C) (column-major vec)
    H = np.kron(A @ A.T, It)
    g = (B @ A.T).ravel(order="F")
    D = (lt[:, None] - ls[None, :]) ** 2
    H += weights.commute * np.diag(D.ravel(order="F"))
    for Os, Ot in zip(weights.orient_s, weights.orient_t):
        E = np.kron(Os.T, It) - np.kron(Is, Ot)
        H += weights.orient * (E.T @ E)
    c = np.linalg.solve(H + 1e-10 * np.trace(H) / len(H) * np.eye(len(H)), g)
    out: FloatArray = c.reshape(kt, ks, order="F")
    return out


def orientation_operator(vertices: FloatArray, faces: IntArray, phi: FloatArray, mass: FloatArray,
                         f: FloatArray) -> FloatArray:
    """Reduced operator ``g -> <n, grad f x grad g>`` in the basis ``phi``.

    Parameters
    ----------
    vertices : (n, 3), faces : (m, 3)
    phi : (n, k) mass-orthonormal basis
    mass : (n,) float array
    f : (n,) float array, a descriptor

    Returns
    -------
    (k, k) float64 array ``O`` with ``O[i, j] = <phi_i, n . (grad f x grad phi_j)>_M``.
    """
    out: FloatArray = orientation_operators(vertices, faces, phi, np.asarray(f, float)[:, None])[0]
    return out


def orientation_operators(vertices: FloatArray, faces: IntArray, phi: FloatArray, fs: FloatArray) -> FloatArray:
    """:func:`orientation_operator` of every column of ``fs`` (n, d), the mesh's geometry computed once.

    Returns
    -------
    (d, k, k) float64 array.
    """
    v0, v1, v2 = (vertices[faces[:, i]] for i in range(3))
    nrm = np.cross(v1 - v0, v2 - v0)
    dbl = np.linalg.norm(nrm, axis=1)
    dbl = np.where(dbl > 0, dbl, 1.0)
    n = nrm / dbl[:, None]
    area = 0.5 * dbl
    # gradient of a hat function: (n x e_opposite) / (2 area)
    e = [v2 - v1, v0 - v2, v1 - v0]
    gh = [np.cross(n, ei) / dbl[:, None] for ei in e]
    # n . (grad f x grad phi) = sum_i (n x grad f) . gh_i phi(corner i), and with
    # grad f = sum_j f(corner j) gh_j that is sum_ij f_j phi_i gh_j . (gh_i x n):
    # per face a 3 x 3 table, so no (m, 3, k) gradient array of the basis is formed
    # (docs/measurements.md)
    table = [[np.einsum("mc,mc->m", gh[j], np.cross(gh[i], n)) for j in range(3)] for i in range(3)]
    fc = [np.asarray(fs, float)[faces[:, j]] for j in range(3)]          # (m, d) each
    corners = [phi[faces[:, i]] for i in range(3)]                       # (m, k) each
    phi_face = (corners[0] + corners[1] + corners[2]) / 3.0
    weight = [area[:, None] * sum(table[i][j][:, None] * fc[j] for j in range(3)) for i in range(3)]   # (m, d)
    out = np.empty((fc[0].shape[1], phi.shape[1], phi.shape[1]))
    for d in range(len(out)):
        out[d] = phi_face.T @ sum(weight[i][:, d, None] * corners[i] for i in range(3))
    return out


def fmap_from_pointmap(phi_s: FloatArray, phi_t: FloatArray, mass_t: FloatArray,
                       source_rows: IntArray | Callable[[FloatArray], FloatArray]) -> FloatArray:
    """``C = Phi_t^T M_t Pi Phi_s`` for a vertex map or a barycentric map.

    Parameters
    ----------
    phi_s : (n_s, k_s), phi_t : (n_t, k_t), mass_t : (n_t,)
    source_rows : (n_t,) int array of source vertices, or a callable giving
        ``Pi @ X`` for a source array ``X``.

    Returns
    -------
    (k_t, k_s) float64 array
    """
    pulled = source_rows(phi_s) if callable(source_rows) else phi_s[source_rows]
    return phi_t.T @ (mass_t[:, None] * pulled)


def pointmap_from_fmap(C: FloatArray, phi_s: FloatArray, phi_t: FloatArray, *, extra_s: FloatArray | None = None,
                       extra_t: FloatArray | None = None, rows: IntArray | None = None) -> IntArray:
    """Nearest source vertex for each target vertex in the spectral embedding.

    Target vertex ``i`` is embedded as ``(Phi_t C)[i]``, source vertex ``j``
    as ``Phi_s[j]``; optional extra columns (e.g. landmark heat-kernel rows)
    are appended to both.

    Parameters
    ----------
    C : (k_t, k_s) float array
    phi_s : (n_s, >=k_s), phi_t : (n_t, >=k_t)
    extra_s : (n_s, e) float array, optional
    extra_t : (n_t, e) float array, optional
    rows : (r,) int array, optional
        Only these target vertices.

    Returns
    -------
    (n_t,) or (r,) int64 array of source vertices
    """
    kt, ks = C.shape
    pt = phi_t[:, :kt] if rows is None else phi_t[rows, :kt]
    emb_t = pt @ C
    emb_s = phi_s[:, :ks]
    if extra_s is not None and extra_t is not None:
        et = extra_t if rows is None else extra_t[rows]
        emb_t = np.hstack([emb_t, et])
        emb_s = np.hstack([emb_s, extra_s])
    return nearest_rows(emb_s, emb_t)


def nearest_rows(data: FloatArray, query: FloatArray, *, block: int = 256) -> IntArray:
    """Index of the nearest row of ``data`` for each row of ``query``.

    A ``cKDTree`` up to 24 dimensions; above that a blocked brute force by
    matrix products, which is faster there (docs/platform.md measured kd-trees
    losing to brute force at a few hundred dimensions): the nearest ``x``
    maximises ``q . x - |x|^2 / 2``, and with the norm term as one more
    column the whole score comes out of one product per block, so only
    ``argmax`` passes over it (timing: docs/measurements.md).
    """
    if data.shape[1] <= 24:
        found: IntArray = cKDTree(data).query(query, workers=-1)[1].astype(np.int64)
        return found
    d = data.shape[1]
    aug = np.empty((d + 1, len(data)))
    aug[:d] = data.T
    aug[d] = -0.5 * np.einsum("ij,ij->i", data, data)
    qa = np.empty((min(block, len(query)), d + 1))
    qa[:, d] = 1.0
    score = np.empty((qa.shape[0], len(data)))
    out = np.empty(len(query), np.int64)
    for s in range(0, len(query), block):
        b = min(block, len(query) - s)
        qa[:b, :d] = query[s:s + b]
        np.matmul(qa[:b], aug, out=score[:b])
        out[s:s + b] = np.argmax(score[:b], axis=1)
    return out


def zoomout(C0: FloatArray, bases: tuple[FloatArray, FloatArray, FloatArray], *, k_final: int, step: int = 10,
            extra: tuple[FloatArray | None, FloatArray | None] = (None, None), sample: int = 3000, seed: int = 0,
            full_last: bool = True) -> tuple[FloatArray, IntArray, IntArray | None]:
    """Spectral upsampling of a functional map.

    Each step maps target vertices to source vertices with the current ``C``
    and recomputes a ``C`` one ``step`` larger. Intermediate steps use
    ``sample`` random target vertices (area-weighted least squares on the
    sample), the last step all of them.

    With ``full_last=False`` the last step also stays on the sample (for a
    caller that only needs a sparse set of matches).

    Parameters
    ----------
    C0 : (k, k) float array, the starting map
    bases : source basis (n_s, >=k_final), target basis (n_t, >=k_final), target mass (n_t,)
    extra : extra columns appended to the source and target embeddings (e.g. landmark heat-kernel rows)

    Returns
    -------
    C : (k_final, k_final) float64 array
    vertex_map : (n_t,) int64 array, target vertex -> source vertex
        (or (s,) for the sampled rows when ``full_last`` is False)
    rows : (s,) int64 array or None
        The target vertices of ``vertex_map`` (None: all).
    """
    phi_s, phi_t, mass_t = bases
    extra_s, extra_t = extra
    n_t = phi_t.shape[0]
    rng = np.random.default_rng(seed)
    rows = None if n_t <= sample else np.sort(rng.choice(n_t, sample, replace=False))
    C = np.asarray(C0, float)
    k = C.shape[0]
    k_final = int(min(k_final, phi_s.shape[1], phi_t.shape[1]))
    while True:
        last = k >= k_final
        r = None if (last and full_last) else rows
        j = pointmap_from_fmap(C, phi_s, phi_t, extra_s=extra_s, extra_t=extra_t, rows=r)
        if last:
            if r is None:
                C = phi_t[:, :k].T @ (mass_t[:, None] * phi_s[j, :k])
            return C, j, r
        k = min(k + step, k_final)
        if r is None:
            C = phi_t[:, :k].T @ (mass_t[:, None] * phi_s[j, :k])
        else:
            # least squares on the sample: Phi_t[r] C ~ Phi_s[j]
            w = np.sqrt(mass_t[r])[:, None]
            C = np.linalg.lstsq(w * phi_t[r, :k], w * phi_s[j, :k], rcond=None)[0]
