"""Re-runs, object transforms, modifiers and honest outcomes, in real bpy.

Each test here failed before the behaviour it names was put in: a second
Carry Detail stacked a second shape key at value 1 (the detail doubled); a
batch re-run dropped the groups Overtone wrote; empty target groups made a
carry fail with "nothing to carry"; a script's non-uniform object scale was
read with a stale matrix; a Mirror modifier the run did not see went
unmentioned; a total failure was reported as FINISHED.
"""

import importlib
import json

import bpy
import mathutils
import numpy as np
import pytest

from .conftest import MODULE, engine_module, make_mesh, select
from .test_bridge import snapshot
from .test_operators import engine_pair, painted_pair, read


@pytest.fixture
def mod(overtone):
    names = ("bridge", "job", "runs", "operators", "batch", "records")
    return type("M", (), {n: importlib.import_module(f"{MODULE}.{n}") for n in names})


def bumpy_pair(scene):
    """A bumpy source and a smooth target in the same place (the detail to carry)."""
    demo = engine_module("jobs.demo")
    s = demo.creature(30, 16, bumps=0.03)
    t = demo.creature(28, 18, bumps=0.0, twist_offset=True)
    src, tgt = make_mesh("Bumpy", s.vertices, s.faces), make_mesh("Smooth", t.vertices, t.faces)
    select(src, tgt)
    return src, tgt


def detail_strength(mod, tgt, expected):
    """How many times the carried detail shows on the evaluated target: the
    least-squares factor between shown offsets and the engine's own offsets."""
    base = mod.bridge.read_mesh(tgt).vertices
    shown = mod.bridge.read_mesh(tgt, evaluated=True).vertices   # shape keys mixed in
    wanted = expected - base
    return float(np.sum((shown - base) * wanted) / np.sum(wanted * wanted))


# ----------------------------------------------------------------------------- detail twice


@pytest.mark.every_blender
def test_carry_detail_twice_keeps_strength_one(mod, scene):
    src, tgt = bumpy_pair(scene)
    expected = engine_pair(mod, src, tgt).detail(strength=1.0, size=0.05)
    assert bpy.ops.overtone.transfer_detail() == {'FINISHED'}
    assert detail_strength(mod, tgt, expected) == pytest.approx(1.0, abs=1e-4)
    assert bpy.ops.overtone.transfer_detail() == {'FINISHED'}
    keys = tgt.data.shape_keys.key_blocks
    assert [k.name for k in keys] == ["Basis", "overtone_detail"]
    assert detail_strength(mod, tgt, expected) == pytest.approx(1.0, abs=1e-4)   # was 2.00
    # asked to keep the earlier one: a new key beside it, at value 0
    scene.overtone.keep_earlier = True
    assert bpy.ops.overtone.transfer_detail() == {'FINISHED'}
    assert [(k.name, k.value) for k in keys][1:] == [("overtone_detail", 1.0), ("overtone_detail_ot1", 0.0)]
    assert json.loads(scene.overtone.report_json)["notes"] == []       # asked for: nothing to explain
    assert detail_strength(mod, tgt, expected) == pytest.approx(1.0, abs=1e-4)


def test_carry_detail_twice_in_the_background_keeps_strength_one(mod, scene):
    # the click path: invoke hands the job to the worker, the timer's step writes it
    src, tgt = bumpy_pair(scene)
    expected = engine_pair(mod, src, tgt).detail(strength=1.0, size=0.05)
    for _ in range(2):
        run = mod.runs.BackgroundRun(mod.operators.plan_from_context(bpy.context, "detail"))
        assert run.worker.wait(timeout=300).state == "done"
        assert mod.operators.step_run(run, scene.overtone, lambda level, text: None) == {'FINISHED'}
    assert [k.name for k in tgt.data.shape_keys.key_blocks] == ["Basis", "overtone_detail"]
    assert detail_strength(mod, tgt, expected) == pytest.approx(1.0, abs=1e-4)


@pytest.mark.every_blender
def test_batch_detail_twice_keeps_strength_one(mod, scene, tmp_path):
    src, tgt = bumpy_pair(scene)
    expected = engine_pair(mod, src, tgt).detail(strength=1.0, size=0.05)
    path = tmp_path / "job.json"
    path.write_text(json.dumps({"pairs": [{"source": "Bumpy", "target": "Smooth", "signals": [],
                                           "detail": True}]}))
    assert mod.batch.main([str(path)]) == 0
    assert mod.batch.main([str(path)]) == 0
    assert [k.name for k in tgt.data.shape_keys.key_blocks] == ["Basis", "overtone_detail"]
    assert detail_strength(mod, tgt, expected) == pytest.approx(1.0, abs=1e-4)


# ----------------------------------------------------------------------------- re-runs and names


