"""Per-vertex match confidence on pairs that should match and on ones that should not.

Prints, for the ground-truth pairs of tests/pairs.py (good matches) and for
the add-on tests' failure cases (a target moved far away but matched as if
overlapping; one end of a target torn 3 units away), the mean confidence and
the share of target vertices under 0.5 and 0.2. The add-on's thresholds
(addon/runs.py: uncertain under 0.5, warn over 2 %, refuse over 50 %) are
set from these figures.
"""

import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from engine import Pair, Settings, Shape  # noqa: E402
from engine.jobs import demo  # noqa: E402
from tests import pairs  # noqa: E402

GOOD = ["creature_pose", "creature_resolution", "creature_proportion", "creature_thicker",
        "creature_reposed", "creature_pinched", "creature_rigid"]


def line(name, pair):
    c = pair.confidence
    print(f"{name:24s} {pair.correspondence.mode:9s} mean {c.mean():.3f}  under 0.5: {(c < 0.5).mean():6.1%}"
          f"  under 0.2: {(c < 0.2).mean():6.1%}", flush=True)


def main():
    for name in GOOD:
        p = getattr(pairs, name)()
        line(name, Pair(Shape(p.source_vertices, p.source_faces), Shape(p.target_vertices, p.target_faces)))
    s = demo.creature(30, 16)
    t = demo.creature(26, 18, twist_offset=True, shuffle_seed=3)
    source = Shape(s.vertices, s.faces)
    line("far away, aligned", Pair(source, Shape(t.vertices + [50.0, 0, 0], t.faces), Settings(match="aligned")))
    torn = np.array(t.vertices, dtype=float)
    torn[torn[:, 0] > np.quantile(torn[:, 0], 0.9), 2] += 3.0
    line("one end torn, aligned", Pair(source, Shape(torn, t.faces), Settings(match="aligned")))


if __name__ == "__main__":
    main()
