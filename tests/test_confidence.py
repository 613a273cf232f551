"""Confidence: does it predict the real error, and does auto mode check itself (tests/pairs.py, tests/characters.py)."""

import json

import numpy as np
import pytest
from scipy.stats import mannwhitneyu

from engine.matching.confidence import separation_auc
from engine.matching.correspondence import correspond
from engine.spectra.shape import Shape
from tests import characters as ch, pairs


def _shapes(p):
    return Shape(p.source_vertices, p.source_faces), Shape(p.target_vertices, p.target_faces)


def test_separation_auc_is_the_mann_whitney_statistic():
    rng = np.random.default_rng(1)
    err = rng.uniform(0, 4, 500)
    conf = np.round(np.exp(-err) + rng.normal(0, 0.2, 500), 1)      # rounded: ties
    good, bad = err <= 1.0, err > 2.0
    # scipy's U statistic of the first sample over the product of sizes (ties count one half)
    want = mannwhitneyu(conf[good], conf[bad]).statistic / (good.sum() * bad.sum())
    assert separation_auc(conf, err, 1.0) == pytest.approx(want, rel=1e-12)
    assert separation_auc(-err, err, 1.0) == 1.0
    assert separation_auc(err, err, 1.0) == 0.0
    assert separation_auc(conf, np.zeros(500), 1.0) is None


def test_auto_mode_rejects_an_overlapping_but_rolled_copy():
    p = ch.rolled((24, 16))
    S, T = _shapes(p)
    c = correspond(S, T)
    # the copy overlaps its original, so the overlap test alone picks aligned ...
    assert "aligned" in c.reason.split(";")[0]
    # ... and the self-check replaces it by the intrinsic answer, saying why
    assert c.mode == "intrinsic" and "self-check" in c.reason
    assert c.stats["self_check"]["kept"] == "intrinsic"
    assert (ch.map_error(p, c) / T.mean_edge).mean() < 0.5
    # the aligned answer put most vertices far off; its confidence was lower
    assert c.stats["self_check"]["aligned_mean"] < c.stats["self_check"]["intrinsic_mean"]
    json.dumps(c.report())       # the job writes the report as JSON


def test_a_blob_against_a_plane_is_called_a_different_kind_of_object():
    v, f = ch.blob((14, 20))
    c = correspond(Shape(v, f), Shape(*ch.plane(16)))
    assert c.confidence.mean() < 0.5
    assert c.stats["confidence"]["different_kind"]
    assert "not the same kind" in c.stats["confidence"]["warning"]
    json.dumps(c.report())
    same = correspond(Shape(v, f), Shape(v * 1.01, f))
    assert same.confidence.mean() > 0.9 and same.stats["confidence"]["warning"] == ""


def test_confidence_separates_wrong_vertices_on_a_pinched_creature():
    p = pairs.creature_pinched(source=(32, 20), target=(28, 18))
    S, T = _shapes(p)
    c = correspond(S, T, match="aligned")
    e = ch.map_error(p, c) / T.mean_edge
    assert np.mean(e > 2) > 0.03                    # there are wrong vertices to find
    auc = separation_auc(c.confidence, e, 1.0)
    assert auc > 0.9
    assert e[c.confidence < 0.5].mean() > 2 * e[c.confidence >= 0.5].mean()


def test_a_piece_without_counterpart_is_the_uncertain_part():
    src = ch.character(0.6, seed=0, pieces=("eyes", "teeth"))
    v, f, lab = ch.character(0.6, seed=1, pieces=("eyes", "teeth"))
    hat, hf = ch.sphere(np.array([1.5, 0.0, 0.7]), 0.15, 6, 10, squash=(1, 1, 0.4))
    T = Shape(np.vstack([v, hat]), np.vstack([f, hf + len(v)]))
    S = Shape(src[0], src[1])
    c = correspond(S, T)
    extra = np.zeros(T.n_vertices, bool)
    extra[len(v):] = True
    assert np.all(c.confidence[extra] == 0)
    assert c.confidence[~extra].min() > 0.2
    assert "nothing like them" in c.stats["confidence"]["warning"]
    assert [e["first_vertex"] for e in c.stats["pieces"]["unmatched_target"]] == [len(v)]


def test_forced_aligned_mode_doubts_a_rolled_copy():
    # the copy overlaps its original and is nearly round about the roll axis: facing and the way
    # back agree, yet almost every vertex is elsewhere (truth from the generator, tests/characters.py)
    p = ch.rolled((24, 16))
    S, T = _shapes(p)
    c = correspond(S, T, match="aligned")
    assert c.mode == "aligned"                       # asked for: kept
    e = ch.map_error(p, c) / T.mean_edge
    assert np.mean(e > 2) > 0.8                     # mostly wrong ...
    assert c.confidence.mean() < 0.2                 # ... and now it says so
    assert c.stats["confidence"]["poor"]
    assert "matching by shape" in c.stats["confidence"]["warning"]
    assert c.stats["self_check"]["kept"] == "aligned"
    auc = separation_auc(c.confidence, e, 1.0)
    assert auc is not None and auc > 0.9
    json.dumps(c.report())


@pytest.mark.parametrize("make", [pairs.creature_thicker, pairs.creature_reposed])
def test_forced_aligned_mode_keeps_its_confidence_on_good_pairs(make):
    p = make(source=(30, 18), target=(26, 16))
    S, T = _shapes(p)
    c = correspond(S, T, match="aligned")
    e = ch.map_error(p, c) / max(S.mean_edge, T.mean_edge)
    assert np.mean(e > 2) < 0.02                     # a good map ...
    assert c.confidence.mean() > 0.9                 # ... keeps a high confidence
    assert c.stats["confidence"]["warning"] == ""
    assert "intrinsic_agreement" not in c.stats["confidence"]["checks"]


def test_forced_aligned_mode_without_an_intrinsic_answer_keeps_its_own_confidence():
    from engine.matching.confidence import checked_auto, with_confidence
    from engine.matching.correspondence import correspond_surface
    from engine.matching.modes import MatchOptions
    p = ch.rolled((24, 16))
    S, T = _shapes(p)
    aligned = with_confidence(correspond_surface(S, T, "aligned", None, None, MatchOptions()))

    def refused():
        raise ValueError("need at least one non-zero eigenvalue, all are zero")
    kept = checked_auto(aligned, refused, forced=True)     # asked for aligned: the check is skipped
    assert kept is aligned and "self_check" not in kept.stats
    with pytest.raises(ValueError, match="non-zero eigenvalue"):
        checked_auto(aligned, refused)                      # auto mode: the failure is not hidden