@pytest.mark.every_blender
def test_batch_rerun_refreshes_the_groups_it_wrote_as_the_ui_does(mod, scene, tmp_path):
    src, tgt = painted_pair(scene)
    scene.overtone.basis = "POINTWISE"
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}      # the UI run
    ui_names = sorted(s.name for s in mod.bridge.list_layers(tgt))
    path, report = tmp_path / "job.json", tmp_path / "report.json"
    path.write_text(json.dumps({"settings": {"basis": "pointwise"}, "report": str(report),
                                "pairs": [{"source": "Painted", "target": "Plain"}]}))
    assert mod.batch.main([str(path)]) == 0                           # the batch re-run
    result = json.loads(report.read_text())["pairs"][0]
    # "head" (written by the UI run) is carried again, not dropped nor taken as a landmark
    assert "head" in result["signals"] and result["result"]["written"]["head"] == "head"
    assert result["result"]["landmarks"]["groups"] == []
    # batch "all" follows the UI's default rule: the same layers, refreshed, nothing added
    assert sorted(s.name for s in mod.bridge.list_layers(tgt)) == ui_names
    expected = engine_pair(mod, src, tgt).carry({"head": (read(mod, src, "head"), "weight")})
    np.testing.assert_allclose(read(mod, tgt, "head"), expected["head"].values, atol=1e-6)


def _batch(mod, tmp_path, settings, signals="all"):
    path, report = tmp_path / "job.json", tmp_path / "report.json"
    path.write_text(json.dumps({"settings": settings, "report": str(report),
                                "pairs": [{"source": "Painted", "target": "Plain", "signals": signals}]}))
    code = mod.batch.main([str(path)])
    return code, json.loads(report.read_text())


def _layers(mod, obj):
    return sorted((s.name, s.domain, s.data_type) for s in mod.bridge.list_layers(obj))


@pytest.mark.every_blender
def test_ui_and_batch_alternating_with_replace_off_then_on(mod, scene, tmp_path):
    """An artist's evening on one pair: the target has its own "tint" (corner bytes,
    the active and render colour) and its own "head" weights. Runs alternate between
    the panel and the batch handler, first keeping the target's layers, then
    replacing them; no run adds a layer a previous one already wrote."""
    src, tgt = painted_pair(scene)
    mesh = tgt.data
    own = mesh.color_attributes.new("tint", 'BYTE_COLOR', 'CORNER')
    own.data.foreach_set("color", np.full(len(mesh.loops) * 4, 0.25, np.float32))
    mesh.color_attributes.new("paint", 'FLOAT_COLOR', 'POINT')
    mesh.color_attributes.active_color_name = "tint"
    mesh.color_attributes.render_color_index = mesh.color_attributes.find("paint")
    head = tgt.vertex_groups.new(name="head")
    head.add(list(range(40)), 1.0, 'REPLACE')          # the target's own, real weights
    scene.overtone.basis = "POINTWISE"
    runs = []
    for replace_on in (False, True):
        scene.overtone.replace_existing = replace_on
        for where in ("ui", "batch", "ui", "batch"):
            if where == "ui":
                assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
                report = json.loads(scene.overtone.report_json)
            else:
                code, batch_report = _batch(mod, tmp_path, {"basis": "pointwise",
                                                             "replace_existing": replace_on})
                assert code == 0, batch_report
                report = batch_report["pairs"][0]["result"]
            own_tint = np.empty(len(mesh.loops) * 4, np.float32)
            mesh.attributes["tint"].data.foreach_get("color", own_tint)
            runs.append((replace_on, where, _layers(mod, tgt), report, own_tint))
            # the target's colour choices are its own, whatever the run
            assert mesh.color_attributes.active_color_name == "tint"
            assert mesh.color_attributes.render_color_index == mesh.color_attributes.find("paint")
            assert mesh.attributes["tint"].domain == 'CORNER' and mesh.attributes["tint"].data_type == 'BYTE_COLOR'
    kept = [r for r in runs if not r[0]]
    replaced = [r for r in runs if r[0]]
    # keeping: the first run writes beside the target's layers; the re-runs refresh them
    assert all(r[2] == kept[0][2] for r in kept), [r[1] for r in kept]
    names = [n for n, _, _ in kept[0][2]]
    assert "tint_ot1" in names and "tint_ot2" not in names
    assert names.count("overtone_confidence") == 1 and "overtone_confidence_ot1" not in names
    assert all(r[3]["landmarks"]["groups"] == ["head"] for r in kept)    # the target's own weights pin
    # the target's own tint is untouched while Replace Existing is off
    assert all(np.allclose(r[4], 0.25, atol=1 / 255) for r in kept)
    # replacing: the same-named layers are overwritten in place (their domain and type
    # kept); "head" is now a result, not a landmark; nothing is added run after run
    assert all(r[2] == replaced[0][2] for r in replaced), [r[1] for r in replaced]
    assert all(r[3]["landmarks"]["groups"] == [] for r in replaced)
    assert all(r[3]["written"]["head"] == "head" and r[3]["written"]["tint"] == "tint" for r in replaced)
    assert set(replaced[0][2]) == set(kept[0][2])
    carried = read(mod, tgt, "tint_ot1")            # the carried colour, per vertex
    corners = np.array([loop.vertex_index for loop in mesh.loops])
    # replaced by the carried colour (8-bit sRGB per corner: within a step of 1/255 near 1)
    np.testing.assert_allclose(read(mod, tgt, "tint"), carried[corners], atol=0.02)
    expected = engine_pair(mod, src, tgt).carry({"head": (read(mod, src, "head"), "weight")})
    np.testing.assert_allclose(read(mod, tgt, "head"), expected["head"].values, atol=1e-6)


