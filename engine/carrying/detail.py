"""Surface detail: split a shape into a smooth base and local displacements.

A surface ``x`` is split into a base ``b`` (its coordinates low-passed by the
spectral filter ``1 / (1 + (t lambda)^3)`` of its own Laplacian, a third-order
Butterworth response made of sparse solves, with ``t`` set from the
wavelength that separates detail from shape) and a displacement ``x - b``.
A smooth filter, unlike truncating the eigenbasis, rings little; the third
order keeps the overall shape out of the displacement (the residual on a
smooth surface falls as ``(t lambda)^3`` instead of ``t lambda``, the
mean-curvature term ``2 t H n`` of one implicit heat-flow step), so that
what two meshings of one shape leave in their displacements is small and
much the same. The displacement is expressed in an orthonormal frame
of the base surface at every vertex (two tangents and the normal), so it moves
with the surface when the shape bends. To carry detail to another mesh, the
per-vertex local offsets are pulled through a correspondence and added to the
other mesh's own base in its own frames.

Frames must correspond on the two meshes. The first tangent follows the
gradient of a *guide* field: a smooth scalar function on the source, pulled to
the target through the same correspondence, so both meshes get matching
tangent directions.
"""

from __future__ import annotations

from dataclasses import dataclass

from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from ..intake.preparation import validate_mesh

__all__ = ["DetailLayer", "vertex_normals", "vertex_gradients", "tangent_frames",
           "smooth_base", "split_detail", "apply_detail", "place_on_original", "check_strength",
           "MAX_STRENGTH"]

MAX_STRENGTH = 100.0  # |strength| accepted: a hundred times the source's detail is already a caricature


@dataclass(frozen=True)
class DetailLayer:
    """A shape split into base and detail.

    Attributes
    ----------
    base : (n, 3) float64
        The smooth base surface's vertex positions.
    frames : (n, 3, 3) float64
        Rows ``[t1, t2, n]`` at every vertex of the base.
    offsets : (n, 3) float64
        ``x - base`` in the local frame: components along t1, t2 and n.
    """

    base: NDArray[Any]
    frames: NDArray[Any]
    offsets: NDArray[Any]


def vertex_normals(vertices: ArrayLike, faces: ArrayLike) -> NDArray[Any]:
    """Area-weighted unit vertex normals, (n, 3). Isolated vertices get +z."""
    v, f = validate_mesh(vertices, faces)
    return vertex_normals_unchecked(v, f)


def vertex_normals_unchecked(v: NDArray[Any], f: NDArray[Any]) -> NDArray[Any]:
    """:func:`vertex_normals` of an already validated mesh (the alignment
    loop of engine.matching.correspondence calls it on every step)."""
    fn = np.cross(v[f[:, 1]] - v[f[:, 0]], v[f[:, 2]] - v[f[:, 0]])  # length = 2 * area
    n = np.zeros_like(v)
    for c in range(3):
        for d in range(3):
            n[:, d] += np.bincount(f[:, c], weights=fn[:, d], minlength=len(v))
    return _unit(n, fallback=np.array([0.0, 0.0, 1.0]))


def vertex_gradients(vertices: ArrayLike, faces: ArrayLike, field: ArrayLike) -> NDArray[Any]:
    """Gradient of per-vertex scalar fields, averaged to vertices by area.

    Parameters
    ----------
    vertices : (n, 3) float array
    faces : (m, 3) int array
    field : (n,) or (n, c) float array
        One field, or ``c`` fields side by side.

    Returns
    -------
    (n, 3) float64, or (n, c, 3) for ``c`` fields
        The piecewise-linear gradient of each triangle, area-weighted at
        each vertex.
    """
    v, f = validate_mesh(vertices, faces)
    g = np.asarray(field, dtype=np.float64)
    if g.shape[:1] != (v.shape[0],) or g.ndim not in (1, 2):
        raise ValueError(f"field must have shape ({v.shape[0]},) or ({v.shape[0]}, c), got {g.shape}")
    cols = g.reshape(len(v), -1)
    e = [v[f[:, 2]] - v[f[:, 1]], v[f[:, 0]] - v[f[:, 2]], v[f[:, 1]] - v[f[:, 0]]]
    normal = np.cross(e[2], -e[1])
    dbl_area = np.linalg.norm(normal, axis=1)
    unit_n = normal / np.where(dbl_area > 0, dbl_area, 1.0)[:, None]
    # grad * 2A = sum_c g_c (n x e_c), e_c the edge opposite corner c; weighted by 2A at each corner
    weighted = sum(cols[f[:, c]][:, :, None] * np.cross(unit_n, e[c])[:, None, :] for c in range(3))
    out = np.empty((len(v), cols.shape[1], 3))
    w = sum(np.bincount(f[:, c], weights=dbl_area, minlength=len(v)) for c in range(3))
    flat = weighted.reshape(len(f), -1)
    for j in range(flat.shape[1]):
        acc = sum(np.bincount(f[:, c], weights=flat[:, j], minlength=len(v)) for c in range(3))
        out.reshape(len(v), -1)[:, j] = acc / np.where(w > 0, w, 1.0)
    gradients: NDArray[Any] = out[:, 0, :] if g.ndim == 1 else out
    return gradients


