"""The batch handler, called with argv lists (module mode has no command line)."""

import importlib
import json
import re
import runpy
import sys

import bpy
import numpy as np
import pytest

from .conftest import MODULE, ROOT, make_grid


@pytest.fixture
def batch(overtone):
    return importlib.import_module(MODULE + ".batch")


@pytest.fixture
def pair(scene):
    source, target = make_grid("Scan"), make_grid("LOD1")
    source.vertex_groups.new(name="arm")
    source.data.color_attributes.new("AO", 'BYTE_COLOR', 'CORNER')
    return source, target


def job_file(tmp_path, data):
    path = tmp_path / "job.json"
    path.write_text(data if isinstance(data, str) else json.dumps(data))
    return path


def test_help_exits_zero(batch, capsys):
    assert batch.main(["--help"]) == 0
    out = capsys.readouterr().out
    assert "usage: overtone_batch" in out and "--save-as" in out


def test_usage_error_exits_two(batch, capsys):
    assert batch.main([]) == 2
    assert "the following arguments are required: job" in capsys.readouterr().err


def test_cli_command_is_registered(batch):
    assert batch._handle is not None


@pytest.mark.parametrize("data,message", [
    ("{not json", r"is not valid JSON: Expecting property name enclosed in double quotes at line 1 column 2"),
    ("[]", "job file must hold a JSON object, got list"),
    ({"pairs": []}, "job needs a non-empty list 'pairs'"),
    ({"pairs": [{"source": "Scan"}]}, r"pair 0: 'target' must be an object name, got None"),
    ({"pairs": [{"source": "Scan", "target": "LOD1", "colour": 1}]}, r"pair 0: unknown key\(s\) 'colour'"),
    ({"pairs": [{"source": "Scan", "target": "LOD1", "signals": "some"}]}, r"'signals' must be \"all\" or a list"),
    ({"version": 9, "pairs": []}, "job version 9 not supported"),
    ({"settings": {"basis": "wavelets"}, "pairs": [{"source": "Scan", "target": "LOD1"}]},
     "job: unknown basis 'wavelets'"),
    ({"settings": {"eigenfunctions": "many"}, "pairs": [{"source": "Scan", "target": "LOD1"}]},
     "setting 'eigenfunctions' has the wrong type: 'many'"),
    ({"settings": {"eigenfunctions": 0}, "pairs": [{"source": "Scan", "target": "LOD1"}]},
     "setting 'eigenfunctions' must be at least 1, got 0"),
    ({"settings": {"speed": 1}, "pairs": [{"source": "Scan", "target": "LOD1"}]}, "unknown setting 'speed'"),
    ({"save": "sometimes", "pairs": [{"source": "Scan", "target": "LOD1"}]}, "'save' must be"),
])
def test_bad_job_files(batch, pair, tmp_path, capsys, data, message):
    assert batch.main([str(job_file(tmp_path, data))]) == 2
    err = capsys.readouterr().err
    assert err.startswith("overtone_batch: error: ")
    assert len(err.strip().splitlines()) == 1
    with pytest.raises(batch.JobError, match=message):
        batch.check_job(batch.load_job(job_file(tmp_path, data)))


def test_missing_job_file(batch, tmp_path, capsys):
    assert batch.main([str(tmp_path / "none.json")]) == 2
    assert "cannot read job file" in capsys.readouterr().err


@pytest.mark.parametrize("pair_data,message", [
    ({"source": "Nope", "target": "LOD1"}, "pair 0: source object 'Nope' not found"),
    ({"source": "Scan", "target": "Camera"}, r"pair 0: target 'Camera' is not a mesh \(type CAMERA\)"),
    ({"source": "Scan", "target": "LOD1", "signals": ["AO", "dirt"]},
     "pair 0: source 'Scan' has no attribute or vertex group 'dirt' \\(it has 'AO', 'arm'\\)"),
    ({"source": "Scan", "target": "Scan"}, "source and target are the same object 'Scan'"),
    ({"source": "Scan", "target": "LOD1", "signals": []}, "nothing to carry"),
])
def test_objects_are_checked_before_any_work(batch, pair, tmp_path, capsys, pair_data, message):
    cam = bpy.data.objects.new("Camera", bpy.data.cameras.new("Camera"))
    bpy.context.scene.collection.objects.link(cam)
    path = job_file(tmp_path, {"pairs": [pair_data], "report": "r.json"})
    assert batch.main([str(path)]) == 2
    assert "overtone_batch: error: " in capsys.readouterr().err
    # nothing ran, and the report the job names says so and why
    report = json.loads((tmp_path / "r.json").read_text())
    assert report["exit_code"] == 2 and report["pairs"] == [] and report["saved"] is None
    assert re.search(message, report["error"])
    assert not list(tmp_path.glob(".*.part"))
    with pytest.raises(batch.JobError, match=message):
        batch.check_job(batch.load_job(path))


