"""Accuracy and CPU time of the intrinsic mode on ~30k-vertex ground-truth pairs.

The creature pairs of tests/pairs.py at 29,882 source and 30,116 target
vertices (the size of ``benchmarks/transfer_speed.py``), each matched with
``match="intrinsic"`` and its landmarks: colour RMSE, mask error and mean map
error against the rest-frame truth (tests/metrics.py), the mean confidence,
and the CPU time (user + system of this process) of the cold job: shapes,
correspondence and one pointwise colour transfer. At this size the intrinsic
mode matches on simplified copies (``MatchOptions.coarse_above``), which the
small pairs of ``benchmarks/transfer_accuracy.py`` never reach.

Run: ``OPENBLAS_NUM_THREADS=1 python benchmarks/intrinsic_large_accuracy.py [pose proportion ...]``
"""

import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from engine.carrying.transfer import Transfer  # noqa: E402
from engine.matching.correspondence import correspond  # noqa: E402
from engine.spectra.shape import Shape  # noqa: E402
from tests import pairs  # noqa: E402
from tests.metrics import colour_rmse, map_error, mask_error  # noqa: E402

SOURCE, TARGET = (250, 120), (240, 126)
MAKERS = {"pose": pairs.creature_pose, "proportion": pairs.creature_proportion, "thicker": pairs.creature_thicker,
          "reposed": pairs.creature_reposed, "pinched": pairs.creature_pinched}


def main(names):
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1):
        for name in names or MAKERS:
            p = MAKERS[name](source=SOURCE, target=TARGET)
            sc = pairs.rest_scale(p)
            t0 = time.process_time()
            S, T = Shape(p.source_vertices, p.source_faces), Shape(p.target_vertices, p.target_faces)
            c = correspond(S, T, landmarks=p.landmarks or None, match="intrinsic")
            tr = Transfer(S, T, c, basis="pointwise")
            colour = tr.transfer(pairs.colour(p.source_rest, sc)).values
            cpu = time.process_time() - t0
            mask = tr.transfer(pairs.mask(p.source_rest, sc), kind="mask").values
            print(f"{name:11s} {S.n_vertices} -> {T.n_vertices}: colour RMSE "
                  f"{colour_rmse(colour, pairs.colour(p.target_rest, sc)):.4f}, mask error "
                  f"{mask_error(mask, pairs.mask(p.target_rest, sc)):.4f}, map error {map_error(p, c):.4f}, "
                  f"mean confidence {c.confidence.mean():.4f}, CPU {cpu:.1f} s", flush=True)


if __name__ == "__main__":
    main(sys.argv[1:])
