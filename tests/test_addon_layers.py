"""addon/job.py routes UV maps, face values, rotations and rig weights (no Blender).

Truth: the equirectangular UV sphere and regions of tests/test_faces.py, the
11-bone rig of tests/pairs.py; here only the routing is checked (every layer
reaches the right carrier and keeps its type); accuracy is in test_faces.py
and test_weights.py.
"""

import numpy as np

from tests import meshes
from tests.pairs import rig
from tests.test_addon_job import engine, job
from tests.test_faces import face_centres, region, true_uv, uv_sphere


def test_uv_map_faces_rotations_and_groups_through_one_job():
    v, cv, sizes, uv = uv_sphere()
    tv, tf = meshes.icosphere(3)
    source = engine.MeshData(v, cv.astype(np.int64), sizes.astype(np.int64))
    target = engine.MeshData(tv, tf.ravel().astype(np.int64), np.full(len(tf), 3, dtype=np.int64))
    material = region(face_centres(v, cv, sizes)).astype(np.int32)
    spin = np.tile([0.0, 0.0, 0.0, 2.0], (len(v), 1)).astype(np.float32)
    # a rig along the sphere's axis: u from the height
    weights = rig(np.column_stack([(1 - v[:, 2]) / 2, np.zeros(len(v))]))
    signals = [engine.Signal("UVMap", "vector", uv.astype(np.float32), np.dtype(np.float32), "CORNER", "FLOAT2"),
               engine.Signal("material_index", "label", material, material.dtype, "FACE", "INT"),
               engine.Signal("spin", "vector", spin, spin.dtype, "POINT", "QUATERNION"),
               engine.Signal("height", "float", v[cv][:, 2].astype(np.float32), np.dtype(np.float32),
                             "CORNER", "FLOAT")]
    signals += [engine.Signal(f"bone{b}", "weight", weights[:, b].astype(np.float32), np.dtype(np.float32),
                              "POINT", "VERTEX_GROUP") for b in range(weights.shape[1])]
    job.forget_pairs()
    settings = engine.Settings(match="aligned", basis="laplacian", k=60, max_influences=3)
    out = job.run_job(job.JobInput("transfer", source, target, tuple(signals), settings=settings))
    assert out.values["UVMap"].shape == (len(target.corners), 2)
    assert np.abs(out.values["UVMap"][:, 1] - true_uv(tv[target.corners])[:, 1]).max() < 0.02
    assert out.values["material_index"].dtype == np.int32 and out.values["material_index"].shape == (len(tf),)
    assert set(np.unique(out.values["material_index"])) <= set(np.unique(material))
    # a corner float linear in position: interpolation on the source's flat faces,
    # within the sphere's chord error (16 rings: 1 - cos(pi / 32) < 0.005)
    assert np.abs(out.values["height"].ravel() - tv[target.corners][:, 2]).max() < 0.01
    np.testing.assert_allclose(out.values["spin"], np.tile([0, 0, 0, 1.0], (len(tv), 1)), atol=1e-9)
    groups = np.column_stack([out.values[f"bone{b}"] for b in range(weights.shape[1])])
    np.testing.assert_allclose(groups.sum(axis=1), 1.0, atol=1e-4)
    assert np.count_nonzero(groups, axis=1).max() <= 3
    report = out.report
    assert report["signals"]["material_index"]["domain"] == "FACE"
    assert report["signals"]["UVMap"]["route"] == "UV islands"
    assert report["weights"]["partition_of_unity"] and report["weights"]["max_influences"] == 3
