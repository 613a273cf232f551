"""What is carried and previewed when the artist chooses nothing, in the UI and in batch.

One rule (runs.default_signals): every colour attribute and vertex group of the
source; not the source's other attributes (numbers, vectors, integers,
on/off), not the preview copies ``<name>_carried``, not vertex groups both
meshes have (landmarks) unless Overtone wrote them. Reading the source's
layers ticks exactly that set; batch ``"all"`` resolves to it. Preview on
Source works with the default settings (direct values): it shows what the
smoothing would keep, computed here with the engine's own preview function.
"""

import importlib
import json

import bpy
import numpy as np
import pytest

from .conftest import MODULE, engine_module
from .test_operators import painted_pair, read


@pytest.fixture
def mod(overtone):
    names = ("bridge", "runs", "batch", "operators")
    return type("M", (), {n: importlib.import_module(f"{MODULE}.{n}") for n in names})


def layers(mod, obj):
    return {s.name for s in mod.bridge.list_layers(obj)}


def test_preview_works_with_the_default_settings(mod, scene):
    src, tgt = painted_pair(scene)
    settings = scene.overtone
    assert settings.basis == "POINTWISE"  # the default: values carried directly
    assert bpy.ops.overtone.preview_carry() == {'FINISHED'}
    assert layers(mod, src) - {"tint", "tint_bytes", "dirt", "flow", "head"} == {
        "tint_carried", "tint_bytes_carried", "head_carried"}
    # the engine's own preview of the smoothing the report names, on the same arrays
    preview = engine_module("carrying.preview")
    signals = engine_module("carrying.signals")
    shape = engine_module("spectra.shape").Shape
    pipeline = engine_module("jobs.pair")
    a = mod.bridge.read_mesh(src)
    tint = read(mod, src, "tint").astype(np.float64)
    assert mod.operators.PREVIEW_BASIS == "ORTHOPRODUCTS"
    engine_settings = pipeline.Settings(basis="orthoproducts", k=60, order=2)
    direct = preview.approximate_signals(
        shape(a.vertices, corners=a.corners, sizes=a.sizes),
        {"tint": signals.Signal("tint", "color", tint, tint.dtype)}, basis="orthoproducts",
        k=engine_settings.K, order=2)
    np.testing.assert_allclose(read(mod, src, "tint_carried"), direct.values["tint"], atol=1e-6)
    assert settings.report_ok and settings.report_smoothed
    assert settings.report_reason == ("Direct values arrive as they are. Shown: what Smoothed, Keep Detail "
                                      "keeps of each layer. Choose it under Method to carry that way.")
    errors = {i.name: i.source_error for i in settings.report_signals}
    assert errors["tint"] == pytest.approx(direct.errors["tint"], rel=1e-5) and errors["tint"] > 0
    assert settings.basis == "POINTWISE"  # the choice itself is left alone
    # a second preview does not preview the preview copies
    settings.replace_existing = True
    assert bpy.ops.overtone.preview_carry() == {'FINISHED'}
    assert set(json.loads(settings.report_json)["signals"]) == {"tint", "tint_bytes", "head"}


def test_preview_copies_and_other_attributes_are_not_carried_by_default(mod, scene):
    src, tgt = painted_pair(scene)
    assert bpy.ops.overtone.preview_carry() == {'FINISHED'}
    assert mod.runs.default_signals(src, tgt) == ("tint", "tint_bytes", "head")
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    assert layers(mod, tgt) == {"tint", "tint_bytes", "head", "overtone_confidence"}


def test_reading_the_layers_ticks_what_a_default_carry_takes(mod, scene):
    src, tgt = painted_pair(scene)
    assert bpy.ops.overtone.preview_carry() == {'FINISHED'}
    for obj, name in ((src, "snout"), (tgt, "snout")):  # a landmark pair
        obj.vertex_groups.new(name=name).add(list(range(10)), 1.0, 'REPLACE')
    assert bpy.ops.overtone.refresh_signals() == {'FINISHED'}
    ticks = {item.name: item.use for item in scene.overtone.signals}
    assert set(ticks) == layers(mod, src)
    assert {n for n, use in ticks.items() if use} == set(mod.runs.default_signals(src, tgt)) == {
        "tint", "tint_bytes", "head"}
    # the artist's own ticks survive a second read of the same source
    scene.overtone.signals["dirt"].use = True
    assert bpy.ops.overtone.refresh_signals() == {'FINISHED'}
    assert scene.overtone.signals["dirt"].use
    scene.overtone.signals["dirt"].use = False
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    assert layers(mod, tgt) == {"tint", "tint_bytes", "head", "snout", "overtone_confidence"}
    # nothing ticked in a list that was read is refused, not silently the default set
    for item in scene.overtone.signals:
        item.use = False
    with pytest.raises(RuntimeError, match="nothing ticked in the list of 'Painted'"):
        bpy.ops.overtone.transfer_attributes()


def test_batch_all_is_the_same_rule(mod, scene, tmp_path):
    src, tgt = painted_pair(scene)
    assert bpy.ops.overtone.preview_carry() == {'FINISHED'}
    path = tmp_path / "job.json"
    path.write_text(json.dumps({"version": 1, "pairs": [{"source": "Painted", "target": "Plain"}]}))
    job = mod.batch.check_job(mod.batch.load_job(path))
    assert job.pairs[0].request.signals == mod.runs.default_signals(src, tgt) == ("tint", "tint_bytes", "head")
    # after a carry, the "head" group Overtone wrote on the target is carried again, in batch as in the UI
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    job = mod.batch.check_job(mod.batch.load_job(path))
    assert job.pairs[0].request.signals == mod.runs.default_signals(src, tgt) == ("tint", "tint_bytes", "head")
