"""Rig weights, UV maps and face attributes through the operators, in real bpy.

Ground truth is analytic, never the add-on's own output:
- the rig lives on the demo creature's body coordinate ``u`` (engine/jobs/demo.py
  knows it for every vertex of any copy): 11 bones along the body, linear-blend
  weights with the 4 largest kept, summing to 1 (common practice for game
  engines);
- Blender's UV sphere is mapped equirectangularly: u = longitude / 2 pi + 1/2,
  v = latitude / pi + 1/2 with the seam on the -x side (checked on the source
  below before it is used), so the true UV of any point of the sphere is known;
- the material index is a region of space, so a face's true index is the one
  of the region its centre lies in.
"""

import importlib
import json

import bpy
import mathutils
import numpy as np
import pytest

from ..pairs import rig
from .conftest import MODULE, engine_module, make_mesh, select
from .test_operators import read

BONES = 11


@pytest.fixture
def mod(overtone):
    names = ("bridge", "runs")
    return type("M", (), {n: importlib.import_module(f"{MODULE}.{n}") for n in names})


def rigged_pair():
    """A straight creature with an 11-bone rig; a remeshed copy bent 1.4 rad (a bent limb), elsewhere."""
    demo = engine_module("jobs.demo")
    s = demo.creature(40, 20)
    t = demo.creature(34, 18, curl=1.4, twist_offset=True, shuffle_seed=2)
    src, tgt = make_mesh("Rigged", s.vertices, s.faces), make_mesh("Bent", t.vertices, t.faces)
    tgt.location = (0.0, 3.0, 0.0)
    weights = rig(s.uv)
    for b in range(BONES):
        group = src.vertex_groups.new(name=f"bone{b:02d}")
        for i in np.flatnonzero(weights[:, b] > 0):
            group.add([int(i)], float(weights[i, b]), 'REPLACE')
    select(src, tgt)
    return src, tgt, weights, rig(t.uv)


def target_weights(mod, obj):
    groups = mod.bridge.read_vertex_groups(obj, [f"bone{b:02d}" for b in range(BONES)])
    return np.column_stack([groups[f"bone{b:02d}"] for b in range(BONES)]).astype(np.float64)


@pytest.mark.every_blender
@pytest.mark.parametrize("basis", ["POINTWISE", "LAPLACIAN"])
def test_rig_weights_keep_their_sums_and_four_influences(mod, scene, basis):
    src, tgt, ws, truth = rigged_pair()
    # the rig as Blender stores it (float32 weights): sums 1, at most 4 groups
    stored = target_weights(mod, src)
    np.testing.assert_allclose(stored.sum(axis=1), 1.0, atol=1e-6)
    settings = scene.overtone
    settings.basis = basis
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    got = target_weights(mod, tgt)
    assert got.min() >= 0.0 and got.max() <= 1.0
    np.testing.assert_allclose(got.sum(axis=1), 1.0, atol=1e-4)
    assert np.count_nonzero(got, axis=1).max() <= 4
    # close to the true rig on the bent copy (engine figures on this pair:
    # 0.0028-0.0029 mean, under 0.045 max; docs/measurements.md)
    assert np.abs(got - truth).mean() < 0.005
    assert np.abs(got - truth).max() < 0.08


def test_rig_options_from_the_scene(mod, scene):
    src, tgt, _, _ = rigged_pair()
    settings = scene.overtone
    settings.basis = "ORTHOPRODUCTS"
    settings.max_influences = 2
    settings.weight_threshold = 0.05
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    got = target_weights(mod, tgt)
    counts = np.count_nonzero(got, axis=1)
    assert counts.max() == 2 and counts.min() >= 1
    assert got[got > 0].min() >= 0.05 - 1e-7  # float32 storage
    np.testing.assert_allclose(got.sum(axis=1), 1.0, atol=1e-4)


# ----------------------------------------------------------------------------- UV maps and faces