def tangent_frames(vertices: ArrayLike, faces: ArrayLike, guides: ArrayLike) -> NDArray[Any]:
    """Orthonormal frames ``[t1, t2, n]`` per vertex, (n, 3, 3).

    Parameters
    ----------
    vertices : (n, 3) float array
    faces : (m, 3) int array
    guides : (n, g) float array
        Scalar guide fields in order of preference. ``t1`` follows the
        tangential gradient of the first guide wherever that gradient is at
        least 5% of its median size, otherwise of the next guide, and finally
        the tangential part of the x axis (or y where x is normal).
    """
    v, f = validate_mesh(vertices, faces)
    guides = np.asarray(guides, dtype=np.float64)
    if guides.ndim == 1:
        guides = guides[:, None]
    if guides.shape[0] != v.shape[0]:
        raise ValueError(f"guides must have {v.shape[0]} rows, got {guides.shape[0]}")
    n = vertex_normals(v, f)
    t1 = np.zeros_like(v)
    done = np.zeros(v.shape[0], dtype=bool)
    all_grads = vertex_gradients(v, f, guides)
    for j in range(guides.shape[1]):
        grad = all_grads[:, j, :]
        grad -= np.einsum("ij,ij->i", grad, n)[:, None] * n
        size = np.linalg.norm(grad, axis=1)
        ok = ~done & (size > 0.05 * max(np.median(size), 1e-300))
        t1[ok] = grad[ok] / size[ok, None]
        done |= ok
    if not done.all():
        axis = np.where(np.abs(n[:, :1]) < 0.9, np.array([[1.0, 0.0, 0.0]]), np.array([[0.0, 1.0, 0.0]]))
        proj = axis - np.einsum("ij,ij->i", axis, n)[:, None] * n
        t1[~done] = _unit(proj[~done], fallback=np.array([1.0, 0.0, 0.0]))
    t2 = np.cross(n, t1)
    return np.stack([t1, t2, n], axis=1)


def smooth_base(vertices: ArrayLike, stiffness: Any, mass: ArrayLike, *, wavelength: float) -> NDArray[Any]:
    """Coordinates low-passed by ``1 / (1 + (t lambda)^3)``, (n, 3).

    The response splits into partial fractions over the roots ``p`` of
    ``1 + s^3`` (``-1`` and ``exp(+-i pi / 3)``): ``sum_p (-p / 3) (t L - p M)^-1 M x``,
    one real and one complex sparse factorisation (the conjugate root's term
    is the complex conjugate of the other's).

    Parameters
    ----------
    vertices : (n, 3) float array
        Or any (n, c) per-vertex fields; each column is filtered.
    stiffness : (n, n) sparse matrix, the PSD cotangent Laplacian
    mass : (n,) float array
    wavelength : float
        Features shorter than this are detail. ``t = 3^(1/3) (wavelength / 2 pi)^2``:
        a wave of this length (``lambda = (2 pi / wavelength)^2``) keeps a
        quarter of its amplitude in the base, a wave half as long 1/193 of
        it, a wave twice as long 96%.
    """
    import scipy.sparse as sp
    import scipy.sparse.linalg as spla

    v = np.asarray(vertices, dtype=np.float64)
    m = np.asarray(mass, dtype=np.float64)
    if not (np.isfinite(wavelength) and wavelength > 0):
        raise ValueError(f"wavelength must be positive, got {wavelength}")
    if v.ndim != 2 or stiffness.shape != (v.shape[0], v.shape[0]) or m.shape != (v.shape[0],):
        raise ValueError(f"stiffness {stiffness.shape} and mass {m.shape} do not fit {v.shape[0]} vertices")
    t = 3.0 ** (1.0 / 3.0) * (wavelength / (2 * np.pi)) ** 2     # (t lambda)^3 = 3 at the wavelength
    rhs = m[:, None] * v
    lower = sp.csc_matrix(sp.diags(m) + t * stiffness)           # root -1, coefficient 1/3
    base: NDArray[Any] = spla.splu(lower).solve(rhs) / 3.0
    p = np.exp(1j * np.pi / 3.0)                                    # and its conjugate
    upper = sp.csc_matrix(t * stiffness - p * sp.diags(m), dtype=np.complex128)
    base += 2.0 * np.real((-p / 3.0) * spla.splu(upper).solve(rhs.astype(np.complex128)))
    return base


