"""Robust Laplacian (tufted cover, mollification, intrinsic Delaunay) and mesh_operators().

Sources: Sharp and Crane, "A Laplacian for Nonmanifold Triangle Meshes", SGP
2020 (the construction); the reference library robust-laplacian
(``robust_laplacian.mesh_laplacian``, positive semidefinite L and diagonal
sparse M, the same construction in C++); Bobenko and Springborn, DCG 2007
(intrinsic Delaunay weights are non-negative and do not depend on the flip
order); reference meshes from tests/refdata.py (CGAL hand, glmark2 bunny,
pymeshfix raw-scan bunny).
"""

from __future__ import annotations

import functools
import re

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as sla

from engine.spectra.laplacian import cotangent_laplacian, mass_matrix
from engine.intake.files import read_mesh
from engine.spectra.discretization import Operators, mesh_defects, mesh_operators
from engine.spectra.robust import intrinsic_delaunay, mollify_lengths, robust_laplacian, tufted_cover
from tests import meshes, refdata


# ---------------------------------------------------------------- meshes

@functools.lru_cache(maxsize=None)
def _ref_mesh(name: str):
    data = read_mesh(refdata.path(name))
    return data.vertices, data.triangles()


def _sliver_book(pages: int = 4, seed: int = 0):
    """Single-triangle pages round one spine edge, apexes close to the spine.

    Each apex sits 0.05-0.3 from the spine (length 1), so the angle at the
    apex is obtuse and the spine's weight negative in every pair of pages:
    flips across the non-manifold edge are needed.
    """
    rng = np.random.default_rng(seed)
    v = [[0.0, 0.0, 0.0], [0.0, 0.0, 1.0]]
    f = []
    for a in np.sort(rng.uniform(0, 2 * np.pi, pages)):
        r, z = rng.uniform(0.05, 0.3), rng.uniform(0.2, 0.8)
        v.append([r * np.cos(a), r * np.sin(a), z])
        f.append([0, 1, len(v) - 1] if rng.random() < 0.5 else [1, 0, len(v) - 1])
    return np.array(v), np.array(f)


def _book3():
    """Three two-triangle pages round the spine 0-1: a 'book' with one non-manifold edge."""
    v = [[0, 0, 0], [0, 0, 1]]
    f = []
    for a, r in [(0.0, 0.5), (2.0, 1.0), (4.0, 1.5)]:
        b = len(v)
        v += [[r * np.cos(a), r * np.sin(a), 0.0], [r * np.cos(a), r * np.sin(a), 1.0]]
        f += [[0, 1, b], [1, b + 1, b]]
    return np.array(v, float), np.array(f)


def _two_tets():
    """Two tetrahedra sharing one vertex (0): a non-manifold vertex."""
    t = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1]], float)
    tf = np.array([[0, 2, 1], [0, 1, 3], [0, 3, 2], [1, 2, 3]])
    return np.vstack([t, -t[1:]]), np.vstack([tf, np.where(tf > 0, tf + 3, 0)])


def _fan3():
    """Three triangles sharing the edge 0-1 and nothing else."""
    v = np.array([[0, 0, 0], [1, 0, 0], [0.5, 1, 0], [0.5, -0.5, 0.8], [0.4, -0.6, -0.7]], float)
    return v, np.array([[0, 1, 2], [1, 0, 3], [0, 1, 4]])


HANDMADE = {"book3": _book3, "two_tets": _two_tets, "fan3": _fan3, "sliver_book": _sliver_book,
            "sliver_book7": lambda: _sliver_book(7, seed=3)}


def _offdiag(L):
    c = sp.coo_matrix(L)
    return c.data[c.row != c.col]


def _rel_fro(A, B):
    return sp.linalg.norm(A - B) / sp.linalg.norm(B)


# ---------------------------------------------------------------- hand-worked

