"""The robust Laplacian: tufted cover, intrinsic mollification, intrinsic Delaunay.

A Laplacian that stays positive semidefinite, with non-negative edge weights,
on meshes with slivers, non-manifold edges and vertices, and boundaries. The
construction is the one of Sharp and Crane, "A Laplacian for Nonmanifold
Triangle Meshes" (Computer Graphics Forum 39(5), SGP 2020):

1. **Intrinsic mollification.** Every edge length grows by the same small
   ``epsilon`` so that every triangle satisfies the triangle inequality with a
   margin ``delta = mollify_factor * mean edge length``:
   ``epsilon = max(0, max over triangles and corners of delta - (l_ij + l_jk - l_ki))``.
2. **Tufted cover.** Each face gets two sheets of opposite orientation. Around
   every edge the incident faces are sorted by their angle about the edge and
   the two sheets facing each gap between consecutive faces are glued. The
   result is a closed, oriented, edge-manifold triangulation of the original
   vertices, also for non-manifold input and for boundaries (a boundary face
   is glued front to back).
3. **Intrinsic Delaunay flips.** Edges whose cotangent weight is negative (the
   two opposite angles sum to more than pi) are flipped, the new length read
   off a planar layout of the two triangles, until every weight is
   non-negative. The edge lengths stay those of the same flat-cone metric.
4. **Operators.** The cotangent stiffness and lumped mass of the intrinsic
   Delaunay triangulation of the cover, halved because the cover covers every
   face twice.

The stiffness of an intrinsic Delaunay triangulation does not depend on which
Delaunay triangulation the flips reach (Bobenko and Springborn, "A discrete
Laplace-Beltrami operator for simplicial surfaces", DCG 38, 2007), so the
order of the flips does not matter. Here flips run in vectorised rounds: each
round flips a set of non-Delaunay edges whose triangles are pairwise disjoint,
then rechecks only the edges of the triangles that changed.

Halfedge layout used throughout: triangle ``t`` owns halfedges ``3t + c``,
``c = 0, 1, 2``; halfedge ``3t + c`` lies opposite corner ``c`` and runs from
corner ``c + 1`` to corner ``c + 2`` (mod 3). So ``lengths[t, c]`` (the length
of the edge opposite corner ``c``, as in :func:`intrinsic_laplacian`) is the
length of halfedge ``3t + c``, and ``twin[h]`` is the halfedge glued to ``h``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp

from ..common.arrays import Array, ArrayLike
from .geometry import check_mass_kind, check_lengths, cotangents_from_lengths, edge_lengths, face_edges, heron_areas, lumped_mass
from .laplacian import intrinsic_laplacian
from ..intake.preparation import group_edges, validate_mesh

__all__ = ["robust_laplacian", "tufted_cover", "mollify_lengths", "intrinsic_delaunay", "IntrinsicTriangulation"]

# Flip an edge while its cotangent weight (cot a + cot b) / 2 is below -_DELAUNAY_TOL.
# Cotangents are scale-free; 1e-8 sits far above the rounding error of the
# weights (about 1e-16 times the largest cotangent, ~1e4 for 0.01-degree
# slivers) so nearly cocircular quads never flip back and forth.
_DELAUNAY_TOL = 1e-8


@dataclass(frozen=True)
class IntrinsicTriangulation:
    """A triangulation given by connectivity and edge lengths alone.

    Attributes
    ----------
    triangles : (T, 3) int64 array
        Vertex indices of each triangle, consistently oriented.
    twin : (3 T,) int64 array
        ``twin[h]`` is the halfedge glued to halfedge ``h`` (see the module
        docstring for the layout); an involution without fixed points.
    lengths : (T, 3) float64 array
        ``lengths[t, c]``: length of the edge opposite corner ``c``.
    flips : int
        Number of edge flips performed to reach this triangulation.
    """

    triangles: Array
    twin: Array
    lengths: Array
    flips: int = 0


def _clean_faces(f: Array) -> Array:
    """Drop faces with a repeated vertex: they have no area and no interior."""
    keep = (f[:, 0] != f[:, 1]) & (f[:, 1] != f[:, 2]) & (f[:, 2] != f[:, 0])
    if not keep.any():
        raise ValueError(f"mesh has no faces with three distinct vertices (all {f.shape[0]} repeat a vertex)")
    return f if keep.all() else f[keep]


def tufted_cover(vertices: ArrayLike, faces: ArrayLike) -> tuple[Array, Array]:
    """Connectivity of the tufted cover of a triangle mesh.

    Parameters
    ----------
    vertices : (n, 3) float array
        Used only to sort the faces around each edge by angle.
    faces : (m, 3) int array
        Any triangle soup over distinct vertices: non-manifold edges and
        vertices, boundaries and inconsistent orientation are all fine.

    Returns
    -------
    triangles : (2 m, 3) int64 array
        Row ``t < m`` is face ``t`` (the front sheet), row ``m + t`` is face
        ``t`` reversed (the back sheet).
    twin : (6 m,) int64 array
        Gluing of halfedges (layout in the module docstring). Every halfedge
        has a twin with the same endpoints in reverse, so the cover is closed,
        oriented and edge-manifold.

    Raises
    ------
    ValueError
        For a malformed mesh (see :func:`validate_mesh`) or a face that
        repeats a vertex.
    """
    v, f = validate_mesh(vertices, faces)
    repeated = (f[:, 0] == f[:, 1]) | (f[:, 1] == f[:, 2]) | (f[:, 2] == f[:, 0])
    if repeated.any():
        i = int(np.flatnonzero(repeated)[0])
        raise ValueError(f"face {i} repeats a vertex: {f[i].tolist()} ({int(repeated.sum())} such faces)")
    return _tufted_cover(v, f)


def _tufted_cover(v: Array, f: Array) -> tuple[Array, Array]:
    n, m = v.shape[0], f.shape[0]
    triangles = np.concatenate([f, f[:, [0, 2, 1]]])
    p, q, w = face_edges(f)
    he = np.arange(3 * m, dtype=np.int64)
    t, c = he // 3, he % 3
    front = he
    # The back sheet (f0, f2, f1) holds the edge opposite front corner c at corner [0, 2, 1][c].
    back = 3 * (t + m) + np.array([0, 2, 1], dtype=np.int64)[c]
    u, vv = np.minimum(p, q), np.maximum(p, q)
    forward = p < q
    # P: the sheet's halfedge running u -> v; N: the one running v -> u.
    P = np.where(forward, front, back)
    N = np.where(forward, back, front)

    # Angle of each face about its edge, measured counter-clockwise about u -> v
    # in a frame built from the edge alone. The sheet holding u -> v has normal
    # (v - u) x (w - u): it faces the direction of increasing angle, so it is
    # glued to the v -> u sheet of the next face counter-clockwise.
    e = v[vv] - v[u]
    e /= np.maximum(np.linalg.norm(e, axis=1, keepdims=True), np.finfo(float).tiny)
    test = np.zeros_like(e)
    near_x = np.abs(e[:, 0]) > 0.9
    test[~near_x, 0] = 1.0
    test[near_x, 1] = 1.0
    b0 = np.cross(test, e)
    b0 /= np.maximum(np.linalg.norm(b0, axis=1, keepdims=True), np.finfo(float).tiny)
    b1 = np.cross(e, b0)
    r = v[w] - v[u]
    theta = np.arctan2(np.einsum("ij,ij->i", r, b1), np.einsum("ij,ij->i", r, b0))

    groups = group_edges(u, vv, n, secondary=theta)
    order, group_start = groups.order, groups.starts
    group_of = groups.group_of()
    end = group_start + groups.counts  # one past the last of each group
    nxt = np.arange(order.size) + 1
    last = nxt == end[group_of]
    nxt[last] = group_start[group_of[last]]
    Ps, Ns = P[order], N[order][nxt]
    twin = np.empty(6 * m, dtype=np.int64)
    twin[Ps] = Ns
    twin[Ns] = Ps
    return triangles, twin


def check_mollify_factor(mollify_factor: float) -> None:
    """Raise ValueError unless the mollification factor is finite and non-negative."""
    if not (np.isfinite(mollify_factor) and mollify_factor >= 0):
        raise ValueError(f"mollify_factor must be finite and non-negative, got {mollify_factor!r}")


def mollify_lengths(lengths: ArrayLike, faces: ArrayLike, *, mollify_factor: float = 1e-5) -> tuple[Array, float]:
    """Add one small length to every edge so all triangles are strictly valid.

    The rule of Sharp and Crane (2020, section 4.5): with
    ``delta = mollify_factor * mean edge length``, every edge grows by
    ``epsilon = max(0, max over triangles and corners of delta - (l_ij + l_jk - l_ki))``,
    the least uniform increase after which every triangle inequality holds
    with margin at least ``delta``.

    Parameters
    ----------
    lengths : (m, 3) float array
        ``lengths[t, c]``: length of the edge of triangle ``t`` opposite corner ``c``.
    faces : (m, 3) int array
        Used to count each edge once in the mean.
    mollify_factor : float, keyword-only
        Non-negative; 0 returns the lengths unchanged.

    Returns
    -------
    lengths : (m, 3) float64 array
    epsilon : float
    """
    lengths, f = check_lengths(lengths, faces)
    check_mollify_factor(mollify_factor)
    if mollify_factor == 0 or lengths.size == 0:
        return lengths.copy(), 0.0
    p, q, _ = face_edges(f)
    groups = group_edges(p, q, int(f.max()) + 1)
    first = groups.order[groups.starts]
    delta = mollify_factor * float(lengths.ravel()[first].mean())
    # slack of corner c's inequality: l_{c+1} + l_{c+2} - l_c
    slack = lengths[:, [1, 2, 0]] + lengths[:, [2, 0, 1]] - lengths
    epsilon = max(0.0, float((delta - slack).max()))
    return lengths + epsilon, epsilon


def _half_cot(lens: Array, h: Array) -> Array:
    """Half the cotangent of the angle opposite each halfedge ``h`` (0 in a zero-area triangle)."""
    tl = lens.reshape(-1, 3)[h // 3]
    return np.asarray(0.5 * cotangents_from_lengths(tl, heron_areas(tl))[np.arange(h.size), h % 3])


def intrinsic_delaunay(triangles: ArrayLike, twin: ArrayLike, lengths: ArrayLike, *, max_flips: int | None = None) -> IntrinsicTriangulation:
    """Flip edges of an intrinsic triangulation until every cotangent weight is non-negative.

    An edge is flipped while its weight ``(cot a + cot b) / 2`` is below
    ``-1e-8`` (``a``, ``b`` the angles opposite it). The new edge joins the two
    opposite vertices, with its length read off a planar layout of the two
    triangles, so the metric is unchanged. Edges whose two sides lie in one
    triangle, or whose new length would not be finite, are left alone.

    Parameters
    ----------
    triangles : (T, 3) int array
    twin : (3 T,) int array
        Halfedge gluing, layout in the module docstring (e.g. from
        :func:`tufted_cover`).
    lengths : (T, 3) float array
        ``lengths[t, c]``: length of the edge opposite corner ``c``; glued
        halfedges must have equal lengths.
    max_flips : int, optional, keyword-only
        Safety bound; default ``100 * 3 T + 1000``.

    Returns
    -------
    IntrinsicTriangulation
        New arrays; the inputs are not modified.

    Raises
    ------
    ValueError
        For arrays of mismatched shapes, a twin array that is not an
        involution without fixed points, or non-finite or negative lengths.
    RuntimeError
        If ``max_flips`` flips do not reach a Delaunay triangulation.
    """
    tri = np.array(triangles, dtype=np.int64)
    tw = np.array(twin, dtype=np.int64)
    lens = np.array(lengths, dtype=np.float64)
    if tri.ndim != 2 or tri.shape[1] != 3 or lens.shape != tri.shape or tw.shape != (tri.size,):
        raise ValueError(f"expected triangles (T, 3), twin (3T,), lengths (T, 3); "
                         f"got {tri.shape}, {tw.shape}, {lens.shape}")
    if tw.size and (tw.min() < 0 or tw.max() >= tw.size):
        raise ValueError(f"twin index out of range for {tw.size} halfedges")
    h = np.arange(tw.size)
    if (tw[tw] != h).any() or (tw == h).any():
        raise ValueError("twin must be an involution without fixed points (every halfedge glued to another)")
    if not np.isfinite(lens).all() or (lens < 0).any():
        raise ValueError("edge lengths must be finite and non-negative")
    if max_flips is None:
        max_flips = 100 * tw.size + 1000
    flips = _flip_to_delaunay(tri, tw, lens.ravel(), max_flips)
    return IntrinsicTriangulation(tri, tw, lens, flips)


def _flip_to_delaunay(tri: Array, tw: Array, lens: Array, max_flips: int) -> int:
    """Flip in place (``lens`` is a flat view, one entry per halfedge); returns the number of flips."""
    n_he = tw.size
    owner = np.full(n_he // 3, _NONE, dtype=np.int64)
    remap = np.arange(n_he, dtype=np.int64)
    cand = np.flatnonzero(np.arange(n_he) < tw)  # one halfedge per edge
    flips = 0
    while cand.size:
        g = tw[cand]
        weight = _half_cot(lens, cand) + _half_cot(lens, g)
        bad = (weight < -_DELAUNAY_TOL) & (cand // 3 != g // 3)
        if not bad.any():
            break
        cand, weight = cand[bad], weight[bad]
        sel = _independent(cand, tw[cand], weight, owner)
        rest = cand[~sel]
        hh = cand[sel]
        d = _flipped_lengths(tw, lens, hh)
        ok = np.isfinite(d)
        unflippable = hh[~ok]
        if not ok.any():
            # only unflippable edges were chosen: retire them and carry on
            cand = np.setdiff1d(rest, unflippable)  # sorted, unique, canonical
            continue
        touched = _flip(tri, tw, lens, hh[ok], d[ok], remap)
        flips += int(ok.sum())
        if flips > max_flips:
            raise RuntimeError(f"intrinsic Delaunay flips did not converge within {max_flips} flips")
        cand = np.concatenate([rest, touched])
        if unflippable.size:
            cand = np.setdiff1d(cand, unflippable)
        cand = _unique_sorted(np.minimum(cand, tw[cand]))  # one halfedge per edge
    return flips


_NONE = np.iinfo(np.int64).max


def _independent(cand: Array, g: Array, weight: Array, owner: Array) -> Array:
    """Mask of edges to flip in one round: each triangle goes to its most negative edge.

    ``owner`` is scratch space, one entry per triangle, all ``_NONE`` on entry and on return.
    """
    A, B = cand // 3, g // 3
    rank = np.empty(cand.size, dtype=np.int64)
    rank[np.argsort(weight, kind="stable")] = np.arange(cand.size)
    np.minimum.at(owner, A, rank)
    np.minimum.at(owner, B, rank)
    sel = (owner[A] == rank) & (owner[B] == rank)
    owner[A] = _NONE
    owner[B] = _NONE
    return np.asarray(sel)


def _flipped_lengths(tw: Array, lens: Array, hh: Array) -> Array:
    """Length of the edge each halfedge ``hh`` would become after a flip (not finite where it cannot).

    Planar layout of the two triangles: i at the origin, j at (l_ij, 0), the
    opposite vertex k above and l below; the new edge joins k and l.
    """
    gg = tw[hh]
    A, B, a, b = hh // 3, gg // 3, hh % 3, gg % 3
    l_ij = lens[hh]
    l_jk, l_ki = lens[3 * A + (a + 1) % 3], lens[3 * A + (a + 2) % 3]
    l_il, l_lj = lens[3 * B + (b + 1) % 3], lens[3 * B + (b + 2) % 3]
    area_a = heron_areas(np.column_stack([l_ij, l_jk, l_ki]))
    area_b = heron_areas(np.column_stack([l_ij, l_il, l_lj]))
    with np.errstate(divide="ignore", invalid="ignore"):
        dx = (l_ki * l_ki - l_jk * l_jk - l_il * l_il + l_lj * l_lj) / (2.0 * l_ij)
        dy = 2.0 * (area_a + area_b) / l_ij
    return np.asarray(np.hypot(dx, dy))


def _flip(tri: Array, tw: Array, lens: Array, hh: Array, d: Array,
          remap: Array) -> Array:
    """Flip the edges of halfedges ``hh`` (pairwise disjoint triangles) to new length ``d``, in place.

    ``remap`` is scratch space, the identity over halfedges on entry and on
    return. Returns the halfedges of the changed triangles.
    """
    gg = tw[hh]
    A, B, a, b = hh // 3, gg // 3, hh % 3, gg % 3
    k, i, j, l = tri[A, a], tri[A, (a + 1) % 3], tri[A, (a + 2) % 3], tri[B, b]
    h_jk, h_ki = 3 * A + (a + 1) % 3, 3 * A + (a + 2) % 3
    h_il, h_lj = 3 * B + (b + 1) % 3, 3 * B + (b + 2) % 3
    # New triangles A = (l, k, i), B = (k, l, j): halfedges
    # 3A+0 = k->i, 3A+1 = i->l, 3A+2 = l->k; 3B+0 = l->j, 3B+1 = j->k, 3B+2 = k->l.
    old_out = np.concatenate([h_ki, h_il, h_lj, h_jk])
    new_out = np.concatenate([3 * A, 3 * A + 1, 3 * B, 3 * B + 1])
    out_len = lens[old_out]
    # Outer twins that are themselves moved (two flipped triangles adjacent) follow the move.
    remap[old_out] = new_out
    out_twin = remap[tw[old_out]]
    remap[old_out] = old_out
    tri[A] = np.column_stack([l, k, i])
    tri[B] = np.column_stack([k, l, j])
    lens[new_out] = out_len
    lens[3 * A + 2] = d
    lens[3 * B + 2] = d
    tw[new_out] = out_twin
    tw[out_twin] = new_out
    tw[3 * A + 2] = 3 * B + 2
    tw[3 * B + 2] = 3 * A + 2
    return np.concatenate([3 * A, 3 * A + 1, 3 * A + 2, 3 * B, 3 * B + 1, 3 * B + 2])


def _unique_sorted(x: Array) -> Array:
    x = np.sort(x)
    keep = np.ones(x.size, dtype=bool)
    keep[1:] = x[1:] != x[:-1]
    return np.asarray(x[keep])


def robust_laplacian(vertices: ArrayLike, faces: ArrayLike, *, mollify_factor: float = 1e-5,
                     mass: str = "barycentric") -> tuple[sp.csr_matrix, Array]:
    """Positive semidefinite Laplacian for any triangle mesh (Sharp and Crane 2020).

    Parameters
    ----------
    vertices : (n, 3) float array
    faces : (m, 3) int array
        A triangle soup: non-manifold edges and vertices, boundaries, slivers
        and degenerate triangles are all accepted. Faces that repeat a vertex
        carry no area and are dropped.
    mollify_factor : float, keyword-only
        Mollification margin relative to the mean edge length (the reference
        implementation's default, 1e-5); 0 turns mollification off.
    mass : {"barycentric", "voronoi"}, keyword-only
        Lumped mass on the intrinsic Delaunay triangles: a third of each
        triangle's area per corner, or the mixed Voronoi areas of Meyer,
        Desbrun, Schroeder and Barr (2003) computed from edge lengths.

    Returns
    -------
    stiffness : (n, n) scipy.sparse.csr_matrix, float64
        Symmetric, rows summing to zero, off-diagonal entries ``<= 1e-8``
        in the engine's positive semidefinite sign convention (every
        cotangent weight of the intrinsic Delaunay cover is non-negative).
    mass : (n,) float64 array
        Sums to the surface area (plus the small mollification increase).
        Vertices in no face get 0.
    """
    L, m, _, _ = robust_operators(vertices, faces, mollify_factor=mollify_factor, mass=mass)
    return L, m


def robust_operators(vertices: ArrayLike, faces: ArrayLike, *, mollify_factor: float,
                     mass: str) -> tuple[sp.csr_matrix, Array, IntrinsicTriangulation, float]:
    """:func:`robust_laplacian`, with the intrinsic triangulation reached and the mollification ``epsilon``."""
    v, f = validate_mesh(vertices, faces)
    check_mass_kind(mass)
    check_mollify_factor(mollify_factor)
    f = _clean_faces(f)
    lengths, epsilon = mollify_lengths(edge_lengths(v, f), f, mollify_factor=mollify_factor)
    triangles, twin = _tufted_cover(v, f)
    lens = np.concatenate([lengths, lengths[:, [0, 2, 1]]])  # back sheet (f0, f2, f1)
    flips = _flip_to_delaunay(triangles, twin, lens.ravel(), 100 * twin.size + 1000)
    n = v.shape[0]
    L, m = intrinsic_laplacian(lens, triangles, n)
    if mass == "voronoi":
        m = lumped_mass(lens, triangles, n, "voronoi")
    info = IntrinsicTriangulation(triangles, twin, lens, flips)
    return (0.5 * L).tocsr(), 0.5 * m, info, epsilon

