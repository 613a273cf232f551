"""The pair facade (engine/jobs/pair.py) and the file jobs (engine/jobs/file_jobs.py)."""

import json

import numpy as np
import pytest

from engine.jobs.demo import creature, creature_signals
from engine.intake.files import read_mesh, write_ply
from engine.jobs.file_jobs import JobFiles, JobOptions, run_detail_job, run_transfer_job, unit_frame
from engine.jobs.pair import Pair, Settings, load_landmarks, weighted_centre_vertex
from engine.spectra.shape import Shape


@pytest.fixture(scope="module")
def aligned_pair():
    src = creature(40, 20)
    tgt = creature(50, 24, twist_offset=True, shuffle_seed=4)
    return src, tgt, Pair(Shape(src.vertices, src.faces), Shape(tgt.vertices, tgt.faces), Settings(match="aligned"))


def test_carry_validates_every_signal_before_carrying(aligned_pair):
    src, tgt, pair = aligned_pair
    good = creature_signals(src.uv)["tint"]
    with pytest.raises(ValueError, match="signal 'bad' has a non-finite value"):
        pair.carry({"tint": (good, "color"), "bad": (np.full(len(src.vertices), np.nan), "float")})


def test_identical_meshes_carry_detail_exactly():
    # A mesh mapped to itself: every vertex lands on itself (closest point is
    # the vertex), so the target's new positions are the source's.
    c = creature(30, 16, bumps=0.02)
    pair = Pair(Shape(c.vertices, c.faces), Shape(c.vertices, c.faces), Settings(match="aligned"))
    np.testing.assert_allclose(pair.detail(), c.vertices, atol=1e-9)
    # strength 0 leaves the smooth base: the bumps are gone. On 30 x 16 vertices the
    # 40 x 16 bumps alias to waves about 3 rings (0.33) long, so the band must reach
    # past them (size 0.3: cut-off 0.3 sqrt(area) = 0.56; the default 0.05 is 0.09)
    assert np.abs(pair.detail(strength=0.0, size=0.3) - c.vertices).mean() > 1e-4


def test_report_is_json(aligned_pair):
    src, _, pair = aligned_pair
    res = pair.carry({"head": (creature_signals(src.uv)["head"], "weight")})
    report = pair.report(res)
    assert report["mode"] == "aligned"
    assert 0.0 <= report["signals"]["head"]["source_error"] <= 1.0
    json.dumps(report)


def test_weighted_centre_vertex():
    v = np.array([[0, 0, 0], [1, 0, 0], [2, 0, 0], [3, 0, 0.0]])
    assert weighted_centre_vertex(v, [0, 1, 1, 0]) in (1, 2)
    assert weighted_centre_vertex(v, [0, 0, 1, 3]) == 3
    with pytest.raises(ValueError, match="not all zero"):
        weighted_centre_vertex(v, np.zeros(4))


def test_landmark_file_errors(tmp_path):
    p = tmp_path / "pairs.json"
    p.write_text("[[0, 1], [2, 99]]")
    with pytest.raises(ValueError, match="target vertex 99 out of range for 50 vertices"):
        load_landmarks(p, 10, 50)
    p.write_text("{oops")
    with pytest.raises(ValueError, match="not valid JSON"):
        load_landmarks(p, 10, 50)
    p.write_text("[[0, 1.5]]")
    with pytest.raises(ValueError, match="two whole numbers"):
        load_landmarks(p, 10, 50)
    p.write_text("[[true, false]]")  # JSON booleans are not vertex numbers
    with pytest.raises(ValueError, match=r"pair 0 must hold two whole numbers, got \[True, False\]"):
        load_landmarks(p, 10, 50)
    p.write_text("[[1, 2], [3, 4], [1, 2]]")
    with pytest.raises(ValueError, match=r"landmark 2 repeats landmark 0 \[1, 2\]"):
        load_landmarks(p, 10, 50)
    p.write_text("[[1, 2], [1, 4]]")
    with pytest.raises(ValueError, match=r"give source vertex 1 two different target vertices \(2 and 4\)"):
        load_landmarks(p, 10, 50)
    p.write_text("[[1, 2], [3, 2]]")
    with pytest.raises(ValueError, match=r"give target vertex 2 two different source vertices \(1 and 3\)"):
        load_landmarks(p, 10, 50)
    p.write_text("[" * 5000 + "]" * 5000)  # deeper than the JSON reader's recursion
    with pytest.raises(ValueError, match="nesting too deep"):
        load_landmarks(p, 10, 50)
    p.write_bytes(b"\xff\xfe[[0, 1]]")
    with pytest.raises(ValueError, match="not valid JSON"):
        load_landmarks(p, 10, 50)