def test_single_obtuse_triangle_by_hand():
    # Triangle i=(0,0), j=(2,0), k=(1,0.3): obtuse at k. Its tufted cover is a
    # two-sided pillow; the edge ij has weight 2 cot(k) / 2 < 0 there and is
    # flipped into a loop at k of length twice the height. The pillow then
    # holds two isosceles triangles (k, k, i) and (k, k, j) whose base angles
    # are 90 deg - alpha_i and 90 deg - alpha_j, so (halving for the double
    # cover) L_ki = -tan(alpha_i) / 2, L_kj = -tan(alpha_j) / 2, L_ij = 0;
    # worked by hand from Sharp and Crane 2020, sections 4.2-4.3.
    v = np.array([[0, 0, 0], [2, 0, 0], [1, 0.3, 0]], float)
    f = np.array([[0, 1, 2]])
    L, m = robust_laplacian(v, f, mollify_factor=0)
    alpha = np.arctan2(0.3, 1.0)  # angle at i and at j
    L = L.toarray()
    assert L[0, 1] == 0.0
    np.testing.assert_allclose([L[0, 2], L[1, 2]], [-np.tan(alpha) / 2] * 2, rtol=1e-12)
    np.testing.assert_allclose(L.sum(axis=1), 0, atol=1e-14)
    assert m.sum() == pytest.approx(0.3, rel=1e-12)  # area is preserved by flips
    # The plain matrix has the positive off-diagonal entry -cot(k)/2 > 0 on ij.
    assert cotangent_laplacian(v, f)[0, 1] > 0


def test_flipped_quad_equals_planar_delaunay():
    # A flat quad i=(0,0), j=(2,0), k=(1,0.2), l=(1,-0.2) split along ij is not
    # Delaunay (opposite angles near 180 deg). Intrinsic flips on a flat mesh
    # reach the planar Delaunay triangulation, split along kl (length 0.4);
    # the boundary edges stay (their opposite angles are acute).
    v = np.array([[0, 0, 0], [2, 0, 0], [1, 0.2, 0], [1, -0.2, 0]], float)
    f = np.array([[2, 0, 1], [3, 1, 0]])
    L, m = robust_laplacian(v, f, mollify_factor=0)
    g = np.array([[2, 0, 3], [3, 1, 2]])
    np.testing.assert_allclose(L.toarray(), cotangent_laplacian(v, g).toarray(), atol=1e-12)
    np.testing.assert_allclose(m, mass_matrix(v, g), atol=1e-15)
    tri, twin = tufted_cover(v, f)
    lengths = np.linalg.norm(v[tri[:, [2, 0, 1]]] - v[tri[:, [1, 2, 0]]], axis=2)
    out = intrinsic_delaunay(tri, twin, lengths)
    assert out.flips == 2  # the diagonal, once in each sheet
    assert np.isclose(out.lengths, 0.4, rtol=1e-12).sum() == 4  # two new halfedges per sheet


def test_mollification_rule():
    # Degenerate triangle with lengths (1, 1, 2): slack 1 + 1 - 2 = 0, so
    # epsilon = delta = factor * mean edge length (Sharp and Crane 2020,
    # section 4.5) and every triangle inequality then holds with margin delta.
    lengths = np.array([[1.0, 1.0, 2.0], [2.0, 1.5, 1.5]])
    faces = np.array([[0, 1, 2], [3, 2, 1]])  # share the edge 1-2 (length 2)
    mean = (1 + 1 + 2 + 1.5 + 1.5) / 5  # each edge counted once
    out, eps = mollify_lengths(lengths, faces, mollify_factor=1e-3)
    assert eps == pytest.approx(1e-3 * mean, rel=1e-12)
    np.testing.assert_allclose(out, lengths + eps)
    slack = out[:, [1, 2, 0]] + out[:, [2, 0, 1]] - out
    assert slack.min() == pytest.approx(1e-3 * mean, rel=1e-9)
    # Valid triangles with margin above delta are left alone.
    good, eps = mollify_lengths(np.array([[1.0, 1.0, 1.0]]), np.array([[0, 1, 2]]), mollify_factor=1e-3)
    assert eps == 0.0 and (good == 1.0).all()


# ---------------------------------------------------------------- the cover

