"""Rig weights, UV maps and face values against analytic truth.

Rig: the 11-bone rig of tests/pairs.py (``rig``) on the demo creature, carried
to a remeshed copy bent by 1.4 rad, for every basis: each group alone (clamped
to [0, 1], the behaviour before engine/carrying/weights.py) against the groups
carried together. Printed: the largest deviation of a vertex's sum from 1, the
fraction of vertices with more than 4 groups, the mean and largest error
against the true rig.

UV map and faces: the UV sphere of tests/test_faces.py onto an icosphere
(level 3): largest UV error away from the poles and the fraction of faces
whose material index differs from the region of their centre.
"""

import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from engine.carrying.charts import carry_charted  # noqa: E402
from engine.carrying.faces import carry_faces, faces_under_centres  # noqa: E402
from engine.jobs.demo import creature  # noqa: E402
from engine.jobs.pair import Pair, Settings  # noqa: E402
from engine.spectra.shape import Shape  # noqa: E402
from tests import meshes  # noqa: E402
from tests.pairs import rig  # noqa: E402
from tests.test_faces import region, true_uv, uv_sphere  # noqa: E402


def rig_figures() -> None:
    s, t = creature(40, 20), creature(34, 18, curl=1.4, twist_offset=True)
    pair = Pair(Shape(s.vertices, s.faces), Shape(t.vertices, t.faces), Settings(k=60))
    ws, truth = rig(s.uv), rig(t.uv)
    names = [f"bone{i}" for i in range(ws.shape[1])]
    print("basis          route     sum dev    >4 groups  mean err  max err")
    for basis in ("pointwise", "laplacian", "orthoproducts", "products"):
        tr = pair.transfer_for(basis)
        alone = np.column_stack([tr.transfer(ws[:, i], kind="weight").values for i in range(len(names))])
        res = pair.carry({n: (ws[:, i], "weight") for i, n in enumerate(names)}, basis=basis)
        together = np.column_stack([res[n].values for n in names])
        for route, w in (("alone", alone), ("together", together)):
            print(f"{basis:14s} {route:9s} {np.abs(w.sum(1) - 1).max():.2e}   "
                  f"{np.mean(np.count_nonzero(w, axis=1) > 4):.3f}      "
                  f"{np.abs(w - truth).mean():.4f}    {np.abs(w - truth).max():.4f}")


def uv_and_face_figures() -> None:
    v, cv, sizes, uv = uv_sphere()
    tv, tf = meshes.icosphere(3)
    tcv, tsizes = tf.ravel(), np.full(len(tf), 3)
    pair = Pair(Shape(v, corners=cv, sizes=sizes), Shape(tv, tf), Settings(match="aligned"))
    got = carry_charted(pair, "UVMap", uv, cv, sizes, tcv, tsizes).values
    truth = true_uv(tv[tcv])
    centre_u = np.repeat(got[:, 0].reshape(-1, 3).mean(axis=1), 3)
    truth_u = truth[:, 0] + np.round(centre_u - truth[:, 0])
    centres = tv[tf].mean(axis=1)
    away = np.repeat(np.abs(centres[:, 2]) < 0.9, 3)
    print(f"UV: largest error away from the poles u {np.abs(got[:, 0] - truth_u)[away].max():.4f}, "
          f"v {np.abs(got[:, 1] - truth[:, 1])[away].max():.4f}")
    face = np.repeat(np.arange(len(sizes)), sizes)
    src_centres = np.zeros((len(sizes), 3))
    np.add.at(src_centres, face, v[cv])
    material = region(src_centres / sizes[:, None])
    carried = carry_faces(faces_under_centres(pair, tcv, tsizes), "m", material, len(sizes))
    print(f"faces: {np.mean(carried != region(centres)):.4f} of target faces differ from their centre's region")


if __name__ == "__main__":
    rig_figures()
    uv_and_face_figures()