def test_settings_errors():
    with pytest.raises(ValueError, match="unknown basis 'fourier'"):
        Settings(basis="fourier")
    with pytest.raises(ValueError, match="unknown match 'nearest'"):
        Settings(match="nearest")
    with pytest.raises(ValueError, match="order must be between 1 and 5"):
        Settings(order=6)


def test_transfer_job_writes_every_property_with_its_type(tmp_path, aligned_pair):
    src, tgt, _ = aligned_pair
    s = creature_signals(src.uv)
    from engine.carrying.color import encode_bytes
    write_ply(tmp_path / "s.ply", src.vertices, faces=src.faces,
              properties={"color": encode_bytes(s["tint"]), "dirt": s["dirt"].astype(np.float32),
                          "stripe_id": s["stripe_id"].astype(np.int32)})
    write_ply(tmp_path / "t.ply", tgt.vertices, faces=tgt.faces)
    files = JobFiles(tmp_path / "s.ply", tmp_path / "t.ply", tmp_path / "o.ply", report=tmp_path / "r.json")
    report = run_transfer_job(files, JobOptions(match="aligned"))
    out = read_mesh(tmp_path / "o.ply")
    assert out.properties["color"].dtype == np.uint8 and out.properties["color"].shape == (len(tgt.vertices), 3)
    assert out.properties["dirt"].dtype == np.float32
    assert out.properties["stripe_id"].dtype == np.int32
    # labels never blended: each target vertex's label is the label of one
    # corner of the source triangle it maps to (the same map, rebuilt here)
    centre, scale = unit_frame(src.vertices, tgt.vertices)
    S = Shape((src.vertices - centre) / scale, src.faces)
    T = Shape((tgt.vertices - centre) / scale, tgt.faces)
    tri = T.restore(Pair(S, T, Settings(match="aligned")).correspondence.triangle)
    corner_labels = s["stripe_id"][S.prepared.from_clean[S.faces[tri]]]
    assert (out.properties["stripe_id"][:, None] == corner_labels).any(axis=1).all()
    assert len(np.unique(s["stripe_id"])) > 2  # several labels meet, so blending would show
    conf = out.properties["confidence"]
    assert conf.dtype == np.float32 and conf.min() >= 0 and conf.max() <= 1
    assert json.loads((tmp_path / "r.json").read_text())["mode"] == report["mode"] == "aligned"
    np.testing.assert_array_equal(out.vertices, tgt.vertices)


def test_correspondence_is_cached_on_disk(tmp_path):
    # A second session on the same pair (new Shape objects, same cache folder)
    # loads the map instead of recomputing it, and carries identical values.
    from engine.common.cache import Cache
    src, tgt = creature(30, 16), creature(36, 18, twist_offset=True)
    values = creature_signals(src.uv)["tint"]
    runs = []
    for _ in range(2):
        S = Shape(src.vertices, src.faces, cache=Cache(tmp_path))
        T = Shape(tgt.vertices, tgt.faces, cache=Cache(tmp_path))
        pair = Pair(S, T, Settings(match="aligned", landmarks=((0, 0),)))
        runs.append((pair.cache_hits["correspondence"], pair.carry({"t": (values, "color")})["t"].values))
    assert [r[0] for r in runs] == ["computed", "disk"]
    np.testing.assert_array_equal(runs[0][1], runs[1][1])


