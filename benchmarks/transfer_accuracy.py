"""Accuracy of correspondence + transfer on the ground-truth pairs (tests/pairs.py).

Prints, pair by pair and method by method, colour RMSE against the true
colours, mask error and map error, as defined in tests/metrics.py.
The closest-point baseline is measured in the same run; basis methods use one
size (r columns) for the comparison: laplacian k = rank of the orthoproducts.

Arguments: pair names to run (substrings; all by default); ``--refine=on`` or
``--refine=off`` forces the product-embedding step of the map
(``correspond(refine=...)``) instead of its default; ``--match=aligned`` or
``--match=intrinsic`` forces the mode instead of the overlap test. The
closest-point baselines never use either.
"""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from engine.matching.correspondence import correspond  # noqa: E402
from engine.spectra.shape import Shape  # noqa: E402
from engine.carrying.transfer import Transfer  # noqa: E402
from tests import pairs  # noqa: E402
from tests.metrics import colour_rmse, map_error, mask_error  # noqa: E402


def main():
    print(f"{'pair':22s} {'method':16s} {'mode':10s} {'colour RMSE':>11s} {'mask err':>9s} {'map err':>8s} {'src err':>8s}")
    makers = [pairs.creature_pose, pairs.creature_resolution, pairs.creature_proportion, pairs.creature_rigid,
              pairs.creature_thicker, pairs.creature_reposed, pairs.creature_pinched,
              pairs.cow_rigid, pairs.elephant_resolution, pairs.elephant_bent, pairs.elephant_proportion,
              pairs.elephant_deformed]
    args = sys.argv[1:]
    flags = [a for a in args if a.startswith("--")]
    only = [a for a in args if not a.startswith("--")]
    opts = {}
    for f in flags:
        if f in ("--refine=on", "--refine"):
            opts["refine"] = True
        elif f == "--refine=off":
            opts["refine"] = False
        elif f in ("--match=aligned", "--match=intrinsic"):
            opts["match"] = f.split("=")[1]
        else:
            raise SystemExit(f"unknown option {f}")
    for make in makers:
        p = make()
        if only and not any(o in p.name for o in only):
            continue
        S, T = Shape(p.source_vertices, p.source_faces), Shape(p.target_vertices, p.target_faces)
        sc = pairs.rest_scale(p)
        src, tru = pairs.colour(p.source_rest, sc), pairs.colour(p.target_rest, sc)
        msrc, mtru = pairs.mask(p.source_rest, sc), pairs.mask(p.target_rest, sc)
        base = correspond(S, T, match="aligned", refine=False)
        rows = [("closest-point", base, "pointwise")]
        if p.landmarks:
            S_w = Shape(pairs.landmark_warp(p), p.source_faces)
            warped = correspond(S_w, T, match="aligned", refine=False)
            # same triangles and weights, read on the unwarped source
            rows.append(("warp+closest", type(warped)(S, T, "aligned", "landmark warp", warped.triangle,
                                                        warped.barycentric, warped.confidence, warped.fmap), "pointwise"))
        c = correspond(S, T, landmarks=p.landmarks or None, **opts)
        rank = S.products(10, 3).basis.shape[1]
        for b in ("pointwise", "laplacian", "products", "orthoproducts"):
            rows.append((b, c, b))
        for label, corr, b in rows:
            tr = Transfer(S, T, corr, basis=b, k=rank)
            r = tr.transfer(src)
            m = tr.transfer(msrc, kind="mask").values
            print(f"{p.name:22s} {label:16s} {corr.mode:10s} {colour_rmse(r.values, tru):11.4f} "
                  f"{mask_error(m, mtru):9.4f} {map_error(p, corr):8.4f} {r.source_error:8.4f}")


if __name__ == "__main__":
    main()
