"""The aligned-mode product-embedding check, off and on, on ground-truth pairs that overlap in space.

Two kinds of pair (tests/pairs.py): two meshings of the same surface
(creature-resolution, elephant-resolution and two smaller creatures), where
the closest point is the true partner by construction, and surfaces that
overlap but differ (creature-thicker, creature-reposed, creature-pinched,
elephant-deformed, each at several strengths). Each is mapped with
``correspond(match="aligned")`` and ``refine=False`` (closest points) and
``refine=True`` (the check forced); the default (``refine=None``) is the one
of the two the gate picks. Prints the gate statistic (the 99th percentile of
the closest-point distances both ways, in mean edge lengths), pointwise colour
RMSE, mask error and map error (over sqrt(source area)) both ways, how many
target vertices the check moved, and the mean relative change of the default
over the pairs that differ. The figures of ``engine.matching.correspondence`` come
from this script.

Arguments: pair names to run (substrings; all by default).
"""

import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from engine.matching.correspondence import correspond  # noqa: E402
from engine.spectra.shape import Shape  # noqa: E402
from tests import pairs  # noqa: E402
from benchmarks.product_refinement import measure, named  # noqa: E402

SAME = [
    pairs.creature_resolution, pairs.elephant_resolution,
    named(lambda: pairs.creature_resolution(source=(30, 18), target=(40, 24)), "creature-resolution-30"),
    named(lambda: pairs.creature_resolution(source=(20, 12), target=(26, 16)), "creature-resolution-20"),
]
DIFFER = [
    named(lambda: pairs.creature_thicker(thicken=0.03), "creature-thicker-0.03"),
    named(lambda: pairs.creature_thicker(thicken=0.06), "creature-thicker-0.06"),
    pairs.creature_thicker,
    named(lambda: pairs.creature_reposed(angle=0.1, turn=0.13), "creature-reposed-0.1"),
    pairs.creature_reposed,
    named(lambda: pairs.creature_pinched(more=0.1), "creature-pinched-0.1"),
    named(lambda: pairs.creature_pinched(more=0.15), "creature-pinched-0.15"),
    pairs.creature_pinched,
    named(lambda: pairs.elephant_deformed(amplitude=0.1), "elephant-deformed-0.1"),
    named(lambda: pairs.elephant_deformed(amplitude=0.25), "elephant-deformed-0.25"),
    named(lambda: pairs.elephant_deformed(amplitude=0.5), "elephant-deformed-0.5"),
    named(lambda: pairs.elephant_deformed(amplitude=1.0), "elephant-deformed-1"),
    pairs.elephant_deformed,
]


def main():
    only = sys.argv[1:]
    print(f"{'pair':24s} {'gap/h':>6s} {'closest: colour  mask    map':>29s}   {'checked: colour  mask    map':>28s}"
          f"  moved  default")
    rel = []
    for group, makers in (("same", SAME), ("differ", DIFFER)):
        for make in makers:
            p = make()
            if only and not any(o in p.name for o in only):
                continue
            S, T = Shape(p.source_vertices, p.source_faces), Shape(p.target_vertices, p.target_faces)
            t = time.perf_counter()
            c0 = correspond(S, T, match="aligned", refine=False)
            c1 = correspond(S, T, match="aligned", refine=True)
            a, b = measure(p, S, T, c0), measure(p, S, T, c1)
            st = c1.stats["aligned_refine"]
            gap = st["closest_distance_over_h"]
            default = "checked" if gap >= st["coincide_below"] else "closest"
            mark = "".join("+" if round(y, 4) > round(x, 4) else "-" if round(y, 4) < round(x, 4) else "="
                           for x, y in zip(a, b))
            change = " ".join(f"{100 * (y - x) / max(x, 1e-4):+.2f}%" for x, y in zip(a, b))
            print(f"{p.name:24s} {gap:6.3f} {a[0]:15.4f} {a[1]:7.4f} {a[2]:7.4f}   {b[0]:14.4f} {b[1]:7.4f} "
                  f"{b[2]:7.4f}  {st['moved']:5d}/{T.n_vertices} {default} {mark} {change}  "
                  f"({time.perf_counter() - t:.1f}s)", flush=True)
            if group == "differ":
                d = b if default == "checked" else a
                rel.append([(y - x) / max(x, 1e-4) for x, y in zip(a, d)])
    if rel:
        r = 100 * np.mean(rel, axis=0)
        print(f"pairs that differ, default against closest points: colour {r[0]:+.2f}%  mask {r[1]:+.2f}%  "
              f"map {r[2]:+.2f}%   (+ worse, - better, = equal at 4 decimals)")


if __name__ == "__main__":
    main()