@pytest.mark.parametrize("name", sorted(HANDMADE))
def test_tufted_cover_is_closed_oriented_manifold(name):
    v, f = HANDMADE[name]()
    tri, twin = tufted_cover(v, f)
    m = len(f)
    assert tri.shape == (2 * m, 3) and twin.shape == (6 * m,)
    h = np.arange(6 * m)
    assert (twin[twin] == h).all() and (twin != h).all()  # every halfedge glued to exactly one other
    tail, head = tri[:, [1, 2, 0]].ravel(), tri[:, [2, 0, 1]].ravel()
    np.testing.assert_array_equal(tail[twin], head)  # glued halfedges run opposite ways: oriented
    np.testing.assert_array_equal(head[twin], tail)


def test_tufted_cover_of_a_closed_mesh_is_two_copies():
    # On a closed, consistently oriented manifold each sheet glues only to
    # itself (Sharp and Crane 2020, section 4.2): the cover is two copies.
    v, f = meshes.icosphere(2)
    tri, twin = tufted_cover(v, f)
    front = np.arange(twin.size) < 3 * len(f)
    np.testing.assert_array_equal(front[twin], front)


def test_boundary_face_glued_front_to_back():
    v = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0]], float)
    tri, twin = tufted_cover(v, np.array([[0, 1, 2]]))
    assert (twin[:3] >= 3).all() and (twin[3:] < 3).all()


# ---------------------------------------------------------------- clean meshes

def test_equals_plain_on_delaunay_icosphere():
    # Icosphere triangles are near-equilateral and Delaunay: no flips, and the
    # margin of every triangle exceeds delta so epsilon = 0: robust == plain
    # up to rounding (the paper's "no change on good meshes").
    v, f = meshes.icosphere(3)
    L, m = robust_laplacian(v, f)
    assert _rel_fro(L, cotangent_laplacian(v, f)) < 1e-13
    np.testing.assert_allclose(m, mass_matrix(v, f), rtol=1e-13)
    _, mv = robust_laplacian(v, f, mass="voronoi")
    np.testing.assert_allclose(mv, mass_matrix(v, f, kind="voronoi"), rtol=1e-12)
    # With a large mollification factor epsilon > 0: the operators change, as the
    # reference library's do with the same factor.
    L2, m2 = robust_laplacian(v, f, mollify_factor=0.8)
    assert _rel_fro(L2, cotangent_laplacian(v, f)) > 1e-6
    Lr, mr = _reference(v, f, mollify_factor=0.8)
    assert _rel_fro(L2, Lr) < L_TOL
    np.testing.assert_allclose(m2, mr, rtol=L_TOL)


# ---------------------------------------------------------------- slivers: PSD, weights

@pytest.mark.parametrize("case", ["grid_jitter", pytest.param("hand", marks=pytest.mark.refdata), "sliver_book"])
def test_psd_and_non_negative_weights_where_plain_has_negative(case):
    if case == "grid_jitter":
        v, f = meshes.grid(30, 15, jitter=0.45)
    elif case == "hand":
        v, f = _ref_mesh("hand")
    else:
        v, f = _sliver_book()
    plain = cotangent_laplacian(v, f)
    assert _offdiag(plain).max() > 1e-3  # the plain matrix has negative cotangent weights here
    L, m = robust_laplacian(v, f)
    assert abs(L - L.T).max() < 1e-12
    np.testing.assert_allclose(np.asarray(L.sum(axis=1)).ravel(), 0, atol=1e-9 * abs(L).max())
    # intrinsic Delaunay weights are non-negative (Bobenko and Springborn 2007),
    # up to the flip tolerance 1e-8 on (cot a + cot b) / 2
    assert _offdiag(L).max() <= 1e-8
    lo = np.linalg.eigvalsh(L.toarray()).min()
    assert lo >= -1e-10 * abs(L).max()
    assert np.isfinite(m).all() and (m[np.unique(f)] > 0).all()


# ---------------------------------------------------------------- against robust-laplacian

# Tolerance for L: the same construction in both; the reference flips while
# (cot a + cot b) / 2 < -1e-6, we while < -1e-8. An edge in between is nearly
# cocircular, where both triangulations give the same weights to first order,
# so the matrices may differ by about 1e-6 relative; measured: 2e-16 to 4e-15.
L_TOL = 1e-6