def split_detail(vertices: ArrayLike, faces: ArrayLike, base: ArrayLike, *, guides: ArrayLike) -> DetailLayer:
    """Split a surface into a given smooth base and local-frame offsets.

    Parameters
    ----------
    vertices : (n, 3) float array
    faces : (m, 3) int array
    base : (n, 3) float array
        The smooth base (:func:`smooth_base`).
    guides : (n, g) float array
        Guide fields for the tangent frames (:func:`tangent_frames`).
    """
    v, f = validate_mesh(vertices, faces)
    base = np.asarray(base, dtype=np.float64)
    if base.shape != v.shape:
        raise ValueError(f"base must have shape {v.shape}, got {base.shape}")
    frames = tangent_frames(base, f, guides)
    offsets = np.einsum("nij,nj->ni", frames, v - base)
    return DetailLayer(base, frames, offsets)


def apply_detail(layer: DetailLayer, offsets: ArrayLike, *, strength: float = 1.0) -> NDArray[Any]:
    """New positions: ``layer.base`` plus ``strength * offsets`` in ``layer.frames``.

    Parameters
    ----------
    layer : DetailLayer
        The target's own split (its base and frames).
    offsets : (n, 3) float array
        Local offsets to add (typically the source's, pulled to the target).
    strength : float
        Scale of the added detail; 0 gives the target's smooth base.
    """
    o = np.asarray(offsets, dtype=np.float64)
    if o.shape != layer.base.shape:
        raise ValueError(f"offsets must have shape {layer.base.shape}, got {o.shape}")
    if not np.isfinite(o).all():
        raise ValueError("offsets contain non-finite values")
    moved: NDArray[Any] = layer.base + check_strength(strength) * np.einsum("nji,nj->ni", layer.frames, o)
    if not np.isfinite(moved).all():
        raise ValueError("detail gives non-finite positions")
    return moved


def check_strength(strength: float) -> float:
    """``strength`` as a float when finite and at most :data:`MAX_STRENGTH` in size; else ValueError."""
    try:
        value = float(strength)
    except (TypeError, ValueError, OverflowError):
        raise ValueError(f"detail strength must be a number, got {strength!r}") from None
    if not (np.isfinite(value) and abs(value) <= MAX_STRENGTH):
        raise ValueError(f"detail strength must be between {-MAX_STRENGTH:g} and {MAX_STRENGTH:g}, got {strength}")
    return value


def place_on_original(original: NDArray[Any], to_clean: NDArray[Any], positions: NDArray[Any]) -> NDArray[Any]:
    """New positions for every original vertex; vertices outside the surface stay where they were.

    Parameters
    ----------
    original : (n, 3) float array
        The original vertex positions.
    to_clean : (n,) int array
        Each original vertex's index in ``positions``, or -1 for a vertex
        that belongs to no kept face (isolated, left by a hole, only in
        zero-area faces): such vertices keep their original position.
    positions : (n_clean, 3) float array
        New positions of the surface's vertices.

    Returns
    -------
    (n, 3) float64
    """
    v = np.asarray(original, dtype=np.float64)
    idx = np.asarray(to_clean, dtype=np.int64)
    p = np.asarray(positions, dtype=np.float64)
    if v.ndim != 2 or v.shape[1] != 3 or idx.shape != (v.shape[0],):
        raise ValueError(f"original {v.shape} and to_clean {idx.shape} do not fit")
    if p.ndim != 2 or p.shape[1] != 3 or (idx.size and idx.max() >= p.shape[0]):
        raise ValueError(f"positions {p.shape} do not fit the map to {int(idx.max(initial=-1)) + 1} vertices")
    out = v.copy()
    on = idx >= 0
    out[on] = p[idx[on]]
    return out


def _unit(x: NDArray[Any], *, fallback: NDArray[Any]) -> NDArray[Any]:
    size = np.linalg.norm(x, axis=1, keepdims=True)
    out: NDArray[Any] = x / np.where(size > 0, size, 1.0)
    out[size[:, 0] == 0] = fallback
    return out
