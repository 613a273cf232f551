"""The job operators end to end in real bpy, checked against the engine's own
result computed directly with engine.jobs.pair on the same arrays.

Meshes are the engine's generated creature (engine/demo.py): a source and a
differently triangulated target in the same place. Colours, weights and
detail expected here come from ``Pair`` itself; the bridge's own conventions
(linear colours, world space) are tested in test_bridge.py.
"""

import importlib
import json
import time

import bpy
import mathutils
import numpy as np
import pytest

from .conftest import MODULE, engine_module, make_grid, make_mesh, select
from .test_bridge import snapshot


@pytest.fixture
def mod(overtone):
    names = ("bridge", "job", "runs", "operators", "worker", "threads")
    return type("M", (), {n: importlib.import_module(f"{MODULE}.{n}") for n in names})


def srgb_encode(x):
    # IEC 61966-2-1 sRGB transfer function (common practice)
    x = np.asarray(x, dtype=np.float64)
    return np.where(x <= 0.0031308, 12.92 * x, 1.055 * np.power(np.clip(x, 0, None), 1 / 2.4) - 0.055)


def painted_pair(scene, *, rings=(30, 26), segments=(16, 18)):
    demo = engine_module("jobs.demo")
    s = demo.creature(rings[0], segments[0])
    t = demo.creature(rings[1], segments[1], twist_offset=True, shuffle_seed=3)
    src, tgt = make_mesh("Painted", s.vertices, s.faces), make_mesh("Plain", t.vertices, t.faces)
    sig = demo.creature_signals(s.uv)
    mesh = src.data
    rgba = np.column_stack([sig["tint"], np.ones(len(s.vertices))]).astype(np.float32)
    mesh.color_attributes.new("tint", 'FLOAT_COLOR', 'POINT').data.foreach_set("color", rgba.ravel())
    corner = rgba[[lp.vertex_index for lp in mesh.loops]]
    mesh.color_attributes.new("tint_bytes", 'BYTE_COLOR', 'CORNER').data.foreach_set("color", corner.ravel())
    mesh.attributes.new("dirt", 'FLOAT', 'POINT').data.foreach_set("value", sig["dirt"].astype(np.float32))
    mesh.attributes.new("flow", 'FLOAT_VECTOR', 'POINT').data.foreach_set(
        "vector", (s.vertices * 0.5).astype(np.float32).ravel())
    group = src.vertex_groups.new(name="head")
    for w in np.unique(sig["head"][sig["head"] > 0]):
        group.add(np.flatnonzero(sig["head"] == w).tolist(), float(w), 'REPLACE')
    select(src, tgt)
    return src, tgt


def engine_pair(mod, src, tgt, **settings):
    """The engine's own Pair on the arrays the bridge reads (the add-on's defaults)."""
    pipeline = engine_module("jobs.pair")
    shape = engine_module("spectra.shape").Shape
    a, b = mod.bridge.read_mesh(src), mod.bridge.read_mesh(tgt)
    options = {"match": "auto", "basis": "pointwise", "k": 60, "order": 2, **settings}
    return pipeline.Pair(shape(a.vertices, corners=a.corners, sizes=a.sizes),
                         shape(b.vertices, corners=b.corners, sizes=b.sizes),
                         pipeline.Settings(**options))


def read(mod, obj, name):
    return next(mod.bridge.read_signal(obj, s).values for s in mod.bridge.list_layers(obj) if s.name == name)


