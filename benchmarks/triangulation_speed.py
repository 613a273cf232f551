"""Triangulation of 20k concave (L-shaped) hexagons: the ear-cutting library against the own ear clipping.

Both run through ``engine.intake.triangulation.triangulate`` (the same planar
projection); the own path is forced by hiding the library. Prints the best of
three runs of each.
"""

import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
import engine.intake.triangulation as triangulation  # noqa: E402

L_SHAPE = np.array([(1, 2), (0, 2), (0, 0), (2, 0), (2, 1), (1, 1)], float)


def main(n: int = 20000) -> None:
    rng = np.random.default_rng(0)
    shift = np.repeat(rng.uniform(0, 100, (n, 2)), 6, axis=0)
    v = np.column_stack([np.tile(L_SHAPE, (n, 1)) + shift, np.zeros(6 * n)])
    corners, sizes = np.arange(6 * n), np.full(n, 6)
    library = triangulation._earcut
    for name, cutter in [("library (mapbox_earcut)", library), ("own ear clipping", None)]:
        if name.startswith("library") and library is None:
            print(f"{name}: not installed")
            continue
        triangulation._earcut = cutter
        best = np.inf
        for _ in range(3):
            t = time.perf_counter()
            triangulation.triangulate(v, corners, sizes)
            best = min(best, time.perf_counter() - t)
        print(f"{name}: {best:.3f} s for {n} hexagons")
    triangulation._earcut = library


if __name__ == "__main__":
    main()