def test_a_second_source_refreshes_overtones_own_layers(mod, scene):
    # confidence and uncertain vertices are Overtone's own: one of each on the target, whichever
    # source wrote last, while the second source's colour goes beside the first one's
    src, tgt = painted_pair(scene)
    scene.overtone.write_anyway = True
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    other = src.copy()
    other.data = src.data.copy()
    other.name = "Painted Again"
    other.location = (0.0, 0.0, 5.0)     # elsewhere: a match by shape, with its own confidence
    scene.collection.objects.link(other)
    tgt.vertex_groups.new(name=mod.records.UNCERTAIN_NAME)  # an earlier mark, to be cleared or refreshed
    select(other, tgt)
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    report = json.loads(scene.overtone.report_json)
    names = [s.name for s in mod.bridge.list_layers(tgt)]
    assert names.count("overtone_confidence") == 1 and not [n for n in names if n.startswith("overtone_confidence_")]
    assert report["written"]["overtone_confidence"] == "overtone_confidence"
    assert not [n for n in names if n.startswith(mod.records.UNCERTAIN_NAME + "_")]
    assert report["written"]["tint"] == "tint_ot1" and "tint" in names   # the first source's kept
    confidence = read(mod, tgt, "overtone_confidence")[:, 1]   # stored (1, c, c, c)
    assert float(confidence.mean()) == pytest.approx(report["mean_confidence"], abs=1e-5)


def test_empty_target_groups_are_filled_not_landmarks(mod, scene):
    src, tgt = painted_pair(scene)
    mesh = src.data
    for name in ("tint", "tint_bytes", "dirt", "flow"):
        mesh.attributes.remove(mesh.attributes[name])
    tgt.vertex_groups.new(name="head")          # what parenting with empty groups leaves
    scene.overtone.basis = "POINTWISE"
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}    # was: "nothing to carry"
    report = json.loads(scene.overtone.report_json)
    assert report["written"]["head"] == "head" and report["landmarks"]["groups"] == []
    assert [g.name for g in tgt.vertex_groups] == ["head"]
    expected = engine_pair(mod, src, tgt).carry({"head": (read(mod, src, "head"), "weight")})
    np.testing.assert_allclose(read(mod, tgt, "head"), expected["head"].values, atol=1e-6)


def test_parenting_with_empty_groups_then_carry(mod, scene, tmp_path):
    """Ctrl+P > With Empty Groups: the target gets an empty group per bone and an
    Armature modifier; carrying then fills the groups the source has, in the panel
    and in batch alike, and leaves the other bones' groups empty."""
    src, tgt = painted_pair(scene)
    bpy.ops.object.select_all(action='DESELECT')
    bpy.ops.object.armature_add(location=(0.0, 0.0, 0.0))
    rig = bpy.context.active_object
    bpy.ops.object.mode_set(mode='EDIT')
    rig.data.edit_bones[0].name = "head"
    rig.data.edit_bones.new("jaw").tail = (0.0, 0.0, 0.5)
    bpy.ops.object.mode_set(mode='OBJECT')
    tgt.select_set(True)
    rig.select_set(True)
    bpy.context.view_layer.objects.active = rig
    assert bpy.ops.object.parent_set(type='ARMATURE_NAME') == {'FINISHED'}
    assert sorted(g.name for g in tgt.vertex_groups) == ["head", "jaw"]
    assert mod.bridge.read_vertex_groups(tgt, ["head"])["head"].max() == 0.0
    bpy.ops.object.select_all(action='DESELECT')
    select(src, tgt)
    scene.overtone.basis = "POINTWISE"
    expected = engine_pair(mod, src, tgt).carry({"head": (read(mod, src, "head"), "weight")})["head"].values
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    report = json.loads(scene.overtone.report_json)
    assert report["written"]["head"] == "head" and report["landmarks"]["groups"] == []
    np.testing.assert_allclose(read(mod, tgt, "head"), expected, atol=1e-6)
    assert mod.bridge.read_vertex_groups(tgt, ["jaw"])["jaw"].max() == 0.0
    code, batch_report = _batch(mod, tmp_path, {"basis": "pointwise"})
    assert code == 0, batch_report
    result = batch_report["pairs"][0]["result"]
    assert result["written"]["head"] == "head" and result["landmarks"]["groups"] == []
    assert sorted(g.name for g in tgt.vertex_groups) == ["head", "jaw"]
    np.testing.assert_allclose(read(mod, tgt, "head"), expected, atol=1e-6)