@pytest.mark.parametrize("data,args,message", [
    # the report named in a job file that fails its schema check
    ({"pairs": [], "report": "out/r.json"}, [], "job needs a non-empty list 'pairs'"),
    # a job file that is not JSON: only --report can name the report
    ("{not json", ["--report", "out/r.json"], "is not valid JSON"),
])
def test_report_written_when_the_job_cannot_start(batch, pair, tmp_path, monkeypatch, data, args, message):
    monkeypatch.chdir(tmp_path)
    assert batch.main([str(job_file(tmp_path, data)), *args]) == 2
    report = json.loads((tmp_path / "out" / "r.json").read_text())
    assert report["exit_code"] == 2 and message in report["error"] and report["pairs"] == []


def test_no_report_without_a_readable_path(batch, pair, tmp_path):
    assert batch.main([str(job_file(tmp_path, "{not json"))]) == 2
    assert [p.name for p in tmp_path.iterdir()] == ["job.json"]


def test_all_signals_resolved_and_pair_hook_reported(batch, pair, tmp_path, capsys):
    job = batch.check_job(batch.load_job(job_file(tmp_path, {
        "settings": {"match_mode": "intrinsic", "eigenfunctions": 80},
        "pairs": [{"source": "Scan", "target": "LOD1", "detail": True,
                   "settings": {"basis": "laplacian"}}]})))
    request = job.pairs[0].request
    assert request.signals == ("AO", "arm") and request.detail
    assert (request.settings.match, request.settings.basis, request.settings.k) == ("intrinsic", "laplacian", 80)


def test_a_failing_pair_is_reported_and_the_others_kept(batch, pair, tmp_path, capsys):
    # "Crushed" passes the checks (a mesh with faces) but every face has zero area:
    # the engine refuses it; the good pair is still carried and the file saved
    crushed = make_grid("Crushed")
    crushed.data.attributes["position"].data.foreach_set("vector", np.zeros(len(crushed.data.vertices) * 3))
    crushed.data.update()
    crushed.vertex_groups.new(name="arm")
    pair[0].vertex_groups["arm"].add([0, 1, 2], 1.0, 'REPLACE')
    path = job_file(tmp_path, {"settings": {"basis": "pointwise"},
                               "pairs": [{"source": "Crushed", "target": "LOD1", "signals": ["arm"]},
                                         {"source": "Scan", "target": "LOD1", "signals": ["arm"]}],
                               "report": "out/report.json", "save": {"as": "out/result.blend"}})
    assert batch.main([str(path)]) == 1
    report = json.loads((tmp_path / "out" / "report.json").read_text())
    assert report["failed"] == 1 and [p["status"] for p in report["pairs"]] == ["failed", "done"]
    assert report["exit_code"] == 1
    assert report["pairs"][0]["error"].startswith("'Crushed': ")
    assert report["saved"] == str(tmp_path / "out" / "result.blend")
    assert "Crushed -> LOD1: 'Crushed': " in capsys.readouterr().err
    assert "arm" in bpy.data.objects["LOD1"].vertex_groups