def _reference(v, f, mollify_factor=1e-5):
    import robust_laplacian as rl  # reference library, test environment only
    L, M = rl.mesh_laplacian(np.asarray(v, float), np.asarray(f), mollify_factor=mollify_factor)
    return sp.csr_matrix(L), M.diagonal()


@pytest.mark.parametrize("name", sorted(HANDMADE))
def test_agrees_with_reference_on_nonmanifold_handmade(name):
    v, f = HANDMADE[name]()
    L, m = robust_laplacian(v, f, mollify_factor=1e-5)
    Lr, mr = _reference(v, f)
    assert _rel_fro(L, Lr) < L_TOL
    np.testing.assert_allclose(m, mr, rtol=L_TOL)
    lo = np.linalg.eigvalsh(L.toarray()).min()
    assert lo >= -1e-12 * abs(L).max()


def _low_eigenpairs(L, m, k):
    # Shift-invert just below 0 with a seeded start vector; two extra pairs,
    # of which the first k are kept (docs/platform.md: ARPACK can drop a member of
    # a cluster).
    x0 = np.random.default_rng(0).standard_normal(L.shape[0])
    sigma = -1e-6 * L.diagonal().mean() / m.mean()
    w, phi = sla.eigsh(L.tocsc(), k=k + 2, M=sp.diags(m).tocsc(), sigma=sigma, which="LM", v0=x0)
    order = np.argsort(w)[:k]
    return w[order], phi[:, order]


@pytest.mark.refdata
@pytest.mark.parametrize("name", ["hand", "bunny_glmark2", "bunny_raw_scan"])
def test_agrees_with_reference_on_reference_meshes(name):
    v, f = _ref_mesh(name)
    L, m = robust_laplacian(v, f, mollify_factor=1e-5)
    Lr, mr = _reference(v, f)
    # docs/platform.md: on sliver meshes the reference L differs from the plain
    # cotangent matrix by 16-98% (Frobenius); ours matches the reference.
    assert _rel_fro(cotangent_laplacian(v, f), Lr) > 0.1
    assert _rel_fro(L, Lr) < L_TOL
    np.testing.assert_allclose(m, mr, rtol=L_TOL, atol=L_TOL * mr.max())
    assert _offdiag(L).max() <= 1e-8
    if name == "hand":
        # 20 low eigenvalues of both pencils. The task asked for 0.5%; the
        # matrices agree to L_TOL, so the eigenvalues do too (measured:
        # about 1e-12 relative).
        ours, ref = _low_eigenpairs(L, m, 20)[0], _low_eigenpairs(Lr, mr, 20)[0]
        np.testing.assert_allclose(ours, ref, rtol=0, atol=1e-6 * ref.max())
    if name == "bunny_raw_scan":
        # The non-manifold scan: our basis is finite and PSD, and each of our
        # M-orthonormal eigenpairs is an eigenpair of the reference pencil:
        # for (L_r, M_r) some eigenvalue lies within ||M_r^-1/2 (L_r phi -
        # lam M_r phi)|| of lam (residual bound for symmetric definite
        # pencils; Parlett, The Symmetric Eigenvalue Problem, 1998, ch. 15
        # (from memory)). One eigensolve instead of two keeps the test fast.
        lam, phi = _low_eigenpairs(L, m, 6)
        assert np.isfinite(phi).all() and np.isfinite(lam).all()
        assert lam.min() >= -1e-10 * lam.max()
        np.testing.assert_allclose(phi.T @ (m[:, None] * phi), np.eye(6), atol=1e-8)
        res = Lr @ phi - lam * (mr[:, None] * phi)
        bound = np.sqrt((res * res / mr[:, None]).sum(axis=0))
        assert (bound <= 1e-6 * lam.max()).all(), bound


# ---------------------------------------------------------------- flips