@pytest.mark.every_blender
def test_carry_signals_default_set_matches_the_engine(mod, scene):
    src, tgt = painted_pair(scene)
    before = snapshot(src)
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    assert snapshot(src) == before  # the source is never modified
    # nothing ticked: every colour attribute and vertex group, not the float/vector attributes
    names = {s.name for s in mod.bridge.list_layers(tgt)}
    assert names == {"tint", "tint_bytes", "head", "overtone_confidence"}
    pair = engine_pair(mod, src, tgt)
    tint = read(mod, src, "tint")
    expected = pair.carry({"tint": (tint, "color"), "head": (read(mod, src, "head"), "weight")})
    np.testing.assert_allclose(read(mod, tgt, "tint"), expected["tint"].values, atol=1e-6)
    np.testing.assert_allclose(read(mod, tgt, "head"), expected["head"].values, atol=1e-6)
    # seamless corner colour: exactly the point transfer at each corner's vertex,
    # stored as 8-bit sRGB (within one step of the encoded value)
    src_corners = mod.bridge.read_mesh(src).corners
    stored = np.zeros((len(tint), 4))
    stored[src_corners] = read(mod, src, "tint_bytes")  # seamless: every corner of a vertex agrees
    corner_verts = mod.bridge.read_mesh(tgt).corners
    got = srgb_encode(read(mod, tgt, "tint_bytes")[:, :3])
    want = srgb_encode(pair.carry({"t": (stored, "color")})["t"].values[corner_verts][:, :3])
    assert np.abs(got - want).max() <= 1 / 255 + 1e-6
    conf = read(mod, tgt, "overtone_confidence")
    np.testing.assert_allclose(conf[:, 1], pair.confidence, atol=1e-6)
    settings = scene.overtone
    assert json.loads(settings.report_json)["mode"] == pair.correspondence.mode
    assert settings.report_ok and settings.report_mode == {"aligned": "Matched by position",
                                                           "intrinsic": "Matched by shape"}[pair.correspondence.mode]
    assert settings.report_confidence == pytest.approx(float(pair.confidence.mean()), abs=1e-6)
    assert {i.name for i in settings.report_signals} == {"tint", "tint_bytes", "head"}


def test_ticked_float_and_vector_attributes(mod, scene):
    src, tgt = painted_pair(scene)
    assert bpy.ops.overtone.refresh_signals() == {'FINISHED'}
    for item in scene.overtone.signals:
        item.use = item.name in ("dirt", "flow")
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    assert {s.name for s in mod.bridge.list_layers(tgt)} == {"dirt", "flow", "overtone_confidence"}
    pair = engine_pair(mod, src, tgt)
    res = pair.carry({"dirt": (read(mod, src, "dirt"), "float"), "flow": (read(mod, src, "flow"), "vector")})
    np.testing.assert_allclose(read(mod, tgt, "dirt"), res["dirt"].values, atol=1e-6)
    np.testing.assert_allclose(read(mod, tgt, "flow"), res["flow"].values, atol=1e-6)
    got = {i.name: i.source_error for i in scene.overtone.report_signals}
    assert got["dirt"] == pytest.approx(res["dirt"].source_error, rel=1e-5)


def test_names_follow_the_policy_and_replace_only_when_asked(mod, scene):
    src, tgt = painted_pair(scene)
    scene.overtone.basis = "POINTWISE"
    bpy.ops.overtone.refresh_signals()
    for item in scene.overtone.signals:
        item.use = item.name == "tint"
    tgt.data.color_attributes.new("tint", 'FLOAT_COLOR', 'POINT')     # the target's own "tint"
    bpy.ops.overtone.transfer_attributes()
    bpy.ops.overtone.transfer_attributes()
    # the second run refreshes what the first wrote: no tint_ot2, no second confidence
    names = {s.name for s in mod.bridge.list_layers(tgt)}
    assert names == {"tint", "tint_ot1", "overtone_confidence"}
    scene.overtone.replace_existing = True
    bpy.ops.overtone.transfer_attributes()
    assert {s.name for s in mod.bridge.list_layers(tgt)} == names
    np.testing.assert_array_equal(read(mod, tgt, "tint"), read(mod, tgt, "tint_ot1"))


def test_corner_colour_keeps_its_seams(mod, scene):
    demo = engine_module("jobs.demo")
    s = demo.creature(24, 12)
    src, same = make_mesh("Seamed", s.vertices, s.faces), make_mesh("Copy", s.vertices, s.faces)
    # two colours split by the plane y = 0: the corners of a face take its side's colour
    centroid_y = s.vertices[s.faces].mean(axis=1)[:, 1]
    face_colour = np.where(centroid_y[:, None] > 0, [1.0, 0.0, 0.0, 1.0], [0.0, 0.0, 1.0, 1.0])
    corner = np.repeat(face_colour, 3, axis=0).astype(np.float32)
    src.data.color_attributes.new("side", 'FLOAT_COLOR', 'CORNER').data.foreach_set("color", corner.ravel())
    select(src, same)
    scene.overtone.basis = "POINTWISE"  # a basis would blur the colour edge next to the seam
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    # the same mesh: every corner reads its own face's colour, seam and all
    np.testing.assert_allclose(read(mod, same, "side"), corner, atol=1e-6)
    # a finer mesh: corners of faces well inside either side are pure, and the
    # target has seam vertices (corners of one vertex with both colours)
    t = demo.creature(40, 20, twist_offset=True)
    finer = make_mesh("Finer", t.vertices, t.faces)
    select(src, finer)
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    got = read(mod, finer, "side")
    cy = np.repeat(t.vertices[t.faces].mean(axis=1)[:, 1], 3)
    far = np.abs(cy) > 0.08
    want = np.where(cy[:, None] > 0, [1.0, 0.0, 0.0, 1.0], [0.0, 0.0, 1.0, 1.0])
    np.testing.assert_allclose(got[far], want[far], atol=1e-6)
    corner_verts = t.faces.ravel()
    red = np.zeros(len(t.vertices), bool)
    blue = np.zeros(len(t.vertices), bool)
    red[corner_verts[got[:, 0] > 0.99]] = True
    blue[corner_verts[got[:, 2] > 0.99]] = True
    assert (red & blue).sum() >= 10  # a seam ring around the body


