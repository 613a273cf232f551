"""addon/job.py and the worker's file protocol (addon/worker.py), without Blender.

Neither module imports ``bpy``. They import the engine relatively (``.engine``),
as the built extension bundles it; here the package is made from two folders,
``addon/`` and the repository root, so ``<package>.engine`` is this
repository's ``engine/`` and the add-on's ``__init__`` (which needs ``bpy``)
never runs.
"""

from __future__ import annotations

import importlib
import json
import sys
import types
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest

from .meshes import grid

ROOT = Path(__file__).resolve().parents[1]
PACKAGE = "overtone_addon_without_blender"


def _package():
    if PACKAGE not in sys.modules:
        package = types.ModuleType(PACKAGE)
        package.__path__ = [str(ROOT / "addon"), str(ROOT)]
        sys.modules[PACKAGE] = package
    return (importlib.import_module(PACKAGE + ".job"), importlib.import_module(PACKAGE + ".worker"),
            importlib.import_module(PACKAGE + ".engine"))


job, worker, engine = _package()
progress = importlib.import_module(PACKAGE + ".engine.common.progress")


def _mesh(nx, ny):
    v, f = grid(nx, ny)
    return engine.MeshData(v, f.ravel().astype(np.int64), np.full(len(f), 3, dtype=np.int64))


def _ramp(points):
    """A colour linear in position on the 2 x 1 rectangle, inside [0, 1]."""
    x, y = points[:, 0] / 2.0, points[:, 1]
    return np.column_stack([x, y, 0.5 * (x + y), np.ones(len(points))]).astype(np.float32)


def _signal(name, values, domain="POINT"):
    values = np.asarray(values)
    return engine.Signal(name, "color", values, values.dtype, domain, "FLOAT_COLOR")


@pytest.fixture
def inputs():
    source, target = _mesh(20, 10), _mesh(33, 17)
    corner = _ramp(source.vertices[source.corners])
    signals = (_signal("tint", _ramp(source.vertices)), _signal("paint", corner, "CORNER"))
    job.forget_pairs()
    return job.JobInput("transfer", source, target, signals,
                        settings=engine.Settings(match="aligned", basis="pointwise"),
                        names=("Scan", "LOD1"))


def test_linear_colour_arrives_exactly_on_a_finer_grid(inputs):
    # Barycentric interpolation reproduces a function linear in position exactly
    # (common practice), and aligned matching of one flat rectangle to another
    # finds each target vertex on the source plane; the reference is the ramp
    # evaluated at the target's own vertices, not the code's output.
    out = job.run_job(inputs)
    target = inputs.target
    np.testing.assert_allclose(out.values["tint"], _ramp(target.vertices), atol=1e-6)
    np.testing.assert_allclose(out.values["paint"], _ramp(target.vertices[target.corners]), atol=1e-6)
    assert out.values["paint"].shape == (len(target.corners), 4)
    assert out.confidence is not None and out.confidence.shape == (len(target.vertices),)
    assert np.all((out.confidence >= 0) & (out.confidence <= 1))
    assert out.report["pair"] == "new" and out.report["basis"] == "pointwise"


def test_a_rerun_takes_the_pair_kept_in_memory(inputs):
    first = job.run_job(inputs)
    again = job.run_job(inputs)
    assert (first.report["pair"], again.report["pair"]) == ("new", "memory")
    np.testing.assert_array_equal(first.values["tint"], again.values["tint"])
    moved = replace(inputs, target=_mesh(30, 15))
    assert job.run_job(moved).report["pair"] == "new"


def test_kept_pairs_drop_the_least_recently_used():
    kept = job.KeptPairs(size=2)
    a, b, c = object(), object(), object()
    kept.put(("a",), a)
    kept.put(("b",), b)
    assert kept.get(("a",)) is a          # "a" is now the most recent
    kept.put(("c",), c)
    assert kept.get(("b",)) is None and kept.get(("a",)) is a and kept.get(("c",)) is c


def test_empty_landmark_groups_are_skipped_and_named(inputs):
    n_s, n_t = len(inputs.source.vertices), len(inputs.target.vertices)
    corner_s = np.zeros(n_s, np.float32)
    corner_s[0] = 1.0
    corner_t = np.zeros(n_t, np.float32)
    corner_t[0] = 1.0
    groups = {"corner": (corner_s, corner_t), "empty": (np.zeros(n_s, np.float32), corner_t)}
    out = job.run_job(replace(inputs, landmark_groups=groups))
    assert out.report["landmarks"]["groups"] == ["corner"]
    assert out.report["landmarks"]["skipped_empty"] == ["empty"]
    assert out.report["landmarks"]["pairs"] == [[0, 0]]


