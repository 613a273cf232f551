"""Re-running after changing a bake on a 30k-vertex pair: the pair is kept in memory.

Prints the cold and warm operator times (tests never assert wall-clock times);
asserts what the report says was reused, and that the warm result is the
engine's result for the new bake.
"""

import json
import time

import bpy
import numpy as np

from .conftest import engine_module, make_mesh, select
from .test_operators import read


def test_changed_bake_reuses_the_pair(overtone, scene):
    import importlib
    from .conftest import MODULE
    bridge = importlib.import_module(MODULE + ".bridge")
    demo = engine_module("jobs.demo")
    s = demo.creature(250, 120)                       # 30,002 vertices
    t = demo.creature(230, 130, twist_offset=True)    # 29,902 vertices, other triangulation
    src, tgt = make_mesh("Scan", s.vertices, s.faces), make_mesh("Game", t.vertices, t.faces)
    bake = src.data.attributes.new("ao", 'FLOAT', 'POINT')
    bake.data.foreach_set("value", demo.creature_signals(s.uv)["dirt"].astype(np.float32))
    select(src, tgt)
    settings = scene.overtone
    settings.basis = "ORTHOPRODUCTS"
    bpy.ops.overtone.refresh_signals()
    settings.signals["ao"].use = True  # a number attribute: carried when ticked
    started = time.perf_counter()
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    cold = time.perf_counter() - started
    assert json.loads(settings.report_json)["pair"] == "new"
    assert not settings.report_cache.startswith("Reused")
    # the artist re-bakes: new values, same meshes
    new = (1.0 - demo.creature_signals(s.uv)["dirt"]).astype(np.float32)
    src.data.attributes["ao"].data.foreach_set("value", new)
    started = time.perf_counter()
    assert bpy.ops.overtone.transfer_attributes() == {'FINISHED'}
    warm = time.perf_counter() - started
    assert settings.report_cache.startswith("Reused the match of the last run")
    print(f"\n30k pair ({len(s.vertices)} -> {len(t.vertices)}): cold {cold:.2f} s, "
          f"warm after a new bake {warm:.3f} s; report: {settings.report_cache}")
    # the engine's own Pair on the same arrays, its bases and map read from the
    # add-on's disk cache (so this check does not cost another cold solve)
    pipeline, shape = engine_module("jobs.pair"), engine_module("spectra.shape").Shape
    folder = bpy.context.preferences.addons[MODULE].preferences.cache_folder
    a, b = bridge.read_mesh(src), bridge.read_mesh(tgt)
    pair = pipeline.Pair(shape(a.vertices, corners=a.corners, sizes=a.sizes, cache=folder),
                         shape(b.vertices, corners=b.corners, sizes=b.sizes, cache=folder),
                         pipeline.Settings(basis="orthoproducts", k=60, order=2))
    assert pair.cache_hits["correspondence"] == "disk"
    assert "ao_ot1" not in tgt.data.attributes  # the re-run refreshed the "ao" it wrote
    got = read(type("M", (), {"bridge": bridge}), tgt, "ao")
    np.testing.assert_allclose(got, pair.carry({"ao": (new, "float")})["ao"].values, atol=1e-6)