@pytest.mark.every_blender
def test_detail_becomes_a_shape_key_in_object_space(mod, scene):
    demo = engine_module("jobs.demo")
    s = demo.creature(30, 16, bumps=0.03)
    t = demo.creature(28, 18, bumps=0.0, twist_offset=True)
    src = make_mesh("Bumpy", s.vertices, s.faces)
    matrix = mathutils.Matrix.Translation((0.5, -1.0, 2.0)) @ mathutils.Matrix.Rotation(0.6, 4, 'Z')
    local = np.array(t.vertices) @ np.array(matrix.to_3x3()).T + np.array(matrix.translation)
    tgt = make_mesh("Smooth", np.asarray((np.linalg.inv(np.array(matrix)) @ np.column_stack(
        [local, np.ones(len(local))]).T).T[:, :3]), t.faces)
    tgt.matrix_world = matrix
    bpy.context.view_layer.update()
    select(src, tgt)
    # the 40 x 16 bumps on 30 x 16 vertices alias to waves about 3 rings (0.33) long: a band
    # of 0.3 (cut-off 0.3 sqrt(area) = 0.56) holds them; the default 0.05 (0.09) does not
    scene.overtone.detail_size = 0.3
    before = snapshot(src)
    assert bpy.ops.overtone.transfer_detail() == {'FINISHED'}
    assert snapshot(src) == before
    keys = tgt.data.shape_keys.key_blocks
    assert [k.name for k in keys] == ["Basis", "overtone_detail"] and keys["overtone_detail"].value == 1.0
    co = np.empty(len(keys[1].data) * 3, np.float32)
    keys[1].data.foreach_get("co", co)
    world = co.reshape(-1, 3).astype(np.float64) @ np.array(matrix.to_3x3()).T + np.array(matrix.translation)
    expected = engine_pair(mod, src, tgt).detail(strength=1.0, size=0.3)
    np.testing.assert_allclose(world, expected, atol=2e-5)
    assert np.abs(expected - mod.bridge.read_mesh(tgt).vertices).max() > 1e-3  # something was carried


def test_preview_adds_carried_layers_to_the_source_only(mod, scene):
    src, tgt = painted_pair(scene)
    scene.overtone.basis = "LAPLACIAN"
    scene.overtone.eigenfunctions = 30
    before = snapshot(src)
    assert bpy.ops.overtone.preview_carry() == {'FINISHED'}
    after = snapshot(src)
    for name, value in before["attributes"].items():
        assert after["attributes"][name] == value  # existing layers unchanged
    assert set(after["attributes"]) - set(before["attributes"]) == {"tint_carried", "tint_bytes_carried"}
    assert set(after["groups"]) - set(before["groups"]) == {"head_carried"}
    preview = engine_module("carrying.preview")
    signals = engine_module("carrying.signals")
    shape = engine_module("spectra.shape").Shape
    a = mod.bridge.read_mesh(src)
    tint = read(mod, src, "tint").astype(np.float64)
    direct = preview.approximate_signals(
        shape(a.vertices, corners=a.corners, sizes=a.sizes),
        {"tint": signals.Signal("tint", "color", tint, tint.dtype)}, basis="laplacian", k=30)
    np.testing.assert_allclose(read(mod, src, "tint_carried"), direct.values["tint"], atol=1e-6)
    errors = {i.name: i.source_error for i in scene.overtone.report_signals}
    assert errors["tint"] == pytest.approx(direct.errors["tint"], rel=1e-5) and errors["tint"] > 0
    assert len(mod.bridge.list_layers(tgt)) == 0