def test_bad_input_is_named(inputs):
    with pytest.raises(ValueError, match="unknown job kind 'colour'"):
        job.run_job(replace(inputs, kind="colour"))
    with pytest.raises(ValueError, match="bad settings"):
        job.run_job(replace(inputs, settings={"basis": "pointwise"}))
    with pytest.raises(ValueError, match="no signals to carry"):
        job.run_job(replace(inputs, signals=()))
    flat = engine.MeshData(np.zeros((3, 3)), np.arange(3), np.array([3]))
    with pytest.raises(ValueError, match="'LOD1'"):
        job.run_job(replace(inputs, target=flat))


def test_detail_of_a_flat_source_leaves_a_flat_target_flat(inputs):
    # A plane has no relief: whatever moves within the plane, no vertex leaves z = 0.
    out = job.run_job(replace(inputs, kind="detail", signals=()))
    assert out.positions is not None and out.positions.shape == inputs.target.vertices.shape
    np.testing.assert_allclose(out.positions[:, 2], 0.0, atol=1e-9)
    moved = np.linalg.norm(out.positions - inputs.target.vertices, axis=1)
    assert out.report["detail"]["max_offset"] == pytest.approx(moved.max())


def test_files_carry_a_job_through_unchanged(inputs, tmp_path):
    groups = {"g": (np.ones(len(inputs.source.vertices), np.float32),
                    np.ones(len(inputs.target.vertices), np.float32))}
    sent = replace(inputs, landmark_groups=groups,
                   settings=replace(inputs.settings, k=40, detail_size=0.1))
    worker.save_input(tmp_path, sent)
    got = worker.load_input(tmp_path)
    assert got.settings == sent.settings and got.names == ("Scan", "LOD1")
    for a, b in ((got.source, sent.source), (got.target, sent.target)):
        for name in ("vertices", "corners", "sizes"):
            np.testing.assert_array_equal(getattr(a, name), getattr(b, name))
    for a, b in zip(got.signals, sent.signals):
        assert (a.name, a.kind, a.domain, a.data_type, a.dtype) == (b.name, b.kind, b.domain, b.data_type,
                                                                   b.dtype)
        np.testing.assert_array_equal(a.values, b.values)
    np.testing.assert_array_equal(got.landmark_groups["g"][1], groups["g"][1])
    assert sorted(p.name for p in tmp_path.iterdir()) == ["input.json", "input.npz"]  # no temporary files


def test_files_carry_given_triangles_and_the_digest_tells_them_apart(inputs, tmp_path):
    src = inputs.source
    tris = np.roll(src.corners.reshape(-1, 3), 1, axis=1)  # same triangles, another first corner
    given = replace(src, tris=tris, tri_polygon=np.arange(len(tris), dtype=np.int64))
    worker.save_input(tmp_path, replace(inputs, source=given))
    got = worker.load_input(tmp_path)
    np.testing.assert_array_equal(got.source.tris, tris)
    np.testing.assert_array_equal(got.source.tri_polygon, np.arange(len(tris)))
    assert got.target.tris is None and got.target.tri_polygon is None   # none sent, none made up
    assert job.mesh_digest(given) != job.mesh_digest(src)
    assert job.mesh_digest(got.source) == job.mesh_digest(given)


def test_the_worker_serves_a_folder_and_says_why_it_failed(inputs, tmp_path):
    done, failed = tmp_path / "done", tmp_path / "failed"
    worker.save_input(done, inputs)
    worker.serve_folder(done)
    out = worker.load_output(done)
    np.testing.assert_allclose(out.values["tint"], _ramp(inputs.target.vertices), atol=1e-6)
    last = json.loads((done / "progress.json").read_text())
    assert last["stage"] == progress.DONE and last["fraction"] == 1.0 and last["done"] == last["total"]
    assert not (done / "error.json").exists()
    worker.save_input(failed, replace(inputs, signals=()))
    worker.serve_folder(failed)
    assert json.loads((failed / "error.json").read_text()) == {"error": "no signals to carry"}
    assert not (failed / "output.json").exists()


def test_detail_leaves_vertices_outside_the_surface_where_they_were():
    # A target with a loose vertex (in no face) far from the surface: the detail
    # job moves surface vertices only; the loose one keeps its exact position
    # (a vertex that belongs to no face has no surface detail to take).
    source, target = _mesh(101, 51), _mesh(61, 31)
    bumps = source.vertices.copy()
    bumps[:, 2] = 0.02 * np.sin(20 * np.pi * bumps[:, 0]) * np.sin(20 * np.pi * bumps[:, 1])
    source = replace(source, vertices=bumps)
    loose = np.array([[5.0, -3.0, 2.0]])
    target = replace(target, vertices=np.vstack([target.vertices, loose]))
    job.forget_pairs()
    out = job.run_job(job.JobInput("detail", source, target, (),
                                   settings=engine.Settings(match="aligned", detail_size=0.1),
                                   names=("Sculpt", "Game")))
    assert out.positions is not None and out.positions.shape == target.vertices.shape
    np.testing.assert_array_equal(out.positions[-1], loose[0])
    assert np.isfinite(out.positions).all()
    assert np.abs(out.positions[:-1, 2]).max() > 0.005  # the surface did take the bumps (amplitude 0.02)