def _uv_truth(local):
    """Blender's UV sphere map of object-local points on the unit sphere."""
    p = local / np.linalg.norm(local, axis=1, keepdims=True)
    u = (np.arctan2(p[:, 1], p[:, 0]) / (2 * np.pi) + 0.5) % 1.0
    v = np.arcsin(np.clip(p[:, 2], -1, 1)) / np.pi + 0.5
    return np.column_stack([u, v])


def _region(local):
    """Material index of object-local points: three latitude bands, two halves."""
    return (np.digitize(local[:, 2], [-0.35, 0.4]) + 3 * (local[:, 0] > 0.2)).astype(np.int64)


def _corner_points(obj):
    mesh = obj.data
    co = np.empty(len(mesh.vertices) * 3, np.float32)
    mesh.vertices.foreach_get("co", co)
    cv = np.empty(len(mesh.loops), np.int32)
    mesh.loops.foreach_get("vertex_index", cv)
    sizes = np.empty(len(mesh.polygons), np.int32)
    mesh.polygons.foreach_get("loop_total", sizes)
    return co.reshape(-1, 3).astype(np.float64)[cv], sizes


def _face_centres(points, sizes):
    face = np.repeat(np.arange(len(sizes)), sizes)
    centres = np.zeros((len(sizes), 3))
    np.add.at(centres, face, points)
    return centres / sizes[:, None]


def textured_pair(scene):
    """A UV sphere with materials, and an icosphere (another topology, its own UV map) whose object
    transform puts it on the same place, turned about its own centre."""
    bpy.ops.mesh.primitive_uv_sphere_add(segments=32, ring_count=16)
    src = bpy.context.active_object
    src.name = "Textured"
    points, sizes = _corner_points(src)
    src.data.polygons.foreach_set("material_index", _region(_face_centres(points, sizes)).astype(np.int32))
    for _ in range(6):
        src.data.materials.append(None)
    bpy.ops.mesh.primitive_ico_sphere_add(subdivisions=4)
    tgt = bpy.context.active_object
    tgt.name = "Remeshed"
    place = mathutils.Matrix.LocRotScale((1.0, 2.0, 0.5), mathutils.Euler((0.0, 0.0, 0.5)), (1.5, 1.5, 1.5))
    src.matrix_world = place
    tgt.matrix_world = place @ mathutils.Euler((0.3, 0.2, 1.1)).to_matrix().to_4x4()
    bpy.context.view_layer.update()
    select(src, tgt)
    return src, tgt


def _tick(scene, names):
    assert bpy.ops.overtone.refresh_signals() == {'FINISHED'}
    for item in scene.overtone.signals:
        item.use = item.name in names


def _in_source_frame(src, tgt):
    """The target's corners in the source's object-local frame, and its face sizes."""
    points, sizes = _corner_points(tgt)
    world = np.array(tgt.matrix_world)
    to_source = np.linalg.inv(np.array(src.matrix_world)) @ world
    return points @ to_source[:3, :3].T + to_source[:3, 3], sizes