def test_same_named_vertex_groups_are_landmarks(mod, scene):
    src, tgt = painted_pair(scene)
    pipeline = engine_module("jobs.pair")
    for obj, name in ((src, "snout"), (tgt, "snout")):
        positions = mod.bridge.read_mesh(obj).vertices
        group = obj.vertex_groups.new(name=name)
        group.add(np.flatnonzero(positions[:, 0] < 0.1).tolist(), 1.0, 'REPLACE')
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    report = json.loads(scene.overtone.report_json)
    w_s = mod.bridge.read_vertex_groups(src, ["snout"])["snout"]
    w_t = mod.bridge.read_vertex_groups(tgt, ["snout"])["snout"]
    assert report["landmarks"]["groups"] == ["snout"]
    assert report["landmarks"]["pairs"] == [[
        pipeline.weighted_centre_vertex(mod.bridge.read_mesh(src).vertices, w_s),
        pipeline.weighted_centre_vertex(mod.bridge.read_mesh(tgt).vertices, w_t)]]
    assert "snout_ot1" not in {s.name for s in mod.bridge.list_layers(tgt)}  # not carried
    # the carried "head" group is not a landmark on the next run, and is carried again, in place
    written = json.loads(tgt["overtone_written"])["layers"]
    assert written == {name: ["Painted", name] for name in ("head", "overtone_confidence", "tint", "tint_bytes")}
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    report = json.loads(scene.overtone.report_json)
    assert report["landmarks"]["groups"] == ["snout"] and report["pair"] == "memory"
    assert report["written"]["head"] == "head" and "head_ot1" not in tgt.vertex_groups


def test_results_survive_save_and_reopen(mod, scene, tmp_path):
    src, tgt = painted_pair(scene)
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    tint, conf = read(mod, tgt, "tint"), read(mod, tgt, "overtone_confidence")
    path = tmp_path / "carried.blend"
    bpy.ops.wm.save_as_mainfile(filepath=str(path))
    bpy.ops.wm.open_mainfile(filepath=str(path))
    tgt, src = bpy.data.objects["Plain"], bpy.data.objects["Painted"]
    expected = engine_pair(mod, src, tgt).carry({"tint": (read(mod, src, "tint"), "color")})
    np.testing.assert_allclose(read(mod, tgt, "tint"), expected["tint"].values, atol=1e-6)
    np.testing.assert_array_equal(read(mod, tgt, "tint"), tint)
    np.testing.assert_array_equal(read(mod, tgt, "overtone_confidence"), conf)


# ----------------------------------------------------------------------------- bad input


def _scene_state():
    return {obj.name: snapshot(obj) for obj in bpy.data.objects if obj.type == 'MESH'}


def _bad_only_one(scene):
    src, tgt = painted_pair(scene)
    select(tgt, tgt)
    return r"only 'Plain' is selected: also select the source mesh"


def _bad_not_a_mesh(scene):
    src, tgt = painted_pair(scene)
    cam = bpy.data.objects.new("Camera", bpy.data.cameras.new("Camera"))
    scene.collection.objects.link(cam)
    select(cam, tgt)
    return r"source 'Camera' is not a mesh \(type CAMERA\)"


def _bad_no_faces(scene):
    src, tgt = painted_pair(scene)
    cloud = bpy.data.meshes.new("Cloud")
    cloud.vertices.add(5)
    obj = bpy.data.objects.new("Cloud", cloud)
    scene.collection.objects.link(obj)
    select(src, obj)
    return r"target 'Cloud' has no faces \(5 vertices\)"


def _bad_missing_signal(scene):
    src, tgt = painted_pair(scene)
    bpy.ops.overtone.refresh_signals()
    scene.overtone.signals["dirt"].use = True  # numbers are carried only when ticked
    src.data.attributes.remove(src.data.attributes["dirt"])
    return r"source 'Painted' has no attribute or vertex group 'dirt' \(it has 'tint', 'tint_bytes', 'flow', 'head'\)"


def _bad_three_selected(scene):
    src, tgt = painted_pair(scene)
    extra = make_grid("Extra")
    extra.select_set(True)
    return r"select exactly two objects: besides the target 'Plain', 'Painted', 'Extra' are selected"


@pytest.mark.parametrize("setup", [_bad_only_one, _bad_not_a_mesh, _bad_no_faces, _bad_missing_signal,
                                   _bad_three_selected])