@pytest.mark.refdata
def test_flips_reach_delaunay_and_keep_the_area():
    v, f = _ref_mesh("hand")
    tri, twin = tufted_cover(v, f)
    lengths = np.linalg.norm(v[tri[:, [2, 0, 1]]] - v[tri[:, [1, 2, 0]]], axis=2)
    out = intrinsic_delaunay(tri, twin, lengths)
    assert out.flips > 0
    # Every edge's opposite angles sum to at most pi (+ tolerance), recomputed
    # here by the law of cosines, independently of the engine's cotangents.
    ln = out.lengths
    a, b, c = ln[:, 0], ln[:, 1], ln[:, 2]
    ang = np.arccos(np.clip(np.column_stack([(b * b + c * c - a * a) / (2 * b * c),
                                             (c * c + a * a - b * b) / (2 * c * a),
                                             (a * a + b * b - c * c) / (2 * a * b)]), -1, 1)).ravel()
    assert (ang + ang[out.twin]).max() <= np.pi + 1e-6
    np.testing.assert_allclose(ang.reshape(-1, 3).sum(axis=1), np.pi, atol=1e-9)  # valid triangles

    def area(l):
        s = l.sum(axis=1) / 2
        return np.sqrt(np.clip(s * (s - l[:, 0]) * (s - l[:, 1]) * (s - l[:, 2]), 0, None)).sum()
    assert area(out.lengths) == pytest.approx(area(lengths), rel=1e-9)
    # the glued halfedges have equal lengths
    np.testing.assert_array_equal(out.lengths.ravel()[out.twin], out.lengths.ravel())


# ---------------------------------------------------------------- mesh_operators()

@pytest.mark.parametrize("mass", ["barycentric", "voronoi"])
def test_operators_plain_on_icosphere(mass):
    v, f = meshes.icosphere(3)
    ops = mesh_operators(v, f, mass=mass)
    assert isinstance(ops, Operators) and ops.robust is False and ops.reason == ""
    assert _rel_fro(ops.stiffness, cotangent_laplacian(v, f)) == 0
    np.testing.assert_array_equal(ops.mass, mass_matrix(v, f, kind=mass))
    forced = mesh_operators(v, f, robust=True, mass=mass)
    assert forced.robust and forced.reason == "requested"
    assert _rel_fro(forced.stiffness, ops.stiffness) < 1e-13
    with pytest.raises(AttributeError):
        ops.robust = True  # frozen


@pytest.mark.parametrize("name,pattern", [
    ("book3", r"^1 non-manifold edge$"),
    ("fan3", r"^1 non-manifold edge$"),
    ("two_tets", r"^1 non-manifold vertex$"),
])
def test_operators_auto_robust_on_nonmanifold_handmade(name, pattern):
    v, f = HANDMADE[name]()
    ops = mesh_operators(v, f)
    assert ops.robust
    assert re.match(pattern, ops.reason), ops.reason
    L, m = robust_laplacian(v, f)
    assert _rel_fro(ops.stiffness, L) == 0
    plain = mesh_operators(v, f, robust=False)
    assert not plain.robust and plain.reason == "plain requested despite " + ops.reason


@pytest.mark.refdata
@pytest.mark.parametrize("name,pattern", [
    # CGAL hand: 16% of its interior edges have negative weight, one angle of 0.69 deg (measured)
    ("hand", r"^1 triangle with an angle below 1 degree \(smallest 0\.69 degrees\); "
             r"16% of interior edges have a negative cotangent weight$"),
    # glmark2 bunny: slivers down to 0.01 degrees (docs/platform.md), 2% negative weights (below 10%)
    ("bunny_glmark2", r"^5 triangles with an angle below 1 degree \(smallest 0\.0068 degrees\)$"),
    # pymeshfix raw scan: 132 non-manifold edges (docs/platform.md)
    ("bunny_raw_scan", r"^132 non-manifold edges; "),
])
def test_operators_auto_robust_on_reference_meshes(name, pattern):
    v, f = _ref_mesh(name)
    ops = mesh_operators(v, f)
    assert ops.robust and re.match(pattern, ops.reason), ops.reason
    assert _offdiag(ops.stiffness).max() <= 1e-8


