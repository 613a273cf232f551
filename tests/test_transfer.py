"""Transfer of signals through bases, on ground-truth pairs."""

import igl  # reference library, test environment only
import numpy as np
import pytest

from engine.matching.correspondence import correspond
from engine.spectra.shape import Shape
from engine.carrying.transfer import Transfer
from tests import pairs


@pytest.fixture(scope="module")
def pair():
    p = pairs.creature_resolution(source=(24, 14), target=(30, 18))
    S, T = Shape(p.source_vertices, p.source_faces), Shape(p.target_vertices, p.target_faces)
    return p, S, T, correspond(S, T)


def _reference_pointwise_rmse(p, S, T, f, truth):
    """Colour RMSE of the source colours read at libigl's closest points (reference library)."""
    _, tri, pts = igl.point_mesh_squared_distance(T.vertices, S.vertices, S.faces)
    fc = S.faces[tri]
    w = igl.barycentric_coordinates(pts, S.vertices[fc[:, 0]], S.vertices[fc[:, 1]], S.vertices[fc[:, 2]])
    pulled = np.einsum("ij,ijk->ik", w, S.to_cleaned(f)[fc])
    return np.sqrt(((T.restore(pulled) - truth) ** 2).mean())


@pytest.mark.parametrize("basis", ["pointwise", "laplacian", "orthoproducts", "products"])
def test_colour_close_to_truth_and_within_range(pair, basis):
    p, S, T, c = pair
    assert T.n_original == T.n_vertices and S.n_original == S.n_vertices   # no merged vertices: RMSEs below compare
    sc = pairs.rest_scale(p)
    f, truth = pairs.colour(p.source_rest, sc), pairs.colour(p.target_rest, sc)
    tr = Transfer(S, T, c, basis=basis, k=60)
    r = tr.transfer(f, kind="color")
    assert r.values.shape == (T.n_original, 3)
    assert r.values.min() >= 0 and r.values.max() <= 1
    rmse = np.sqrt(((r.values - truth) ** 2).mean())
    # Baseline measured here: the source colours read at libigl's closest points
    # (reference library; two meshings of one surface, so the map is those points).
    base = _reference_pointwise_rmse(p, S, T, f, truth)
    if basis == "pointwise":
        assert r.source_error == 0.0
        np.testing.assert_allclose(rmse, base, rtol=1e-6)
        return
    # A basis carries P (B c) with B c the source's projection, which is off the
    # source colours by source_error * ||f||_M. Analytic bound (clipping to
    # [0, 1] moves toward the truth; triangle inequality; Jensen on the rows of P,
    # which are non-negative and sum to 1): RMSE <= baseline + sqrt(rho / 3) *
    # source_error * ||f||_M, with rho = max_j (column sum of P)_j / (n_t m_j).
    m = S.mass
    rho = float(np.max(np.asarray(c.matrix().sum(axis=0)).ravel() / (T.n_vertices * m)))
    norm_f = np.sqrt((m[:, None] * f ** 2).sum())
    assert rmse <= base + np.sqrt(rho / 3) * r.source_error * norm_f + 1e-12
    # The projection onto a span holding the constants is no farther from f than
    # f's mass-weighted mean (analytic: least squares in the M inner product).
    mean = (m[:, None] * f).sum(axis=0) / m.sum()
    assert 0 < r.source_error <= np.sqrt((m[:, None] * (f - mean) ** 2).sum()) / norm_f


def test_warm_transfer_is_linear_and_reuses_bases(pair):
    p, S, T, c = pair
    tr = Transfer(S, T, c, basis="orthoproducts")
    hits = dict(S.hits)
    f = np.random.default_rng(0).uniform(0.2, 0.8, (S.n_original, 3))
    a, b = tr.transfer(f).values, tr.transfer(0.5 * f).values
    np.testing.assert_allclose(b, 0.5 * a, atol=1e-12)
    assert S.hits == hits   # nothing recomputed


def test_labels_and_masks_never_blended(pair):
    # Each carried label or mask value must be the value of one corner of the
    # target vertex's source triangle; neighbouring source vertices carry
    # different labels here, so an interpolated value would not be.
    p, S, T, c = pair
    tr = Transfer(S, T, c, basis="laplacian", k=30)
    labels = np.arange(S.n_original) % 7
    lab = tr.transfer(labels, kind="label").values
    corners = T.restore(S.to_cleaned(labels)[S.faces[c.triangle]])          # (n_t, 3)
    assert (lab[:, None] == corners).any(axis=1).all()
    blended = c.pull(labels.astype(float))                                  # what blending would give
    assert not (blended[:, None] == corners).any(axis=1).all()
    mask = np.arange(S.n_original) % 2 == 0
    m = tr.transfer(mask, kind="mask").values
    assert m.dtype == bool
    assert (m[:, None] == T.restore(S.to_cleaned(mask)[S.faces[c.triangle]])).any(axis=1).all()


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