def test_detail_job_keeps_vertices_outside_the_surface(tmp_path):
    # Vertices that belong to no face (isolated ones, a hole's leftovers, the
    # corners of zero-area faces only) are not part of the surface: detail
    # leaves them exactly where they were.
    src, tgt = creature(30, 16, bumps=0.02), creature(36, 18)
    n = len(tgt.vertices)
    extra = np.array([[5.0, 5.0, 5.0], [6.0, 5.0, 5.0], [7.0, 5.0, 5.0], [0.3, 0.2, 0.1]])
    vertices = np.vstack([tgt.vertices, extra])
    faces = np.vstack([tgt.faces, [[n, n + 1, n + 2]]])  # collinear: a zero-area face
    write_ply(tmp_path / "s.ply", src.vertices, faces=src.faces)
    write_ply(tmp_path / "t.ply", vertices, faces=faces)
    run_detail_job(JobFiles(tmp_path / "s.ply", tmp_path / "t.ply", tmp_path / "o.ply"),
                   JobOptions(match="aligned"))
    out = read_mesh(tmp_path / "o.ply").vertices
    np.testing.assert_array_equal(out[n:], extra)
    assert np.abs(out[:n] - tgt.vertices).max() > 1e-4  # the surface itself did move


def test_results_do_not_depend_on_units(tmp_path):
    # The same pair at about 1e-100, 1 and 1e100 times the size: identical
    # carried values; detail positions scale with the input. Powers of two
    # scale floating-point numbers exactly (IEEE 754, common practice), so the
    # unit frame sees the same bits and any difference would be the engine's.
    src, tgt = creature(30, 16, bumps=0.02), creature(36, 18, twist_offset=True)
    dirt = creature_signals(src.uv)["dirt"].astype(np.float64)
    got = {}
    for scale in (2.0 ** -332, 1.0, 2.0 ** 332):
        write_ply(tmp_path / "s.ply", src.vertices * scale, faces=src.faces, properties={"dirt": dirt})
        write_ply(tmp_path / "t.ply", tgt.vertices * scale, faces=tgt.faces)
        files = JobFiles(tmp_path / "s.ply", tmp_path / "t.ply", tmp_path / "o.ply")
        run_transfer_job(files, JobOptions(match="aligned"))
        values = read_mesh(tmp_path / "o.ply").properties["dirt"]
        run_detail_job(files, JobOptions(match="aligned"))
        got[scale] = values, read_mesh(tmp_path / "o.ply").vertices / scale
    for scale in (2.0 ** -332, 2.0 ** 332):
        np.testing.assert_array_equal(got[scale][0], got[1.0][0])
        np.testing.assert_array_equal(got[scale][1], got[1.0][1])


def test_a_reused_pair_reports_only_its_own_run():
    # A pair kept for another run: its report carries that run's timings and cache
    # use, not the first run's correspondence time and "computed" counts.
    src, tgt = creature(24, 12), creature(26, 14, twist_offset=True)
    pair = Pair(Shape(src.vertices, src.faces), Shape(tgt.vertices, tgt.faces),
                Settings(match="aligned", basis="laplacian", k=20))
    values = creature_signals(src.uv)["tint"]
    first = pair.carry({"t": (values, "color")})["t"].values
    report = pair.report()
    assert report["cache_hits"]["correspondence"] == "computed"
    assert "correspondence" in report["timings"] and report["cache_hits"]["source"]["computed"] > 0
    pair.reuse()
    again = pair.carry({"t": (values, "color")})["t"].values
    report = pair.report()
    np.testing.assert_array_equal(again, first)          # the kept transfer, unchanged
    assert report["cache_hits"]["correspondence"] == "memory"
    assert "correspondence" not in report["timings"] and set(report["timings"]) == {"bases", "signals"}
    assert report["cache_hits"]["source"]["computed"] == 0 == report["cache_hits"]["target"]["computed"]