@pytest.mark.every_blender
def test_uv_map_and_material_index_arrive_on_a_remeshed_copy(mod, scene):
    src, tgt = textured_pair(scene)
    points, _ = _corner_points(src)
    stored = mod.bridge.read_signal(src, mod.bridge.Layer("UVMap", "CORNER", "FLOAT2")).values
    # the truth model holds on the source (poles excepted: no longitude there)
    inside = np.abs(points[:, 2]) < 0.999
    du = np.abs((stored[:, 0] - _uv_truth(points)[:, 0] + 0.5) % 1.0 - 0.5)
    assert du[inside].max() < 1e-5 and np.abs(stored[:, 1] - _uv_truth(points)[:, 1]).max() < 1e-5
    _tick(scene, {"UVMap", "material_index"})
    scene.overtone.replace_existing = True
    active_before = tgt.data.uv_layers.active.name
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    # the target's own UV map was replaced and keeps its role
    assert [uv.name for uv in tgt.data.uv_layers] == ["UVMap"] and tgt.data.uv_layers.active.name == active_before
    uv = mod.bridge.read_signal(tgt, mod.bridge.Layer("UVMap", "CORNER", "FLOAT2")).values.astype(np.float64)
    local, sizes = _in_source_frame(src, tgt)
    truth = _uv_truth(local)
    # each face is laid out on one side of the seam: unwrap the truth to the face's side
    centre_u = np.repeat(uv[:, 0].reshape(-1, 3).mean(axis=1), 3)
    truth_u = truth[:, 0] + np.round(centre_u - truth[:, 0])
    away = np.repeat(np.abs(_face_centres(local, sizes)[:, 2]) < 0.9, 3)
    # chords of a 32 x 16 sphere against arcs: a few thousandths
    assert np.abs(uv[:, 0] - truth_u)[away].max() < 0.01
    assert np.abs(uv[:, 1] - truth[:, 1])[away].max() < 0.01
    crossing = np.ptp(truth[:, 0].reshape(-1, 3), axis=1) > 0.5
    assert (crossing & away[::3]).sum() >= 5           # faces across the source's seam exist
    assert np.ptp(uv[:, 0].reshape(-1, 3), axis=1)[away[::3]].max() < 0.1  # and none is torn
    # material index: never blended; wrong only near a region border
    got = np.empty(len(tgt.data.polygons), np.int32)
    tgt.data.polygons.foreach_get("material_index", got)
    centres = _face_centres(local, sizes)
    wrong = got != _region(centres)
    near = (np.min(np.abs(centres[:, 2:3] - [-0.35, 0.4]), axis=1) < 0.15) | (np.abs(centres[:, 0] - 0.2) < 0.15)
    assert not (wrong & ~near).any()
    assert wrong.mean() < 0.06
    # the target has no material slots for those indices: the report says so
    assert "material slots" in json.loads(scene.overtone.report_json)["materials"]


def test_uncarried_layers_are_named_with_a_reason(mod, scene):
    src, tgt = textured_pair(scene)
    src.data.attributes.new("note", 'STRING', 'POINT')
    src.data.attributes.new("crease_edge", 'FLOAT', 'EDGE')   # Blender's own edge creases
    src.data.attributes.new("wear", 'FLOAT', 'EDGE')          # an artist's own numbers per edge
    src.data.attributes.new("spin", 'QUATERNION', 'POINT').data.foreach_set(
        "value", np.tile([0.0, 0.0, 0.0, 2.0], len(src.data.vertices)).astype(np.float32))
    src.data.attributes.new("tag", 'INT8', 'POINT').data.foreach_set(
        "value", (np.arange(len(src.data.vertices)) % 3).astype(np.int32))
    _tick(scene, {"spin", "tag"})
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    report = json.loads(scene.overtone.report_json)
    # named: numbers an artist expects to arrive; not named: text nobody asked for and
    # Blender's own edge marks
    assert set(report["skipped"]) == {"wear"}
    assert "edge" in report["skipped"]["wear"]
    tag = tgt.data.attributes["tag"]
    assert tag.data_type == 'INT8'
    values = np.empty(len(tgt.data.vertices), np.int32)
    tag.data.foreach_get("value", values)
    assert set(values.tolist()) <= {0, 1, 2}
    spin = np.empty(len(tgt.data.vertices) * 4, np.float32)
    tgt.data.attributes["spin"].data.foreach_get("value", spin)
    np.testing.assert_allclose(spin.reshape(-1, 4), np.tile([0.0, 0.0, 0.0, 1.0], (len(tgt.data.vertices), 1)),
                               atol=1e-6)  # a unit quaternion again