def test_the_worker_sends_the_engines_stages_in_the_command_lines_order(inputs, tmp_path, monkeypatch):
    """What the worker writes to its progress file, one record per stage, against the stage
    lines of ``python -m engine transfer`` on the same two meshes (a pipe: plain lines)."""
    import subprocess
    import sys

    from engine.intake.files import write_ply

    from .test_progress import stage_lines

    written = []
    keep = worker._write_json

    def recording(path, data):
        if path.name == "progress.json":
            written.append(dict(data))
        keep(path, data)

    monkeypatch.setattr(worker, "_write_json", recording)
    worker.save_input(tmp_path / "first", inputs)
    worker.serve_folder(tmp_path / "first")
    assert (tmp_path / "first" / "output.json").exists()
    names = [r["stage"] for r in written]
    fractions = [r["fraction"] for r in written]
    assert names == [progress.READING, progress.MATCHING, progress.CARRYING, progress.WRITING, progress.DONE]
    assert all(b > a for a, b in zip(fractions, fractions[1:])) and fractions[-1] == 1.0
    # the job knows the meshes before its first stage: no simplified copies for meshes this small
    assert [(r["done"], r["total"]) for r in written] == [(1, 4), (2, 4), (3, 4), (4, 4), (4, 4)]
    assert all(b["seconds"] >= a["seconds"] >= 0 for a, b in zip(written, written[1:]))
    assert worker.step_of(written[1]) == progress.Step(progress.MATCHING, 2, 4, written[1]["seconds"])
    # the command line, same meshes and job
    src, tgt = inputs.source, inputs.target
    write_ply(tmp_path / "src.ply", src.vertices, corners=src.corners, sizes=src.sizes,
              properties={"dirt": src.vertices[:, 0].astype(np.float32)})
    write_ply(tmp_path / "tgt.ply", tgt.vertices, corners=tgt.corners, sizes=tgt.sizes)
    cli = subprocess.run([sys.executable, "-m", "engine", "transfer", "src.ply", "tgt.ply", "-o", "out.ply",
                          "--match", "aligned"], cwd=tmp_path, capture_output=True, text=True,
                         env={"PYTHONPATH": str(ROOT), "PATH": "/usr/bin:/bin", "OPENBLAS_NUM_THREADS": "1"})
    assert cli.returncode == 0, cli.stderr
    assert [name for _, _, name in stage_lines(cli.stdout)] == names[:-1]
    # again: the match is kept in the worker's memory, so no matching stage, and the count says so
    written.clear()
    worker.save_input(tmp_path / "again", inputs)
    worker.serve_folder(tmp_path / "again")
    assert [(r["stage"], r["done"], r["total"]) for r in written] == [
        (progress.READING, 1, 3), (progress.CARRYING, 2, 3), (progress.WRITING, 3, 3), (progress.DONE, 3, 3)]
    status = worker.Worker()
    status.folder = tmp_path / "again"
    assert status.poll() == worker.Status("done", 1.0, progress.DONE, worker.step_of(written[-1]))


def test_detail_and_preview_jobs_pass_their_own_stages(inputs):
    steps = []
    job.forget_pairs()
    detail = replace(inputs, kind="detail", signals=())
    with progress.showing(steps.append, progress.job_stages("detail")):
        job.run_job(detail)
    assert [(s.name, s.done, s.total) for s in steps] == [
        (progress.READING, 1, 4), (progress.MATCHING, 2, 4), (progress.DETAIL, 3, 4), (progress.DONE, 4, 4)]
    steps.clear()
    preview = replace(inputs, kind="preview", target=None, signals=inputs.signals[:1],
                      settings=engine.Settings(basis="laplacian", k=8))
    with progress.showing(steps.append, progress.job_stages("preview")):
        job.run_job(preview)
    assert [(s.name, s.done, s.total) for s in steps] == [
        (progress.READING, 1, 3), (progress.SMOOTHING, 2, 3), (progress.DONE, 3, 3)]


def test_a_large_source_passes_the_stages_of_simplified_copies(inputs):
    # over STANDIN_ABOVE vertices the match goes through simplified copies
    # (engine/matching/standin.py), and the stages say so in the plan's order
    source = _mesh(206, 200)
    assert len(source.vertices) > importlib.import_module(PACKAGE + ".engine.matching.standin").STANDIN_ABOVE
    steps = []
    job.forget_pairs()
    large = replace(inputs, source=source, signals=(_signal("tint", _ramp(source.vertices)),))
    with progress.showing(steps.append, progress.job_stages("transfer")):
        out = job.run_job(large)
    assert [(s.name, s.done, s.total) for s in steps] == [
        (progress.READING, 1, 6), (progress.SIMPLIFYING, 2, 6), (progress.MATCHING, 3, 6),
        (progress.REFINING, 4, 6), (progress.CARRYING, 5, 6), (progress.DONE, 6, 6)]
    assert "matched through stand-ins" in out.report["reason"]