def test_long_result_names_are_reported(mod, scene):
    src, tgt = painted_pair(scene)
    long = "a" * 64
    src.data.attributes["dirt"].name = long
    scene.overtone.basis = "LAPLACIAN"
    scene.overtone.eigenfunctions = 30
    bpy.ops.overtone.refresh_signals()
    for item in scene.overtone.signals:
        item.use = item.name == long
    assert bpy.ops.overtone.preview_carry() == {'FINISHED'}
    report = json.loads(scene.overtone.report_json)
    written = report["written"][long + "_carried"]
    assert written == "a" * 63 + "_ot1" and written in src.data.attributes
    assert any("longer than the 67 bytes Blender keeps" in n and written in n for n in report["notes"])


def test_a_seventy_byte_name_in_the_panel_and_in_batch(mod, scene, tmp_path, capsys):
    """Typed at 70 bytes, an attribute name keeps what Blender keeps (66 bytes here):
    it is carried under that very name (Replace Existing overwrites the target's
    layer of that name; re-runs refresh it); a batch job naming the 70 bytes is
    refused with the name."""
    src, tgt = painted_pair(scene)
    typed = "é" * 35                                        # 70 bytes
    src.data.attributes["tint"].name = typed
    name = src.data.color_attributes[0].name
    assert len(name.encode()) == 66 and typed.startswith(name)   # cut by Blender on a character
    scene.overtone.basis = "POINTWISE"
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    report = json.loads(scene.overtone.report_json)
    assert report["written"][name] == name and report["notes"] == []   # was: cut to 63 bytes + "_ot1"
    # the target's own layer of that name, then Replace Existing: overwritten in place
    tgt.data.attributes.remove(tgt.data.attributes[name])
    del tgt[mod.records.WRITTEN_PROPERTY]
    tgt.data.color_attributes.new(name, 'FLOAT_COLOR', 'POINT')
    scene.overtone.replace_existing = True
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    report = json.loads(scene.overtone.report_json)
    assert report["written"][name] == name and report["notes"] == []
    np.testing.assert_allclose(read(mod, tgt, name), engine_pair(mod, src, tgt).carry(
        {"t": (read(mod, src, name), "color")})["t"].values, atol=1e-6)
    # re-runs without Replace Existing refresh the layer written above, in the panel and in batch
    scene.overtone.replace_existing = False
    layers = [_layers(mod, tgt)]
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    assert json.loads(scene.overtone.report_json)["written"][name] == name
    layers.append(_layers(mod, tgt))
    code, result = _batch(mod, tmp_path, {"basis": "pointwise"})
    assert code == 0 and result["pairs"][0]["result"]["written"][name] == name
    layers.append(_layers(mod, tgt))
    assert layers[0] == layers[1] == layers[2]
    path = tmp_path / "named.json"
    path.write_text(json.dumps({"pairs": [{"source": "Painted", "target": "Plain", "signals": [typed]}]}))
    capsys.readouterr()
    assert mod.batch.main([str(path)]) == 2
    assert f"source 'Painted' has no attribute or vertex group {typed!r}" in capsys.readouterr().err


# ----------------------------------------------------------------------------- transforms and modifiers


def _scaled_copy(name, vertices, faces, scale, location):
    """An object whose world shape is ``vertices``: mesh data divided by the
    scale, object scale and location set the way a script does (no update)."""
    local = (np.asarray(vertices) - location) / np.asarray(scale)
    obj = make_mesh(name, local, faces)
    obj.scale = scale
    obj.location = location
    return obj


def test_non_uniform_scale_gives_what_the_applied_shape_gives(mod, scene):
    demo = engine_module("jobs.demo")
    src, _ = painted_pair(scene)
    t = demo.creature(26, 18, twist_offset=True, shuffle_seed=3)
    world = np.asarray(t.vertices) * np.array([1.0, 1.6, 0.8]) + np.array([4.0, 1.0, 0.0])
    scaled = _scaled_copy("Scaled", world, t.faces, (1.0, 1.6, 0.8), (4.0, 1.0, 0.0))
    applied = make_mesh("Applied", world, t.faces)
    scene.overtone.basis = "POINTWISE"
    bpy.ops.object.select_all(action='DESELECT')
    results = {}
    for tgt in (scaled, applied):
        select(src, tgt)
        assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
        results[tgt.name] = read(mod, tgt, "tint")
        tgt.select_set(False)
    np.testing.assert_allclose(results["Scaled"], results["Applied"], atol=1e-5)
    expected = engine_pair(mod, src, applied).carry({"tint": (read(mod, src, "tint"), "color")})
    np.testing.assert_allclose(results["Applied"], expected["tint"].values, atol=1e-6)
    # a script (or the batch handler) that places an object and carries at once, with no
    # operator call between to bring matrix_world up to date (docs/platform.md)
    late = _scaled_copy("Late", world, t.faces, (1.0, 1.6, 0.8), (4.0, 1.0, 0.0))
    request = mod.runs.PairRequest(signals=("tint",), settings=mod.runs.engine_settings({"basis": "POINTWISE"}))
    mod.runs.transfer_pair(src, late, request)
    np.testing.assert_allclose(read(mod, late, "tint"), results["Applied"], atol=1e-5)


