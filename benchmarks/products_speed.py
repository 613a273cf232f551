"""Speed and peak memory: orthogonalised eigenfunction products against least squares.

Both routes answer the same question: the best mass-weighted fit of a few
signals by the products of degree <= ``order`` of ``K`` smooth functions.

* ``orthogonal``: :func:`engine.spectra.products.orthogonal_products` (blocked CGS2,
  pivoted Gram split, default tolerance), then ``project`` / ``reconstruct``.
* ``lstsq``: the literature route, all raw products at once
  (:func:`engine.spectra.products.raw_products`), weighted by ``sqrt(M)`` and solved by
  ``numpy.linalg.lstsq`` (LAPACK ``gelsd``, an SVD) against the signals.

Each route runs in its own child process so that its peak resident memory
(``VmHWM`` from ``/proc/self/status``, reset after the data are built where
the kernel allows, else ``ru_maxrss``) is its own. The printed ratio is
``lstsq / orthogonal`` for time and memory, measured in the same run.

The mesh is built here: ``n_vertices`` random points on the unit sphere, their
convex hull (an irregular triangulation), then pushed out along a smooth bumpy
radius so that it is not a sphere. To save time the ``K`` functions are not
Laplacian eigenvectors: they are the constant and ``K - 1`` random smooth
functions ``cos(w . x + b)`` with ``|w| <= 3``, mass-orthonormalised. Their
products have no exact algebraic dependencies (beyond those of the constant),
which is the expensive case.

Usage: ``python benchmarks/products_speed.py [--n 100000] [--K 20] [--order 3]
[--functions F.npz]``; with ``--functions`` the given functions (for example
the true eigenfunctions written by benchmarks/eigenbasis_speed.py, which runs
this comparison at its end) replace the random ones.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import time

import numpy as np

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
if ROOT not in sys.path:
    sys.path.insert(0, ROOT)


def build_data(n_vertices: int, K: int, *, seed: int = 0, n_signals: int = 4):
    """Irregular bumpy sphere, its lumped mass, K smooth mass-orthonormal functions, signals."""
    from scipy.spatial import ConvexHull

    from engine.spectra.laplacian import mass_matrix

    rng = np.random.default_rng(seed)
    p = rng.standard_normal((n_vertices, 3))
    p /= np.linalg.norm(p, axis=1, keepdims=True)
    faces = ConvexHull(p).simplices.astype(np.int64)
    r = 1 + 0.15 * np.sin(3 * p[:, 0]) * np.cos(2 * p[:, 1]) + 0.1 * p[:, 2] ** 2
    v = p * r[:, None]
    m = mass_matrix(v, faces)
    w = rng.standard_normal((K - 1, 3))
    w *= rng.uniform(0.5, 3.0, (K - 1, 1)) / np.linalg.norm(w, axis=1, keepdims=True)
    F = np.column_stack([np.ones(n_vertices), np.cos(v @ w.T + rng.uniform(0, 2 * np.pi, K - 1))])
    # mass-orthonormalise (QR of the sqrt(M)-weighted columns), constant first
    sw = np.sqrt(m)
    q, _ = np.linalg.qr(sw[:, None] * F)
    phi = q / sw[:, None]
    phi *= np.sign(phi[np.argmax(np.abs(phi), axis=0), np.arange(K)])
    return v, faces, m, phi, _signals(v, n_signals)


def _signals(v, n_signals: int = 4):
    return np.column_stack([np.exp(v[:, 0]) * np.cos(2 * v[:, 1]), (v[:, 2] > 0.3).astype(float),
                            np.sin(4 * v[:, 0] * v[:, 1]), v[:, 1] ** 3][:n_signals])


def load_data(path: str, K: int):
    """Vertices, mass and the first ``K`` functions saved by another script
    (``vertices``, ``mass``, ``functions`` in an ``.npz``), e.g. the true
    eigenfunctions that benchmarks/eigenbasis_speed.py computed."""
    with np.load(path, allow_pickle=False) as z:
        v, m, phi = z["vertices"], z["mass"], z["functions"][:, :K]
    if phi.shape[1] < K:
        raise ValueError(f"{path} holds {phi.shape[1]} functions, K={K} asked")
    return v, None, m, np.ascontiguousarray(phi), _signals(v)


def _peak_kib() -> int:
    try:
        with open("/proc/self/status") as fh:
            for line in fh:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1])
    except OSError:
        pass
    return int(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss)


def _reset_peak() -> bool:
    try:
        with open("/proc/self/clear_refs", "w") as fh:
            fh.write("5")
        return True
    except OSError:
        return False


def _child(method: str, n: int, K: int, order: int, functions: str | None = None) -> dict:
    from engine.spectra.products import orthogonal_products, raw_products, product_exponents

    v, faces, m, phi, signals = build_data(n, K) if functions is None else load_data(functions, K)
    del v, faces
    data_kib = _peak_kib()
    reset = _reset_peak()
    base_kib = _peak_kib()
    t0 = time.perf_counter()
    if method == "orthogonal":
        pb = orthogonal_products(phi, m, order, K=K)
        fit = pb.reconstruct(pb.project(signals))
        rank = pb.rank
    elif method == "lstsq":
        P = raw_products(phi, product_exponents(K, order))
        sw = np.sqrt(m)
        c, _, rank, _ = np.linalg.lstsq(sw[:, None] * P, sw[:, None] * signals, rcond=None)
        fit = P @ c
    else:
        raise ValueError(f"unknown method {method!r}")
    seconds = time.perf_counter() - t0
    d = fit - signals
    err = np.sqrt((m @ d**2) / (m @ signals**2))
    return {"method": method, "seconds": seconds, "peak_mib": _peak_kib() / 1024,
            "start_mib": base_kib / 1024, "data_peak_mib": data_kib / 1024, "peak_reset": reset,
            "rank": int(rank), "errors": err.tolist()}


def run(n_vertices: int = 100_000, K: int = 20, order: int = 3, *,
        methods: tuple[str, ...] = ("orthogonal", "lstsq"), functions: str | None = None) -> dict:
    """Time both routes in child processes; print and return their figures and the ratios."""
    import math

    what = ("smooth random functions (not eigenvectors)" if functions is None
            else f"the first {K} eigenfunctions from {os.path.basename(functions)}")
    print(f"products_speed: {n_vertices} vertices, K={K}, order={order} "
          f"({math.comb(K + order, order)} products), {what}")
    results = {}
    for method in methods:
        cmd = [sys.executable, os.path.abspath(__file__), "--child", method, "--n", str(n_vertices),
               "--K", str(K), "--order", str(order)] + ([] if functions is None else ["--functions", functions])
        out = subprocess.run(cmd, capture_output=True, text=True, check=True)
        res = json.loads(out.stdout.strip().splitlines()[-1])
        results[method] = res
        grew = res["peak_mib"] - res["start_mib"]
        errors = " ".join(f"{e:.1e}" for e in res["errors"])
        print(f"  {method:10s} {res['seconds']:8.2f} s   peak {res['peak_mib']:7.0f} MiB "
              f"(+{grew:.0f} over the data{'' if res['peak_reset'] else ', peak not reset'})  "
              f"rank {res['rank']}  fit errors {errors}")
    children = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
    print(f"  largest child ru_maxrss {children:.0f} MiB")
    if "orthogonal" in results and "lstsq" in results:
        o, s = results["orthogonal"], results["lstsq"]
        print(f"  ratio lstsq / orthogonal: time {s['seconds'] / o['seconds']:.2f}x, "
              f"peak memory {s['peak_mib'] / o['peak_mib']:.2f}x, "
              f"memory over the data {(s['peak_mib'] - s['start_mib']) / max(o['peak_mib'] - o['start_mib'], 1):.2f}x")
    return results


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=100_000)
    ap.add_argument("--K", type=int, default=20)
    ap.add_argument("--order", type=int, default=3)
    ap.add_argument("--child", default=None, help=argparse.SUPPRESS)
    ap.add_argument("--methods", default="orthogonal,lstsq")
    ap.add_argument("--functions", default=None,
                    help="an .npz with vertices, mass, functions (n, >=K) to use instead of random ones")
    a = ap.parse_args(argv)
    if a.child:
        print(json.dumps(_child(a.child, a.n, a.K, a.order, a.functions)))
        return 0
    run(a.n, a.K, a.order, methods=tuple(a.methods.split(",")), functions=a.functions)
    return 0


if __name__ == "__main__":
    sys.exit(main())
