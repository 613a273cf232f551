"""Colour error against the ground truth when the target is stretched unevenly.

The source is the painted demo creature; the target is the same creature at
another resolution, in world space rotated, moved and scaled by (1, 1.6, 0.8)
(what an object scale gives once applied), or only rotated and moved, and
the source the other way round. Auto mode, the add-on's defaults (point to
point). The ground truth is the paint at each target vertex's own body
coordinates (demo.creature_signals). The add-on reads an object's scale
into world space, so these are its figures too (tests/blender/test_reruns.py
checks that an object scale gives what the applied shape gives).
"""

import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from engine import Pair, Settings, Shape  # noqa: E402
from engine.jobs import demo  # noqa: E402


def placed(vertices, scale, angle, move):
    c, s = np.cos(angle), np.sin(angle)
    rotation = np.array([[c, -s, 0.0], [s, c, 0.0], [0.0, 0.0, 1.0]])
    return (np.asarray(vertices) * scale) @ rotation.T + move


def main():
    s = demo.creature(40, 20)
    t = demo.creature(33, 23, twist_offset=True, shuffle_seed=3)
    paint = demo.creature_signals(s.uv)["tint"]
    truth = demo.creature_signals(t.uv)["tint"]
    one, stretch = np.ones(3), np.array([1.0, 1.6, 0.8])
    cases = {"same place": (one, one, 0.0, 0.0),
             "target rotated and moved": (one, one, 0.7, 5.0),
             "target stretched (1, 1.6, 0.8) in place": (one, stretch, 0.0, 0.0),
             "target stretched, rotated and moved": (one, stretch, 0.7, 5.0),
             "source stretched, rotated and moved": (stretch, one, 0.7, 5.0)}
    for name, (s_scale, t_scale, angle, move) in cases.items():
        source = Shape(placed(s.vertices, s_scale, -angle, -move), s.faces)
        target = Shape(placed(t.vertices, t_scale, angle, move), t.faces)
        pair = Pair(source, target, Settings(match="auto", basis="pointwise"))
        got = pair.carry({"tint": (paint, "color")})["tint"].values
        rmse = float(np.sqrt(np.mean((got - truth) ** 2)))
        print(f"{name:42s} {pair.correspondence.mode:9s} confidence {pair.confidence.mean():.3f}  "
              f"colour RMSE {rmse:.4f}", flush=True)


if __name__ == "__main__":
    main()