def test_detail_on_rotated_non_uniformly_scaled_objects(mod, scene):
    """Shape keys hold object-local positions: the detail's world offsets go back
    through the inverse of the whole object matrix (rotation and non-uniform scale),
    and a script's placement right before the run is seen (no stale matrix)."""
    demo = engine_module("jobs.demo")
    s = demo.creature(30, 16, bumps=0.03)
    t = demo.creature(28, 18, bumps=0.0, twist_offset=True)
    placements = {"source": ((0.2, 0.0, -0.5), (1.3, 0.7, 1.1), (-3.0, 1.0, 2.0)),
                  "target": ((0.3, 0.0, 0.7), (1.0, 1.6, 0.8), (5.0, -3.0, 1.0))}
    objects = {}
    for role, mesh in (("source", s), ("target", t)):
        euler, scale, location = placements[role]
        matrix = np.array(mathutils.Matrix.LocRotScale(location, mathutils.Euler(euler), scale))
        # mesh data such that the world shape is the creature where it was made:
        # both meshes overlap in the world (aligned), whatever their own matrices
        local = (np.asarray(mesh.vertices) - matrix[:3, 3]) @ np.linalg.inv(matrix[:3, :3]).T
        objects[role] = obj = make_mesh(role.title(), local, mesh.faces)
        obj.rotation_euler, obj.scale, obj.location = euler, scale, location   # as a script does
    src, tgt = objects["source"], objects["target"]
    # the bumps alias to waves about 3 rings long on 30 x 16 vertices: a band of 0.3 holds them
    request = mod.runs.PairRequest(detail=True, settings=mod.runs.engine_settings({"basis": "POINTWISE",
                                                                                  "detail_size": 0.3}))
    mod.runs.transfer_pair(src, tgt, request)
    world = mod.bridge.read_mesh(tgt).vertices
    np.testing.assert_allclose(world, t.vertices, atol=2e-5)   # the placement was read
    shown = mod.bridge.read_mesh(tgt, evaluated=True).vertices
    # the engine on the world arrays the bridge reads (the meshes' own data through
    # their matrices)
    expected = engine_pair(mod, src, tgt).detail(strength=1.0, size=0.3)
    offsets = expected - world
    assert np.abs(offsets).max() > 1e-3        # there is detail to carry
    np.testing.assert_allclose(shown - world, offsets, atol=1e-3 * np.abs(offsets).max())
    # divided by the scale alone (rotation ignored) the offsets would point elsewhere
    key = tgt.data.shape_keys.key_blocks["overtone_detail"]
    co = np.empty(len(key.data) * 3, np.float32)
    key.data.foreach_get("co", co)
    local_offsets = co.reshape(-1, 3) - np.array([v.co for v in tgt.data.vertices])
    wrong = offsets / np.array(placements["target"][1])
    assert np.abs(local_offsets - wrong).max() > 0.1 * np.abs(offsets).max()


def test_ignore_placement_matches_copies_of_one_asset(mod, scene):
    src, _ = painted_pair(scene)
    a = mod.bridge.read_mesh(src)
    faces = a.corners.reshape(-1, 3)
    copy = make_mesh("Copy", a.vertices, faces)
    copy.matrix_world = (mathutils.Matrix.Translation((5.0, -2.0, 1.0)) @ mathutils.Matrix.Rotation(1.1, 4, 'Z')
                         @ mathutils.Matrix.Diagonal((1.0, 1.6, 0.8, 1.0)))
    select(src, copy)
    scene.overtone.basis = "POINTWISE"
    scene.overtone.local_space = True
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    # the same mesh data: every vertex is its own partner, so every value arrives as it was
    np.testing.assert_allclose(read(mod, copy, "tint"), read(mod, src, "tint"), atol=1e-6)
    np.testing.assert_allclose(read(mod, copy, "head"), read(mod, src, "head"), atol=1e-6)
    # detail in local space: the shape key holds the engine's positions in the object's own space
    assert bpy.ops.overtone.transfer_detail() == {'FINISHED'}
    key = copy.data.shape_keys.key_blocks["overtone_detail"]
    co = np.empty(len(key.data) * 3, np.float32)
    key.data.foreach_get("co", co)
    pipeline, shape = engine_module("jobs.pair"), engine_module("spectra.shape").Shape
    b = mod.bridge.read_mesh(copy, local=True)
    pair = pipeline.Pair(shape(a.vertices, corners=a.corners, sizes=a.sizes),
                         shape(b.vertices, corners=b.corners, sizes=b.sizes),
                         pipeline.Settings(basis="pointwise", k=60, order=2))
    np.testing.assert_allclose(co.reshape(-1, 3), pair.detail(strength=1.0, size=0.05), atol=2e-5)


