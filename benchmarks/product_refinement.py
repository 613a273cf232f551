"""The product-embedding step of the intrinsic map, with and without, on ground-truth pairs.

The intrinsic pairs of benchmarks/transfer_accuracy.py plus nine variants
(other seeds, bend angles, resolutions and proportions, built the same way
as tests/pairs.py builds its pairs), each mapped with ``refine=False`` and
with the default. Prints pointwise colour RMSE, mask error and map error
(over sqrt(source area)) both ways, and the mean relative change over the
pairs. The figures of ``engine.matching.correspondence`` come from this script.

Arguments: pair names to run (substrings; all by default).
"""

import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from engine.matching.correspondence import correspond  # noqa: E402
from engine.spectra.shape import Shape  # noqa: E402
from engine.carrying.transfer import Transfer  # noqa: E402
from tests import pairs  # noqa: E402
from tests.pairs import Pair, _along_y, _read, _shuffle, bend, landmarks_by_rest, rigid, twist  # noqa: E402
from tests.metrics import colour_rmse, map_error, mask_error  # noqa: E402


def elephant_bent(b, t, angle, seed):
    def make():
        vs, fs = _read("elephant")
        vt = rigid(_along_y(twist, _along_y(bend, vs, b), t), angle=angle, shift=(1.0, -0.5, 0.3))
        vt, ft, rt = _shuffle(vt, fs.copy(), vs.copy(), seed)
        p = Pair(f"elephant-bent-{b}-{t}", vs, fs, vt, ft, vs.copy(), rt, kind="pose")
        p.landmarks = landmarks_by_rest(p, 7)
        return p
    return make


def elephant_stretched(sx, sy, t, seed):
    def make():
        vs, fs = _read("elephant")
        vt = vs * np.array([sx, sy, 1.0]) * (1 + 0.3 * (vs[:, 1:2] + 0.5))
        vt = rigid(_along_y(twist, vt, t), angle=0.9, shift=(0.0, 1.0, 0.0))
        vt, ft, rt = _shuffle(vt, fs.copy(), vs.copy(), seed)
        p = Pair(f"elephant-stretch-{sx}-{sy}", vs, fs, vt, ft, vs.copy(), rt, kind="proportion")
        p.landmarks = landmarks_by_rest(p, 7)
        return p
    return make


def named(make, name):
    def f():
        p = make()
        p.name = name
        return p
    return f


MAKERS = [
    pairs.creature_pose, pairs.creature_proportion, pairs.elephant_bent, pairs.elephant_proportion,
    named(lambda: pairs.creature_pose(source=(30, 18), target=(26, 16)), "creature-pose-small"),
    named(lambda: pairs.creature_pose(angle=np.pi * 0.5, seed=7, target=(34, 22)), "creature-pose-0.5pi"),
    named(lambda: pairs.creature_pose(angle=np.pi, seed=8, source=(50, 30), target=(36, 24)), "creature-pose-pi"),
    named(lambda: pairs.creature_proportion(seed=9, target=(40, 26)), "creature-proportion-fine"),
    named(lambda: pairs.creature_proportion(source=(30, 18), target=(28, 16), seed=2), "creature-proportion-small"),
    elephant_bent(0.8, 0.5, 0.5, 21), elephant_bent(1.6, 1.2, 2.0, 22),
    elephant_stretched(0.7, 1.3, 0.5, 23), elephant_stretched(1.2, 0.8, 1.0, 24),
]


def measure(p, S, T, c):
    sc = pairs.rest_scale(p)
    tr = Transfer(S, T, c, basis="pointwise")
    r = tr.transfer(pairs.colour(p.source_rest, sc)).values
    m = tr.transfer(pairs.mask(p.source_rest, sc), kind="mask").values
    return (colour_rmse(r, pairs.colour(p.target_rest, sc)), mask_error(m, pairs.mask(p.target_rest, sc)),
            map_error(p, c))


def main():
    only = sys.argv[1:]
    print(f"{'pair':28s} {'mode':9s} {'without: colour  mask    map':>29s}   {'with: colour  mask    map':>26s}  moved/h")
    rel = []
    for make in MAKERS:
        p = make()
        if only and not any(o in p.name for o in only):
            continue
        S, T = Shape(p.source_vertices, p.source_faces), Shape(p.target_vertices, p.target_faces)
        c0 = correspond(S, T, landmarks=p.landmarks or None, refine=False)
        c1 = correspond(S, T, landmarks=p.landmarks or None)
        a, b = measure(p, S, T, c0), measure(p, S, T, c1)
        mark = "".join("+" if round(y, 4) > round(x, 4) else "-" if round(y, 4) < round(x, 4) else "=" for x, y in zip(a, b))
        moved = c1.stats["sizes"].get("product_median_move_over_h", float("nan"))
        print(f"{p.name:28s} {c1.mode:9s} {a[0]:15.4f} {a[1]:7.4f} {a[2]:7.4f}   {b[0]:12.4f} {b[1]:7.4f} {b[2]:7.4f}  "
              f"{moved:.3f} {mark}")
        rel.append([(y - x) / max(x, 1e-4) for x, y in zip(a, b)])
    if rel:
        r = 100 * np.mean(rel, axis=0)
        print(f"mean relative change: colour {r[0]:+.2f}%  mask {r[1]:+.2f}%  map {r[2]:+.2f}%   "
              "(+ worse, - better, = equal at 4 decimals)")


if __name__ == "__main__":
    main()