@pytest.mark.every_blender
def test_batch_carries_and_saves(batch, scene, tmp_path, capsys):
    """Generated creature pairs in a saved .blend; the job saves a copy; reopened, the
    results equal the engine's own Pair on the same arrays."""
    from .conftest import engine_module, make_mesh
    demo = engine_module("jobs.demo")
    s, t = demo.creature(30, 16, bumps=0.02), demo.creature(26, 18, twist_offset=True, bumps=0.0)
    src, tgt = make_mesh("Scan", s.vertices, s.faces), make_mesh("LOD1", t.vertices, t.faces)
    tint = np.column_stack([demo.creature_signals(s.uv)["tint"], np.ones(len(s.vertices))])
    src.data.color_attributes.new("tint", 'FLOAT_COLOR', 'POINT').data.foreach_set(
        "color", tint.astype(np.float32).ravel())
    blend = tmp_path / "scene.blend"
    bpy.ops.wm.save_as_mainfile(filepath=str(blend))
    path = job_file(tmp_path, {"settings": {"basis": "pointwise"},
                               "pairs": [{"source": "Scan", "target": "LOD1", "signals": "all",
                                          "detail": True}],
                               "report": "out/report.json", "save": {"as": "out/result.blend"}})
    capsys.readouterr()
    assert batch.main([str(path)]) == 0
    # the pair, then the engine's stages as the command line shows them in a pipe: one plain
    # line each, one plan for the colours and the detail (the match made once)
    progress = engine_module("common.progress")
    out = [line for line in capsys.readouterr().out.splitlines() if not line.startswith("Info: ")]  # Blender's
    assert out[0] == "overtone_batch: pair 1 of 1: Scan -> LOD1"
    lines = [re.fullmatch(r"stage (\d)/(\d): (.+) \(\d+\.\d s\)", line) for line in out[1:]]
    assert all(lines), out
    expected = [progress.READING, progress.MATCHING, progress.CARRYING, progress.DETAIL, progress.WRITING]
    assert [m[3] for m in lines] == expected
    # 5 of the 7 stages of the plan: meshes this small are matched without simplified copies
    assert len(progress.job_stages("transfer", "detail")) == 7
    assert [(int(m[1]), int(m[2])) for m in lines] == [(1, 5), (2, 5), (3, 5), (4, 5), (5, 5)]
    report = json.loads((tmp_path / "out" / "report.json").read_text())
    entry = report["pairs"][0]
    assert entry["status"] == "done" and report["saved"] == str(tmp_path / "out" / "result.blend")
    assert report["exit_code"] == 0
    assert entry["result"]["written"] == {"tint": "tint", "overtone_confidence": "overtone_confidence",
                                          "overtone_detail": "overtone_detail"}
    bridge = importlib.import_module(MODULE + ".bridge")
    pipeline, shape = engine_module("jobs.pair"), engine_module("spectra.shape").Shape
    bpy.ops.wm.open_mainfile(filepath=str(tmp_path / "out" / "result.blend"))
    src, tgt = bpy.data.objects["Scan"], bpy.data.objects["LOD1"]
    a, b = bridge.read_mesh(src), bridge.read_mesh(tgt)
    pair = pipeline.Pair(shape(a.vertices, corners=a.corners, sizes=a.sizes),
                         shape(b.vertices, corners=b.corners, sizes=b.sizes),
                         pipeline.Settings(basis="pointwise", k=60, order=2))
    signal = bridge.list_layers(tgt)[0]
    assert signal.name == "tint"
    np.testing.assert_allclose(bridge.read_signal(tgt, signal).values, pair.carry({"t": (tint, "color")})["t"].values,
                               atol=1e-6)
    keys = tgt.data.shape_keys.key_blocks
    co = np.empty(len(b.vertices) * 3, np.float32)
    keys["overtone_detail"].data.foreach_get("co", co)
    np.testing.assert_allclose(co.reshape(-1, 3), pair.detail(), atol=2e-5)
    assert entry["result"]["mode"] == pair.correspondence.mode
    # the open file on disk was not touched
    bpy.ops.wm.open_mainfile(filepath=str(blend))
    assert bpy.data.objects["LOD1"].data.shape_keys is None


def test_save_logic_once_a_pair_succeeds(batch, pair, tmp_path, monkeypatch):
    monkeypatch.setattr(batch, "transfer_pair", lambda s, t, r, show=None: {"written": {"AO": "AO"}})
    path = job_file(tmp_path, {"pairs": [{"source": "Scan", "target": "LOD1"}]})
    out = tmp_path / "saved.blend"
    assert batch.main([str(path), "--save-as", str(out), "--report", str(tmp_path / "r.json")]) == 0
    report = json.loads((tmp_path / "r.json").read_text())
    assert report["saved"] == str(out) and out.exists()
    assert report["pairs"][0] == {"source": "Scan", "target": "LOD1", "signals": ["AO", "arm"],
                                  "detail": False, "result": {"written": {"AO": "AO"}},
                                  "status": "done"}
    bpy.ops.wm.read_homefile(use_empty=True, use_factory_startup=True)
    make_grid("Scan"), make_grid("LOD1")
    bpy.data.objects["Scan"].vertex_groups.new(name="arm")
    # an unsaved file cannot be saved in place
    assert batch.main([str(path), "--save"]) == 2
    bpy.ops.wm.open_mainfile(filepath=str(out))
    assert batch.main([str(path), "--save"]) == 0


def test_script_entry_calls_the_same_handler(batch, pair, tmp_path, monkeypatch, capsys):
    monkeypatch.setattr(sys, "argv", ["blender", "-b", "-P", "overtone_batch.py", "--", "--help"])
    with pytest.raises(SystemExit) as stop:
        runpy.run_path(str(ROOT / "scripts" / "overtone_batch.py"), run_name="__main__")
    assert stop.value.code == 0
    assert "usage: overtone_batch" in capsys.readouterr().out
