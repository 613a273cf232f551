"""Time to build the Laplacian operators: robust on a jittered grid with slivers, plain on an icosphere.

Best of three runs of each: ``robust_laplacian`` on a 301x151 grid with
jitter 0.45 (about 45k vertices, many intrinsic flips), the plain cotangent
stiffness with the mixed Voronoi mass on icosphere(6) (40,962 vertices), and
``mesh_operators`` (defect checks, then the plain operators) on the same
icosphere.
"""

import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from engine.spectra.discretization import mesh_operators  # noqa: E402
from engine.spectra.laplacian import cotangent_laplacian, mass_matrix  # noqa: E402
from engine.spectra.robust import robust_laplacian  # noqa: E402
from tests import meshes  # noqa: E402


def best_of_three(run) -> float:
    best = float("inf")
    for _ in range(3):
        t = time.perf_counter()
        run()
        best = min(best, time.perf_counter() - t)
    return best


def main() -> None:
    v, f = meshes.grid(300, 150, jitter=0.45)
    vi, fi = meshes.icosphere(6)
    cases = [("robust, jittered grid", lambda: robust_laplacian(v, f)),
             ("plain + Voronoi mass, icosphere(6)", lambda: (cotangent_laplacian(vi, fi),
                                                            mass_matrix(vi, fi, kind="voronoi"))),
             ("mesh_operators, icosphere(6)", lambda: mesh_operators(vi, fi))]
    for name, run in cases:
        print(f"{name}: {best_of_three(run):.3f} s")


if __name__ == "__main__":
    main()
