"""Pieces: finding, pairing and mapping separate parts of a character (tests/characters.py)."""

import json

import numpy as np
import pytest
import scipy.linalg as sla

from engine.matching.correspondence import correspond
from engine.matching.pieces import (correspond_in_pieces, find_pieces, follow_body, match_pieces,
                                    piece_spectrum)
from engine.spectra.shape import Shape
from tests import characters as ch


def _body(s, t, lm):
    return correspond(s, t, landmarks=lm)


def _shapes(p):
    return Shape(p.source_vertices, p.source_faces), Shape(p.target_vertices, p.target_faces)


def test_find_pieces_counts_components_after_welding():
    v, f, lab = ch.character(0.6, pieces=("eyes", "ring"))
    # split the ring's seam: duplicate its vertices for half its faces; welding must join them again
    ring = np.flatnonzero(np.isin(np.arange(len(v)), np.flatnonzero(lab == 3)))
    copy = np.vstack([v, v[ring]])
    remap = np.arange(len(v))
    remap[ring] = len(v) + np.arange(len(ring))
    ring_faces = np.flatnonzero(np.isin(f[:, 0], ring))
    f2 = f.copy()
    f2[ring_faces[: len(ring_faces) // 2]] = remap[f[ring_faces[: len(ring_faces) // 2]]]
    p = find_pieces(Shape(copy, f2))
    assert p.count == 4                      # body, 2 eyes, ring
    assert p.n_vertices.sum() == len(v)
    assert p.area[0] == p.area.max()
    # lumped areas sum to the total triangle area (common practice)
    a = 0.5 * np.linalg.norm(np.cross(v[f[:, 1]] - v[f[:, 0]], v[f[:, 2]] - v[f[:, 0]]), axis=1).sum()
    assert p.area.sum() == pytest.approx(a, rel=1e-12)


def test_piece_spectrum_of_a_sphere_is_near_the_analytic_one():
    # unit sphere: eigenvalues l(l+1), l = 1 three times then l = 2 five times; area 4 pi
    # (analytic Laplace-Beltrami spectrum of the sphere, common practice)
    v, f = ch.sphere(np.zeros(3), 1.0, 24, 36)
    lam = piece_spectrum(v, f)
    want = np.array([2, 2, 2, 6, 6, 6]) * 4 * np.pi
    np.testing.assert_allclose(lam, want, rtol=0.03)
    # scale invariant: same numbers for a sphere ten times larger
    np.testing.assert_allclose(piece_spectrum(10 * v, f), lam, rtol=1e-9)


def test_follow_body_reproduces_a_rigid_motion():
    rng = np.random.default_rng(0)
    body = rng.normal(size=(200, 3))
    q = sla.expm(np.array([[0, -0.4, 0.2], [0.4, 0, -0.3], [-0.2, 0.3, 0]]))   # a rotation
    mapped = 2.0 * body @ q.T + [1.0, 2.0, 3.0]
    pts = rng.normal(size=(30, 3))
    moved, nbr = follow_body(body, mapped, pts, 2.0)
    np.testing.assert_allclose(moved, 2.0 * pts @ q.T + [1.0, 2.0, 3.0], atol=1e-9)
    assert nbr.shape == (30, 16)


def _landed(p, mode):
    S, T = _shapes(p)
    c = correspond_in_pieces(S, T, _body)
    assert c.mode == mode
    assert ch.piece_landing(p, c) == 1.0
    return S, c


def test_posed_character_pieces_land_on_their_counterparts():
    p = ch.character_posed(0.7, 0.55)
    S, c = _landed(p, "intrinsic")
    rep = c.stats["pieces"]
    assert rep["target_pieces"] == rep["source_pieces"] == 11
    assert not rep["unmatched_target"] and not rep["unused_source"]
    err = ch.map_error(p, c) / np.sqrt(S.area)
    assert err.mean() < 0.04
    json.dumps(c.report())       # the job writes the report as JSON


def test_remeshed_character_in_place_keeps_pieces_apart():
    p = ch.character_remeshed(0.7, 0.9)
    S, c = _landed(p, "aligned")
    assert (ch.map_error(p, c) / np.sqrt(S.area)).mean() < 0.005


def test_missing_piece_gets_zero_confidence_and_is_named():
    src = ch.character(0.6, seed=0, pieces=("eyes", "ring"))
    tgt = ch.character(0.6, seed=1, pieces=("eyes",))
    # the source has two eyes and a ring, the target one eye: two source pieces unused
    S = Shape(src[0], src[1])
    keep = np.flatnonzero(tgt[2] != 2)   # drop the second eye from the target
    index = np.full(len(tgt[0]), -1)
    index[keep] = np.arange(len(keep))
    ft = index[tgt[1][np.all(np.isin(tgt[1], keep), axis=1)]]
    T = Shape(tgt[0][keep], ft)
    c = correspond_in_pieces(S, T, _body)
    rep = c.stats["pieces"]
    assert rep["source_pieces"] == 4 and rep["target_pieces"] == 2
    assert len(rep["unused_source"]) == 2          # the ring and the other eye
    assert "unused" in rep["summary"]
    # an extra piece in the target that nothing resembles: a large far-away sphere
    v2, f2 = ch.sphere(np.array([0.0, 5.0, 0.0]), 0.3, 8, 12)
    T2 = Shape(np.vstack([tgt[0], v2]), np.vstack([tgt[1], f2 + len(tgt[0])]))
    c2 = correspond_in_pieces(Shape(tgt[0], tgt[1]), T2, _body)
    rep2 = c2.stats["pieces"]
    assert [e["vertices"] for e in rep2["unmatched_target"]] == [len(v2)]
    lost = find_pieces(T2).label == rep2["unmatched_target"][0]["piece"]
    assert np.all(c2.confidence[lost] == 0)
    assert c2.confidence[~lost].mean() > 0.8


def test_many_small_pieces_without_a_body_are_not_refused():
    p = ch.many_pieces(40, res=(8, 10))
    S, T = _shapes(p)
    c = correspond_in_pieces(S, T, _body)
    assert "no body" in c.reason
    assert ch.piece_landing(p, c) == 1.0
    assert c.stats["pieces"]["target_pieces"] == 40
    # the driver in intrinsic mode takes the same path instead of refusing the mesh
    c2 = correspond(S, T, match="intrinsic")
    assert "no body" in c2.reason and ch.piece_landing(p, c2) == 1.0
    # aligned on request: the pieces stay where they are (here in the wrong place, so nothing pairs)
    c3 = correspond(S, T, match="aligned")
    assert c3.mode == "aligned" and c3.stats["pieces"]["unmatched_target"]


def test_forced_pair_by_landmark():
    # two pieces of identical form; the costs prefer the near one, a landmark forces the far one
    from engine.matching.pieces import Pieces
    one = np.ones(3)
    pt = Pieces(np.zeros(1), np.zeros(1), np.array([10.0, 1.0, 1.0]), np.array([[0, 0, 0], [1, 0, 0], [1.5, 0, 0.0]]),
                one, one)
    sp = np.ones((3, 6))
    m = match_pieces(pt, pt, sp, sp, pt.centroid)
    assert list(m.counterpart) == [0, 1, 2]
    m2 = match_pieces(pt, pt, sp, sp, pt.centroid, forced=[(1, 2)])
    assert list(m2.counterpart) == [0, 2, 1]


def test_clarity_is_low_only_where_the_place_does_not_decide():
    # a body and a row of 4 identical pieces 1 place unit apart (unit: 0.1 sqrt(body area) = 1)
    from engine.matching.pieces import Pieces
    row = np.array([[0, 0, 0]] + [[x, 0, 0] for x in range(4)], dtype=float)
    ones = np.ones(5)
    ps = Pieces(np.zeros(1), np.zeros(1), np.array([100.0, 1, 1, 1, 1]), row, ones, ones)
    sp = np.ones((5, 6))
    exact = match_pieces(ps, ps, sp, sp, row + [0, 0.05, 0])
    assert list(exact.counterpart) == [0, 1, 2, 3, 4]
    assert exact.clarity[1:].min() > 0.99
    # carried half-way between neighbours but for the row's end: the end still decides the row
    halfway = row.copy()
    halfway[1:4, 0] += 0.5
    chain = match_pieces(ps, ps, sp, sp, halfway)
    assert list(chain.counterpart) == [0, 1, 2, 3, 4] and chain.clarity[1:].min() > 0.6
    # two pieces both carried to the middle between their candidates: a swap costs almost nothing
    two = Pieces(np.zeros(1), np.zeros(1), np.array([100.0, 1, 1]), row[:3], ones[:3], ones[:3])
    mid = match_pieces(two, two, sp[:3], sp[:3], np.array([[0, 0, 0], [0.45, 0, 0], [0.55, 0, 0]]))
    assert list(mid.counterpart) == [0, 1, 2]
    # regret 0.55^2 * 2 - 0.45^2 * 2 = 0.2 against 4 x 0.45^2 = 0.81: clarity 1 - exp(-0.247) (by hand)
    np.testing.assert_allclose(mid.clarity[1:], 1 - np.exp(-0.2 / 0.81), rtol=1e-9)