def test_mesh_defects_counts():
    d = mesh_defects(*_fan3())
    assert (d.nonmanifold_edges, d.interior_edges, d.sliver_triangles) == (1, 0, 0)
    v, f = meshes.grid(4, 2)
    d = mesh_defects(v, f)
    # 4x2 grid of squares split by diagonals: right isosceles triangles, so no
    # negative weights and a smallest angle of 45 degrees; interior edges
    # (in two triangles) counted directly.
    edges = np.sort(np.concatenate([f[:, [0, 1]], f[:, [1, 2]], f[:, [2, 0]]]), axis=1)
    _, counts = np.unique(edges, axis=0, return_counts=True)
    assert d.interior_edges == int((counts == 2).sum())
    assert d.negative_edges == 0 and d.smallest_angle == pytest.approx(45)


# ---------------------------------------------------------------- errors

def test_errors():
    v, f = meshes.icosphere(1)
    with pytest.raises(ValueError, match=r"robust must be 'auto', True or False, got 'yes'"):
        mesh_operators(v, f, robust="yes")
    with pytest.raises(ValueError, match=r"robust must be 'auto', True or False, got 1"):
        mesh_operators(v, f, robust=1)
    with pytest.raises(ValueError, match=r"unknown mass kind 'lumpy'"):
        mesh_operators(v, f, mass="lumpy")
    with pytest.raises(ValueError, match=r"unknown mass kind 'lumpy'"):
        robust_laplacian(v, f, mass="lumpy")
    with pytest.raises(ValueError, match=r"mollify_factor must be finite and non-negative, got -1"):
        mesh_operators(v, f, mollify_factor=-1)
    with pytest.raises(ValueError, match=r"mollify_factor must be finite and non-negative, got nan"):
        robust_laplacian(v, f, mollify_factor=float("nan"))
    with pytest.raises(ValueError, match=r"faces index 99 out of range for 42 vertices"):
        robust_laplacian(v, np.array([[0, 1, 99]]))
    with pytest.raises(ValueError, match=r"no faces with three distinct vertices \(all 2 repeat a vertex\)"):
        robust_laplacian(v, np.array([[0, 0, 1], [2, 3, 3]]))
    with pytest.raises(ValueError, match=r"face 1 repeats a vertex: \[2, 3, 3\] \(1 such faces\)"):
        tufted_cover(v, np.array([[0, 1, 2], [2, 3, 3]]))
    with pytest.raises(ValueError, match=r"lengths must have the shape of faces"):
        mollify_lengths(np.ones((2, 3)), np.array([[0, 1, 2]]))
    with pytest.raises(ValueError, match=r"edge lengths must be finite and non-negative"):
        mollify_lengths(-np.ones((1, 3)), np.array([[0, 1, 2]]))
    tri, twin = tufted_cover(v, f)
    ln = np.ones(tri.shape)
    with pytest.raises(ValueError, match=r"expected triangles \(T, 3\), twin \(3T,\), lengths \(T, 3\)"):
        intrinsic_delaunay(tri, twin[:-1], ln)
    with pytest.raises(ValueError, match=r"twin must be an involution without fixed points"):
        intrinsic_delaunay(tri, np.arange(twin.size), ln)
    with pytest.raises(ValueError, match=r"twin index out of range for 480 halfedges"):
        intrinsic_delaunay(tri, twin + 1000, ln)
    with pytest.raises(ValueError, match=r"edge lengths must be finite and non-negative"):
        intrinsic_delaunay(tri, twin, np.full(tri.shape, np.inf))
    vs, fs = _sliver_book()
    tri, twin = tufted_cover(vs, fs)
    lengths = np.linalg.norm(vs[tri[:, [2, 0, 1]]] - vs[tri[:, [1, 2, 0]]], axis=2)
    with pytest.raises(RuntimeError, match=r"did not converge within 0 flips"):
        intrinsic_delaunay(tri, twin, lengths, max_flips=0)


def test_repeated_vertex_faces_are_dropped():
    # A face that repeats a vertex has no area; dropping it changes nothing.
    v, f = meshes.icosphere(1)
    L, m = robust_laplacian(v, f)
    L2, m2 = robust_laplacian(v, np.vstack([f, [[0, 0, 5]]]))
    assert _rel_fro(L2, L) == 0 and (m2 == m).all()