def test_a_copy_placed_apart_and_matched_by_shape_is_warned_about(mod, scene):
    """A copy of a nearly symmetric asset (a re-meshed capped cylinder: the same from
    either end) placed elsewhere: matched by shape the map can come back upside down
    although it is sure of itself, so the artist is told to match the copy in place."""
    bpy.ops.mesh.primitive_cylinder_add(vertices=16, radius=0.5, depth=3.0)
    tgt = bpy.context.active_object
    tgt.name = "Post Copy"
    bpy.ops.object.mode_set(mode='EDIT')
    bpy.ops.mesh.subdivide(number_cuts=6)
    bpy.ops.object.mode_set(mode='OBJECT')
    # the source: the same polygons cut into triangles by the engine's own triangulation, the
    # copy's below by Blender: two triangulations of one shape, as after a remesh (the add-on
    # takes Blender's triangles, so the source is made of triangles)
    points = np.array([v.co for v in tgt.data.vertices], dtype=np.float64)
    corners = np.array([lp.vertex_index for lp in tgt.data.loops], dtype=np.int64)
    sizes = np.array([p.loop_total for p in tgt.data.polygons], dtype=np.int64)
    src = make_mesh("Post", points, engine_module("intake.triangulation").triangulate(points, corners, sizes)[0])
    height = points[:, 2] / 3.0 + 0.5                                         # 0 at the bottom, 1 at the top
    rgba = np.column_stack([height, height, height, np.ones_like(height)]).astype(np.float32)
    src.data.color_attributes.new("height", 'FLOAT_COLOR', 'POINT').data.foreach_set("color", rgba.ravel())
    select(tgt, tgt)
    bpy.ops.object.mode_set(mode='EDIT')
    bpy.ops.mesh.quads_convert_to_tris()                                     # another triangulation
    bpy.ops.object.mode_set(mode='OBJECT')
    tgt.location = (3.0, 0.0, 0.0)
    select(src, tgt)
    # matched by shape the two ends are interchangeable: the confidence sees the doubt
    # (most vertices uncertain), so nothing is written and the error says what to do
    with pytest.raises(RuntimeError, match="'Post Copy' looks like a copy of 'Post' placed elsewhere") as error:
        bpy.ops.overtone.transfer_attributes()
    assert "no reliable match" in str(error.value) and "Ignore Placement" in str(error.value)
    assert "height" not in tgt.data.color_attributes
    # matched in place, as the error says: each vertex gets its own height back
    scene.overtone.local_space = True
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    report = json.loads(scene.overtone.report_json)
    assert report["mode"] == "aligned" and not [w for w in report["warnings"] if "Ignore Placement" in w]
    truth = np.array([v.co.z for v in tgt.data.vertices]) / 3.0 + 0.5
    np.testing.assert_allclose(read(mod, tgt, "height")[:, 0], truth, atol=1e-5)


def test_a_re_posed_character_elsewhere_is_not_called_a_copy(mod, scene):
    demo = engine_module("jobs.demo")
    s, t = demo.creature(30, 16), demo.creature(26, 18, curl=1.4, twist_offset=True)
    src, tgt = make_mesh("Straight", s.vertices, s.faces), make_mesh("Bent", t.vertices, t.faces)
    src.data.color_attributes.new("tint", 'FLOAT_COLOR', 'POINT')
    tgt.location = (0.0, 4.0, 0.0)
    select(src, tgt)
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    report = json.loads(scene.overtone.report_json)
    assert report["mode"] == "intrinsic"
    assert not [w for w in report["warnings"] if "Ignore Placement" in w]
    # the rule itself: boxes within 2% of the diagonal, in object space
    box = np.array([[0.0, 0.0, 0.0], [1.0, 2.0, 3.0]])
    assert mod.runs.is_placed_copy(box, box * 1.005) and not mod.runs.is_placed_copy(box, box * 1.05)


def test_modifiers_the_run_does_not_see_are_warned_about(mod, scene, capsys):
    src, tgt = painted_pair(scene)
    src.modifiers.new("mirror", 'MIRROR')
    scene.overtone.basis = "POINTWISE"
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    warnings = json.loads(scene.overtone.report_json)["warnings"]
    # the warning names the checkbox as the panel shows it
    label = scene.overtone.bl_rna.properties["as_shown"].name
    assert any("source 'Painted'" in w and "(mirror)" in w and f"tick {label}" in w for w in warnings)
    assert "Warning: Overtone:" in capsys.readouterr().out
    # asked for what is shown: nothing to warn about (a modifier that keeps the creature
    # a creature: the mirrored one, a creature and its reflection, is another shape)
    src.modifiers.remove(src.modifiers["mirror"])
    smooth = src.modifiers.new("smooth", 'SMOOTH')
    smooth.factor, smooth.iterations = 0.2, 1
    scene.overtone.as_shown = True
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    assert json.loads(scene.overtone.report_json)["warnings"] == []
    # the target's own modifiers (a Subdivision on most characters) are mentioned, not warned
    # about: the results go on its mesh, under them, as they should
    capsys.readouterr()
    tgt.modifiers.new("smooth", 'SUBSURF')
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    report = json.loads(scene.overtone.report_json)
    assert report["warnings"] == []
    assert any("target 'Plain'" in n and "(smooth)" in n for n in report["notes"])
    out = capsys.readouterr().out
    assert "Info: Overtone:" in out and "Warning: Overtone:" not in out and "(smooth)" in out