@pytest.mark.parametrize("op", ["transfer_attributes", "transfer_detail"])
def test_bad_input_is_one_error_and_the_scene_is_unchanged(mod, scene, setup, op):
    message = setup(scene)
    if op == "transfer_detail" and setup is _bad_missing_signal:
        message = None  # the detail does not read signals: it runs
    before = _scene_state()
    if message is None:
        assert getattr(bpy.ops.overtone, op)() == {'FINISHED'}
        return
    with pytest.raises(RuntimeError, match=message):
        getattr(bpy.ops.overtone, op)()
    assert _scene_state() == before
    assert not scene.overtone.report_ok
    assert scene.overtone.report_text.startswith(message.split("\\")[0].split("'")[0])


# ----------------------------------------------------------------------------- the worker


def test_background_run_matches_the_run_in_process(mod, scene):
    src, tgt = painted_pair(scene)
    plan = mod.operators.plan_from_context(bpy.context, "transfer")
    run = mod.runs.BackgroundRun(plan)
    messages = []
    assert run.worker.wait(timeout=300).state == "done"
    assert mod.operators.step_run(run, scene.overtone, lambda k, m: messages.append((k, m))) == {'FINISHED'}
    assert messages[0][0] == {'INFO'} and "carried 3 layers" in messages[0][1]
    in_worker = {n: read(mod, tgt, n) for n in ("tint", "tint_bytes", "head")}
    scene.overtone.replace_existing = True
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    for name, values in in_worker.items():
        np.testing.assert_allclose(read(mod, tgt, name), values, atol=1e-6)
    # again in the worker: the pair is in the worker's memory (the carried "head"
    # group on the target is a result, not a landmark: the plan is the same)
    run = mod.runs.BackgroundRun(mod.operators.plan_from_context(bpy.context, "transfer"))
    run.worker.wait(timeout=300)
    assert mod.operators.step_run(run, scene.overtone, lambda k, m: None) == {'FINISHED'}
    assert scene.overtone.report_cache == "Reused the match of the last run on these meshes (kept in memory)."


def test_step_run_reports_progress_while_running(mod, scene):
    src, tgt = painted_pair(scene, rings=(70, 58), segments=(36, 40))   # sizes of its own: matched anew
    before = _scene_state()
    run = mod.runs.BackgroundRun(mod.operators.plan_from_context(bpy.context, "transfer"))
    seen = []
    while True:
        result = mod.operators.step_run(run, scene.overtone, lambda k, m: seen.append(m))
        if result != {'RUNNING_MODAL'}:
            break
        seen.append((scene.overtone.progress, scene.overtone.progress_text))
        time.sleep(0.02)
    assert result == {'FINISHED'}
    assert any(isinstance(s, tuple) and s[1].startswith("Matching the surfaces (") for s in seen)
    assert _scene_state() != before and not scene.overtone.running


def test_cancel_stops_the_worker_and_writes_nothing(mod, scene):
    src, tgt = painted_pair(scene, rings=(70, 60), segments=(36, 40))
    before = _scene_state()
    run = mod.runs.BackgroundRun(mod.operators.plan_from_context(bpy.context, "transfer"))
    process = run.worker.process
    time.sleep(0.3)
    messages = []
    assert mod.operators.cancel_run(run, scene.overtone, lambda k, m: messages.append((k, m))) == {'CANCELLED'}
    assert process.poll() is not None  # terminated
    assert messages == [({'WARNING'}, "Overtone: cancelled: 'Plain' left as it was")]
    assert _scene_state() == before
    assert not run.folder.exists()


def test_a_target_changed_while_working_is_not_written(mod, scene):
    src, tgt = painted_pair(scene)
    run = mod.runs.BackgroundRun(mod.operators.plan_from_context(bpy.context, "transfer"))
    run.worker.wait(timeout=300)
    tgt.data.vertices[0].co.x += 0.25
    before = _scene_state()
    messages = []
    assert mod.operators.step_run(run, scene.overtone, lambda k, m: messages.append(m)) == {'CANCELLED'}
    assert "object 'Plain' changed while Overtone was working: nothing written" in messages[0]
    assert _scene_state() == before