def test_seams_and_sharp_edges_are_named_only_when_asked_for(mod, scene):
    """A mesh with seams and sharp edges carries without a "not carried" line nobody asked
    for; asked for by name, such an edge mark is named with its reason."""
    src, tgt = textured_pair(scene)
    for edge in list(src.data.edges)[:40]:
        edge.use_seam = True
        edge.use_edge_sharp = True
    assert {"uv_seam", "sharp_edge"} <= set(src.data.attributes.keys())
    src.data.color_attributes.new("tint", 'FLOAT_COLOR', 'POINT')
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    report = json.loads(scene.overtone.report_json)
    assert "skipped" not in report and "not carried" not in report["summary"]
    assert scene.overtone.report_skipped == ""
    request = mod.runs.PairRequest(signals=("tint", "sharp_edge"))
    plan = mod.runs.make_plan("transfer", src, tgt, request)
    assert [name for name, _ in plan.not_carried] == ["sharp_edge"]
    assert [s.name for s in plan.inputs.signals] == ["tint"]
    # nothing that can be carried asked for: refused with the reason, not "has no attribute"
    with pytest.raises(ValueError, match="nothing Overtone can carry was asked for: uv_seam: edge layers"):
        mod.runs.make_plan("transfer", src, tgt, mod.runs.PairRequest(signals=("uv_seam",)))


@pytest.mark.parametrize("replace", [True, False])
def test_a_colour_named_like_a_target_uv_map_keeps_one_name(mod, scene, replace):
    """The first run writes beside the UV map (under a name of its own); every
    re-run, with or without Replace Existing, refreshes that layer."""
    src, tgt = textured_pair(scene)
    colour = src.data.color_attributes.new("UVMap_paint", 'FLOAT_COLOR', 'POINT')
    colour.data.foreach_set("color", np.full(len(src.data.vertices) * 4, 0.5, np.float32))
    tgt.data.uv_layers.new(name="UVMap_paint")
    _tick(scene, {"UVMap_paint"})
    scene.overtone.replace_existing = replace
    names, values = [], []
    for run in range(3):
        colour.data.foreach_set("color", np.full(len(src.data.vertices) * 4, 0.2 + 0.3 * run, np.float32))
        assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
        names.append(sorted(a.name for a in tgt.data.color_attributes))
        written = json.loads(scene.overtone.report_json)["written"]["UVMap_paint"]
        values.append(float(read(mod, tgt, written)[:, 0].mean()))
    assert names[0] == names[1] == names[2]
    assert len([n for n in names[0] if n.startswith("UVMap_paint")]) == 1
    # each run's colour is in that one layer (the refresh happened)
    np.testing.assert_allclose(values, [0.2, 0.5, 0.8], atol=1e-5)
    assert "UVMap_paint" in [uv.name for uv in tgt.data.uv_layers]  # the UV map is never replaced


@pytest.mark.parametrize("domain,data_type,width,dtype", [
    ("POINT", "INT8", 0, np.int32), ("POINT", "FLOAT2", 2, np.float32), ("POINT", "QUATERNION", 4, np.float32),
    ("POINT", "INT32_2D", 2, np.int32), ("CORNER", "FLOAT2", 2, np.float32), ("CORNER", "FLOAT", 0, np.float32),
    ("FACE", "INT", 0, np.int32), ("FACE", "BOOLEAN", 0, np.bool_), ("FACE", "FLOAT_VECTOR", 3, np.float32),
])
def test_new_layer_types_round_trip(mod, scene, domain, data_type, width, dtype):
    bpy.ops.mesh.primitive_uv_sphere_add(segments=8, ring_count=4)
    obj = bpy.context.active_object
    rows = {"POINT": len(obj.data.vertices), "CORNER": len(obj.data.loops), "FACE": len(obj.data.polygons)}[domain]
    shape = (rows, width) if width else (rows,)
    values = (np.arange(np.prod(shape)) % 3).reshape(shape).astype(dtype)
    layer = mod.bridge.Layer("probe", domain, data_type)
    written = mod.bridge.write_outputs(obj, [layer.signal(values)])
    assert written == {"probe": "probe"}
    attr = obj.data.attributes["probe"]
    assert (attr.domain, attr.data_type) == (domain, data_type)
    back = mod.bridge.read_signal(obj, layer).values
    np.testing.assert_array_equal(back, values)
    assert layer in mod.bridge.list_layers(obj)
