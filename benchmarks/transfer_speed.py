"""Cold and warm transfer of one colour between two ~30k-vertex meshes.

Cold: Shapes, correspondence and bases from scratch. Warm: a changed colour on
the same pair. Printed next to the closest-point baseline measured in the same
run (locator + closest points + interpolation). BLAS threads are limited to
``--threads`` (default 1, as the add-on's worker runs) with threadpoolctl.
"""

import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from engine.matching.closest_point import SurfaceLocator  # noqa: E402
from engine.matching.correspondence import correspond  # noqa: E402
from engine.spectra.shape import Shape  # noqa: E402
from engine.carrying.transfer import Transfer  # noqa: E402
from tests import pairs  # noqa: E402


def run(p, basis):
    sc = pairs.rest_scale(p)
    col = pairs.colour(p.source_rest, sc)
    t = time.perf_counter()
    sp = SurfaceLocator(p.source_vertices, p.source_faces).closest(p.target_vertices)
    _ = np.einsum("ij,ijk->ik", sp.barycentric, col[p.source_faces[sp.triangle]])
    base = time.perf_counter() - t
    t = time.perf_counter()
    S, T = Shape(p.source_vertices, p.source_faces), Shape(p.target_vertices, p.target_faces)
    c = correspond(S, T, landmarks=p.landmarks or None)
    tr = Transfer(S, T, c, basis=basis)
    tr.transfer(col)
    cold = time.perf_counter() - t
    t = time.perf_counter()
    tr.transfer(col[:, ::-1].copy())
    warm = time.perf_counter() - t
    print(f"{p.name}: {len(p.source_vertices)} -> {len(p.target_vertices)} vertices, mode {c.mode}, "
          f"basis {basis}; stage seconds {c.stats['timings']}")
    print(f"closest-point baseline {base:.3f} s; cold {cold:.2f} s ({cold / base:.1f}x); "
          f"warm {warm:.3f} s ({warm / base:.2f}x)")


def main(basis="pointwise", threads=1):
    from threadpoolctl import threadpool_limits

    print(f"BLAS threads: {threads} (as the add-on's worker runs)")
    with threadpool_limits(limits=threads):
        run(pairs.creature_resolution(source=(250, 120), target=(240, 126)), basis)
        run(pairs.creature_pose(source=(250, 120), target=(240, 126)), basis)


if __name__ == "__main__":
    import argparse

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("basis", nargs="?", default="pointwise")
    ap.add_argument("--threads", type=int, default=1)
    a = ap.parse_args()
    main(a.basis, a.threads)