# ----------------------------------------------------------------------------- honest outcomes


def test_outcome_levels_follow_the_thresholds(mod):
    runs = mod.runs
    assert runs.outcome(np.full(100, 0.99)).level == "ok"
    share = np.r_[np.full(97, 0.99), np.full(3, 0.1)]                 # 3 % uncertain
    judged = runs.outcome(share)
    assert judged.level == "warning" and judged.uncertain.sum() == 3 and "3.0%" in judged.text
    assert runs.outcome(np.r_[np.full(49, 0.99), np.full(51, 0.4)]).level == "failure"
    assert runs.outcome(np.r_[np.full(98, 0.99), np.full(2, 0.1)]).level == "ok"   # 2 %: not over


@pytest.mark.every_blender
def test_a_failed_match_is_an_error_and_leaves_the_target(mod, scene):
    src, tgt = painted_pair(scene)
    tgt.location = (50.0, 0.0, 0.0)          # far away, yet matched as if overlapping
    scene.overtone.match_mode = "ALIGNED"
    scene.overtone.basis = "POINTWISE"
    before = snapshot(tgt)
    with pytest.raises(RuntimeError, match=r"no reliable match: mean confidence 0\.\d+, \d+\.\d% of the "
                                           r"target's vertices uncertain.*left as it was"):
        bpy.ops.overtone.transfer_attributes()
    assert snapshot(tgt) == before and tgt.get("overtone_written") is None
    scene.overtone.write_anyway = True       # the artist insists
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    report = json.loads(scene.overtone.report_json)
    assert report["outcome"] == "failure" and report["uncertain_vertices"] > 0.5 * len(tgt.data.vertices)
    conf = read(mod, tgt, "overtone_confidence")[:, 1]
    marked = mod.bridge.read_vertex_groups(tgt, ["overtone_uncertain"])["overtone_uncertain"]
    np.testing.assert_array_equal(marked > 0, conf < 0.5)
    # the artist, in Edit Mode with faces selected in face select mode, selects them
    bpy.ops.object.select_all(action='DESELECT')
    tgt.select_set(True)
    bpy.context.view_layer.objects.active = tgt
    bpy.ops.object.mode_set(mode='EDIT')
    bpy.ops.mesh.select_mode(type='FACE')
    bpy.ops.mesh.select_all(action='SELECT')
    assert bpy.ops.overtone.select_uncertain() == {'FINISHED'}
    assert tgt.mode == 'EDIT' and tuple(bpy.context.tool_settings.mesh_select_mode) == (True, False, False)
    bpy.ops.object.mode_set(mode='OBJECT')
    selected = np.array([v.select for v in tgt.data.vertices])
    np.testing.assert_array_equal(selected, marked > 0)


def tear_one_end(mod, tgt):
    """Move the target's last tenth (along x) 3 units up: that end matches nothing."""
    positions = mod.bridge.read_mesh(tgt).vertices
    far_end = positions[:, 0] > np.quantile(positions[:, 0], 0.9)
    positions[far_end, 2] += 3.0
    tgt.data.attributes["position"].data.foreach_set("vector", positions.astype(np.float32).ravel())
    tgt.data.update()
    return far_end


def test_the_background_run_warns_too(mod, scene):
    src, tgt = painted_pair(scene)
    tear_one_end(mod, tgt)
    scene.overtone.match_mode = "ALIGNED"
    scene.overtone.basis = "POINTWISE"
    run = mod.runs.BackgroundRun(mod.operators.plan_from_context(bpy.context, "transfer"))
    assert run.worker.wait(timeout=300).state == "done"
    reports = []
    assert mod.operators.step_run(run, scene.overtone, lambda level, text: reports.append((level, text))) \
        == {'FINISHED'}
    assert reports[0][0] == {'WARNING'} and "uncertain match: mean confidence" in reports[0][1]


@pytest.mark.every_blender
def test_an_uncertain_match_warns_marks_and_selects(mod, scene, capsys):
    src, tgt = painted_pair(scene)
    far_end = tear_one_end(mod, tgt)
    scene.overtone.match_mode = "ALIGNED"
    scene.overtone.basis = "POINTWISE"
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    report = json.loads(scene.overtone.report_json)
    assert report["outcome"] == "warning"
    out = capsys.readouterr().out
    assert "Warning: Overtone:" in out and "uncertain match: mean confidence" in out
    conf = read(mod, tgt, "overtone_confidence")[:, 1]
    marked = mod.bridge.read_vertex_groups(tgt, ["overtone_uncertain"])["overtone_uncertain"] > 0
    np.testing.assert_array_equal(marked, conf < 0.5)
    assert 0.02 < marked.mean() < 0.5 and marked[far_end].mean() > 0.5
    # the artist selects them (a mesh never carried onto says so)
    bpy.context.view_layer.objects.active = src
    with pytest.raises(RuntimeError, match="'Painted' has no 'overtone_uncertain' group"):
        bpy.ops.overtone.select_uncertain()
    bpy.context.view_layer.objects.active = tgt
    assert bpy.ops.overtone.select_uncertain() == {'FINISHED'}
    assert tgt.mode == 'EDIT'
    bpy.ops.object.mode_set(mode='OBJECT')
    selected = np.array([v.select for v in tgt.data.vertices])
    np.testing.assert_array_equal(selected, marked)
    # a later good run clears the marks it no longer needs
    tgt.data.attributes["position"].data.foreach_set("vector", engine_module("jobs.demo").creature(
        26, 18, twist_offset=True, shuffle_seed=3).vertices.astype(np.float32).ravel())
    tgt.data.update()
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    cleared = mod.bridge.read_vertex_groups(tgt, ["overtone_uncertain"])["overtone_uncertain"]
    assert json.loads(scene.overtone.report_json)["outcome"] == "ok" and not cleared.any()