def test_worker_errors_come_back_as_one_message(mod, scene, tmp_path, monkeypatch):
    src, tgt = painted_pair(scene)
    plan = mod.operators.plan_from_context(bpy.context, "transfer")
    real = mod.runs.save_input

    def corrupt(folder, inputs):  # a job file whose settings the engine refuses
        real(folder, inputs)
        meta = json.loads((folder / "input.json").read_text())
        meta["settings"]["basis"] = "wavelets"
        (folder / "input.json").write_text(json.dumps(meta))

    monkeypatch.setattr(mod.runs, "save_input", corrupt)
    run = mod.runs.BackgroundRun(plan)
    assert run.worker.wait(timeout=60).state == "failed"
    messages = []
    assert mod.operators.step_run(run, scene.overtone, lambda k, m: messages.append(m)) == {'CANCELLED'}
    assert messages == ["Overtone: bad settings: unknown basis 'wavelets'; expected one of pointwise, "
                        "laplacian, orthoproducts, products"]
    with pytest.raises(ValueError, match="bad settings: expected the engine's Settings"):
        mod.job.run_job(mod.job.JobInput(**{**plan.inputs.__dict__, "settings": {"basis": "wavelets"}}))


def test_worker_gets_one_blas_thread_unless_the_user_chose(mod, scene, monkeypatch):
    for name in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS"):
        monkeypatch.delenv(name, raising=False)
    mod.worker.stop_shared_worker()  # the next run starts a process with this environment
    src, tgt = painted_pair(scene)
    run = mod.runs.BackgroundRun(mod.operators.plan_from_context(bpy.context, "transfer"))
    assert run.worker.wait(timeout=300).state == "done"
    # the live process's own environment (Linux /proc), not just what we meant to pass
    environ = open(f"/proc/{run.worker.process.pid}/environ", "rb").read().split(b"\0")
    assert b"OPENBLAS_NUM_THREADS=1" in environ and b"OMP_NUM_THREADS=1" in environ
    monkeypatch.setenv("OPENBLAS_NUM_THREADS", "3")
    env = mod.worker.child_environment()
    assert env["OPENBLAS_NUM_THREADS"] == "3" and env["MKL_NUM_THREADS"] == "1"


def test_jobs_in_this_process_get_one_blas_thread_unless_the_user_chose(mod, scene, monkeypatch):
    """The add-on's job function, run here (batch, scripts, background mode), follows
    the worker's rule; threadpoolctl (a reference library) reads the thread counts."""
    from threadpoolctl import threadpool_info, threadpool_limits

    def openblas_threads():
        return sorted((i["filepath"], i["num_threads"]) for i in threadpool_info()
                      if i["internal_api"] == "openblas")

    src, tgt = painted_pair(scene)
    plan = mod.operators.plan_from_context(bpy.context, "transfer")
    assert len(mod.threads.openblas_thread_controls()) == len(openblas_threads()) >= 1
    seen = []
    progress = engine_module("common.progress")
    monkeypatch.delenv("OPENBLAS_NUM_THREADS", raising=False)
    with threadpool_limits(limits=2, user_api="blas"):
        with progress.showing(lambda step: seen.append(openblas_threads()), progress.job_stages("transfer")):
            mod.job.run_job(plan.inputs)   # its stages: the thread counts during the job
            after = openblas_threads()
        monkeypatch.setenv("OPENBLAS_NUM_THREADS", "2")
        mod.job.forget_pairs()
        mark = len(seen)
        with progress.showing(lambda step: seen.append(openblas_threads()), progress.job_stages("transfer")):
            mod.job.run_job(plan.inputs)
    # during the first job one thread everywhere; the previous two restored after it;
    # the user's own setting left alone in the second
    first, second = seen[0], seen[mark]
    assert {n for _, n in first} == {1} and {n for _, n in after} == {2}
    assert {n for _, n in second} == {2}


# ----------------------------------------------------------------------------- cache


def test_cache_is_filled_pruned_and_cleared(mod, scene):
    prefs = bpy.context.preferences.addons[MODULE].preferences
    from pathlib import Path
    folder = Path(prefs.cache_folder)
    bpy.ops.overtone.clear_cache()
    painted_pair(scene)
    # matched by shape: both eigenbases and the map go to the cache (a match in place
    # with direct values needs no eigenbasis and stores the map only)
    scene.overtone.match_mode = "INTRINSIC"
    plan = mod.operators.plan_from_context(bpy.context, "transfer")
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    assert len(list(folder.glob("*.npz"))) >= 3  # two eigenbases and the map
    tight = mod.job.JobInput(**{**plan.inputs.__dict__, "cache_limit_bytes": 0})
    mod.job.forget_pairs()
    out = mod.job.run_job(tight)
    assert out.report["cache_pruned"] >= 3 and out.report["cache_bytes"] == 0
    assert out.report["cache_hits"]["correspondence"] == "disk"
    assert bpy.ops.overtone.clear_cache() == {'FINISHED'}
    assert not list(folder.glob("*.npz"))
