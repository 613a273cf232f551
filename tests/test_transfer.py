"""Transfer of signals through bases, on ground-truth pairs."""

import itertools

import numpy as np
import pytest
import scipy.linalg
import scipy.sparse
import scipy.sparse.linalg
import scipy.spatial

from engine.matching.correspondence import correspond
from engine.spectra.shape import Shape
from engine.carrying.transfer import Transfer
from tests import pairs
from tests.metrics import colour_rmse, unblended_labels


@pytest.fixture(scope="module")
def pair():
    p = pairs.creature_resolution(source=(24, 14), target=(30, 18))
    S, T = Shape(p.source_vertices, p.source_faces), Shape(p.target_vertices, p.target_faces)
    return p, S, T, correspond(S, T)


def _projection_error(S, F, columns):
    """Relative mass-weighted L2 error of the best fit of ``F`` by ``columns`` (scipy.linalg.lstsq)."""
    w = np.sqrt(S.mass)[:, None]
    R = F - columns @ scipy.linalg.lstsq(w * columns, w * F)[0]
    return np.sqrt((S.mass[:, None] * R**2).sum() / (S.mass[:, None] * F**2).sum())


@pytest.fixture(scope="module")
def reference_errors(pair):
    """Source errors of the bases computed apart from the engine: eigenfunctions from
    scipy.sparse.linalg.eigsh, fits by scipy.linalg.lstsq."""
    p, S, T, c = pair
    F = S.to_cleaned(pairs.colour(p.source_rest, pairs.rest_scale(p)))
    _, phi = scipy.sparse.linalg.eigsh(S.stiffness, k=60, M=scipy.sparse.diags(S.mass), sigma=-1e-8)
    K = 10   # Transfer's default for small meshes
    ext = np.column_stack([phi[:, :K], np.ones(len(phi))])   # monomials of degree <= 3 in phi_0..phi_K-1
    raw = np.column_stack([ext[:, list(e)].prod(axis=1)
                           for e in itertools.combinations_with_replacement(range(K + 1), 3)])
    return {"pointwise": 0.0, "laplacian": _projection_error(S, F, phi),
            # the product span holds the first K eigenfunctions (degree-1 products), so
            # it fits at least as well as they do
            "orthoproducts": _projection_error(S, F, phi[:, :K]), "products": _projection_error(S, F, raw)}


@pytest.mark.parametrize("basis", ["pointwise", "laplacian", "orthoproducts", "products"])
def test_colour_close_to_truth_and_within_range(pair, basis, reference_errors):
    p, S, T, c = pair
    sc = pairs.rest_scale(p)
    tr = Transfer(S, T, c, basis=basis, k=60)
    r = tr.transfer(pairs.colour(p.source_rest, sc), kind="color")
    assert r.values.shape == (T.n_original, 3)
    assert r.values.min() >= 0 and r.values.max() <= 1
    truth = pairs.colour(p.target_rest, sc)
    # reference: the colour of the source vertex nearest each target vertex's true
    # partner (scipy cKDTree on the ground truth); interpolating through a good map beats it
    nearest = scipy.spatial.cKDTree(p.source_rest).query(p.target_rest)[1]
    assert colour_rmse(r.values, truth) < colour_rmse(pairs.colour(p.source_rest, sc)[nearest], truth)
    # the basis's own error is the least-squares fit's, or less where clamping to the
    # colour range helps (the orthogonal products: at most that of the eigenfunctions
    # they hold); the raw products' fit cuts tiny singular values (LeastSquaresProducts),
    # which may cost a thousandth
    assert 0 <= r.source_error <= reference_errors[basis] * (1 + 1e-3)
    if basis in ("laplacian", "products"):
        assert r.source_error == pytest.approx(reference_errors[basis], rel=1e-3)


def test_warm_transfer_is_linear_and_reuses_bases(pair):
    p, S, T, c = pair
    tr = Transfer(S, T, c, basis="orthoproducts")
    hits = dict(S.hits)
    f = np.random.default_rng(0).uniform(0.2, 0.8, (S.n_original, 3))
    a, b = tr.transfer(f).values, tr.transfer(0.5 * f).values
    np.testing.assert_allclose(b, 0.5 * a, atol=1e-12)
    assert S.hits == hits   # nothing recomputed


def test_labels_and_masks_never_blended(pair):
    p, S, T, c = pair
    tr = Transfer(S, T, c, basis="laplacian", k=30)
    labels = np.arange(S.n_original) % 7
    lab = tr.transfer(labels, kind="label").values
    assert unblended_labels(c, labels, lab).all()
    mask = np.arange(S.n_original) % 2 == 0
    m = tr.transfer(mask, kind="mask").values
    assert m.dtype == bool and unblended_labels(c, mask, m).all()


def test_errors(pair):
    p, S, T, c = pair
    with pytest.raises(ValueError, match="unknown basis 'fourier'"):
        Transfer(S, T, c, basis="fourier")
    with pytest.raises(ValueError, match="another source/target pair"):
        Transfer(T, S, c)
    tr = Transfer(S, T, c)
    with pytest.raises(ValueError, match="unknown signal kind 'rgb'"):
        tr.transfer(np.zeros((S.n_original, 3)), kind="rgb")
    with pytest.raises(ValueError, match="rows"):
        tr.transfer(np.zeros((5, 3)))
    bad = np.zeros((S.n_original, 3))
    bad[3, 1] = np.nan
    with pytest.raises(ValueError, match="finite|NaN|nan"):
        tr.transfer(bad)


def test_shape_caches_in_memory_and_on_disk(tmp_path):
    from tests.meshes import icosphere
    v, f = icosphere(2)
    a = Shape(v, f, cache=tmp_path)
    e1 = a.eigenbasis(12)
    a.eigenbasis(8)                       # answered by the larger basis
    assert a.hits == {"memory": 1, "disk": 0, "computed": 1}
    b = Shape(v, f, cache=tmp_path)       # a new session on the same geometry
    e2 = b.eigenbasis(12)
    assert b.hits["disk"] == 1 and b.hits["computed"] == 0
    np.testing.assert_allclose(e2.eigenvectors, e1.eigenvectors)
    # unit sphere: first non-zero eigenvalue l(l+1) = 2 (Chavel 1984, from memory), 3-fold
    np.testing.assert_allclose(e1.eigenvalues[1:4], 2.0, rtol=0.05)
    # restore takes cleaned values back to every original vertex
    np.testing.assert_array_equal(a.restore(np.arange(a.n_vertices)), np.arange(len(v)))