def test_handles_count_the_holes_through_a_surface(mod, scene):
    # genus per piece from Euler's formula V - E + F = 2 - 2g - b (common practice),
    # on Blender's own primitives: a sphere 0, a ring 1, a cylinder (open tube) 0,
    # two rings in one mesh 2; a vertex on three faces' edge: none. The engine's
    # prepared mesh of what the bridge reads counts them (what a run reports).
    prepare_mesh = engine_module("intake.preparation").prepare_mesh

    def handles(m):
        return prepare_mesh(m.vertices, corners=m.corners, sizes=m.sizes).handles

    count = {}
    for name, add in (("sphere", bpy.ops.mesh.primitive_uv_sphere_add), ("ring", bpy.ops.mesh.primitive_torus_add),
                      ("tube", lambda: bpy.ops.mesh.primitive_cylinder_add(end_fill_type='NOTHING'))):
        add()
        count[name] = handles(mod.bridge.read_mesh(bpy.context.active_object))
    ring = mod.bridge.read_mesh(bpy.context.scene.objects["Torus"])
    two = type(ring)(np.vstack([ring.vertices, ring.vertices + 5.0]),
                     np.r_[ring.corners, ring.corners + len(ring.vertices)], np.r_[ring.sizes, ring.sizes])
    fin = type(ring)(np.vstack([ring.vertices, [[9.0, 9.0, 9.0]]]),
                     np.r_[ring.corners, ring.corners[:2], len(ring.vertices)], np.r_[ring.sizes, 3])
    assert count == {"sphere": 0, "ring": 1, "tube": 0}
    assert handles(two) == 2 and handles(fin) is None


def test_a_sphere_matched_to_a_ring_is_not_called_sure(mod, scene):
    """Matched by shape, a sphere and a ring get a consistent round trip (a high
    confidence), yet no map between them is right everywhere: the run warns."""
    bpy.ops.mesh.primitive_uv_sphere_add(segments=32, ring_count=16)
    src = bpy.context.active_object
    bpy.ops.mesh.primitive_torus_add()
    tgt = bpy.context.active_object
    colour = src.data.color_attributes.new("tint", 'FLOAT_COLOR', 'POINT')
    colour.data.foreach_set("color", np.full(len(src.data.vertices) * 4, 0.5, np.float32))
    bpy.ops.object.select_all(action='DESELECT')
    select(src, tgt)
    # the confidence sees it (nearly every vertex uncertain): refused, target untouched
    with pytest.raises(RuntimeError, match="no reliable match") as error:
        bpy.ops.overtone.transfer_attributes()
    assert "the source has 0 and the target 1 handles" in str(error.value)
    assert "tint" not in tgt.data.color_attributes
    # written when the artist insists, with both reasons to doubt it
    scene.overtone.write_anyway = True
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    report = json.loads(scene.overtone.report_json)
    assert report["mode"] == "intrinsic" and report["handles"] == {"source": 0, "target": 1}
    assert any("the source has 0 and the target 1 handles" in w for w in report["warnings"])
    level, text = mod.runs.message_of(report)
    assert level == {'WARNING'} and "cannot correspond everywhere" in text and "written anyway" in text


def test_batch_refuses_a_failed_match_unless_told(mod, scene, tmp_path):
    src, tgt = painted_pair(scene)
    tgt.location = (50.0, 0.0, 0.0)
    before = snapshot(tgt)
    path, report = tmp_path / "job.json", tmp_path / "report.json"
    job = {"settings": {"match_mode": "aligned", "basis": "pointwise"}, "report": str(report),
           "pairs": [{"source": "Painted", "target": "Plain", "signals": ["tint"]}]}
    path.write_text(json.dumps(job))
    assert mod.batch.main([str(path)]) == 1
    entry = json.loads(report.read_text())["pairs"][0]
    assert entry["status"] == "failed" and entry["error"].startswith("no reliable match: mean confidence")
    assert snapshot(tgt) == before
    job["settings"]["write_anyway"] = True
    path.write_text(json.dumps(job))
    assert mod.batch.main([str(path)]) == 0
    entry = json.loads(report.read_text())["pairs"][0]
    assert entry["result"]["outcome"] == "failure" and "overtone_uncertain" in tgt.vertex_groups
