"""Sculpt-scale jobs: a 30k / 300k / 1M-vertex source onto a ~25k target, timed.

The shape: an irregular bumpy closed surface (random points on the sphere,
their convex hull, pushed out by a smooth radius function and stretched) with
a sculpted band of fine bumps on top. Each source size is sampled afresh; the
target is the same shape with another sampling of 25k points and without the
fine bumps (a game mesh), and for the intrinsic job also bent and moved.
Truth is the sphere parameter every vertex came from.

Every job runs the command line (``python -m engine transfer|detail``) on PLY
files in its own process, with one BLAS thread, and reports its wall time and
CPU time (user + system, the better figure on a shared machine) and peak
resident memory (VmHWM). Accuracy against truth:

- transfer: RMSE of the carried colour (a smooth pattern of the sphere
  parameter, range 0..1) against the colour of the target vertex's own
  parameter, and the median map error (radians on the parameter sphere) of
  the nearest colour-encoded parameter;
- detail: the fraction of the true sculpted displacement recovered on the
  target (``<carried, true> / <true, true>`` over all vertices, the true one
  being the source's bump field at the target's parameter, along the normal),
  and the relative RMSE of the carried displacement.

The last lines print the 1M / 30k cost ratio of each job, measured in this run.

Run: ``OPENBLAS_NUM_THREADS=1 python benchmarks/sculpt_scale.py [--sizes 30000,300000,1000000]``
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time

import numpy as np

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, ROOT)
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

STRETCH = np.array([1.5, 1.0, 0.8])
BUMP_AMPLITUDE = 0.01
BUMP_FREQUENCY = 24.0     # fine bumps: wavelength about 2 pi / 24 = 0.26 on the unit sphere
DETAIL_SIZE = 0.15        # band: features shorter than 0.15 sqrt(area) (about 0.56 here) are detail


def sphere_points(n: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """``n`` random unit vectors and the outward triangles of their convex hull (the
    eigenbasis benchmark's bumpy surface, its points taken back to the sphere)."""
    from benchmarks.eigenbasis_speed import bumpy_mesh

    v, f = bumpy_mesh(n, seed)
    p = v / STRETCH
    return p / np.linalg.norm(p, axis=1, keepdims=True), f


def base_radius(p: np.ndarray) -> np.ndarray:
    """The radius function of :func:`benchmarks.eigenbasis_speed.bumpy_mesh`."""
    x, y, z = p.T
    return 1 + 0.15 * np.sin(3 * x + 1) * np.cos(2 * y) + 0.1 * np.sin(5 * z + 2 * x)


def bumps(p: np.ndarray) -> np.ndarray:
    """The sculpted band: fine bumps of the sphere parameter (radial offset before stretching)."""
    x, y, z = p.T
    w = BUMP_FREQUENCY
    return BUMP_AMPLITUDE * np.sin(w * x + 0.3) * np.sin(w * y + 1.1) * np.sin(w * z + 0.7)


def surface(p: np.ndarray, detail: bool) -> np.ndarray:
    r = base_radius(p) + (bumps(p) if detail else 0.0)
    out: np.ndarray = p * r[:, None] * STRETCH
    return out


def colour(p: np.ndarray) -> np.ndarray:
    """A smooth colour pattern of the sphere parameter, (n, 3) in [0, 1]."""
    x, y, z = p.T
    return np.column_stack([0.5 + 0.5 * np.sin(4 * x + 2 * y), 0.5 + 0.5 * np.cos(3 * y - z),
                            0.5 + 0.5 * np.sin(2 * z + 3 * x)])


def pose(v: np.ndarray) -> np.ndarray:
    """Bent about the y axis (the half with x > 0 turned by up to 0.5 rad) and moved."""
    x = v[:, 0]
    a = 0.5 * np.clip(x / 1.5, 0, None) ** 2
    c, s = np.cos(a), np.sin(a)
    bent = np.column_stack([c * v[:, 0] - s * v[:, 2], v[:, 1], s * v[:, 0] + c * v[:, 2]])
    q = np.deg2rad(35.0)
    rot = np.array([[np.cos(q), -np.sin(q), 0], [np.sin(q), np.cos(q), 0], [0, 0, 1]])
    out: np.ndarray = bent @ rot.T * 1.3 + np.array([3.0, -2.0, 1.0])
    return out


def _vmhwm_gib() -> float:
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 2 ** 20
    return float("nan")


def child(argv: list[str]) -> None:
    """Run the command line in this process, then print its time and peak memory as JSON."""
    from engine.jobs.cli import main as cli_main

    import resource

    t0 = time.perf_counter()
    code = cli_main(argv)
    use = resource.getrusage(resource.RUSAGE_SELF)
    print("RESULT " + json.dumps({"code": code, "seconds": time.perf_counter() - t0, "peak_gib": _vmhwm_gib(),
                                  "cpu_seconds": use.ru_utime + use.ru_stime}))


def run_job(argv: list[str]) -> dict:
    env = {**os.environ, "OPENBLAS_NUM_THREADS": "1", "OMP_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"}
    proc = subprocess.run([sys.executable, os.path.abspath(__file__), "--child", *argv], capture_output=True,
                          text=True, env=env, cwd=ROOT)
    lines = [ln for ln in proc.stdout.splitlines() if ln.startswith("RESULT ")]
    if proc.returncode or not lines:
        raise RuntimeError(f"job {argv} failed:\n{proc.stdout[-2000:]}\n{proc.stderr[-2000:]}")
    out: dict = json.loads(lines[-1][7:])
    if out["code"] != 0:
        raise RuntimeError(f"job {argv} exited with {out['code']}:\n{proc.stderr[-2000:]}")
    return out


def write(path: str, v: np.ndarray, f: np.ndarray, col: np.ndarray | None = None) -> None:
    from engine.intake.files import write_ply

    props = None if col is None else {"red": col[:, 0], "green": col[:, 1], "blue": col[:, 2]}
    write_ply(path, v, faces=f, properties=props)


def read_colour(path: str) -> np.ndarray:
    from engine.intake.files import read_mesh

    m = read_mesh(path)
    return np.asarray(m.properties["color"], dtype=np.float64)


def read_positions(path: str) -> np.ndarray:
    from engine.intake.files import read_mesh

    return np.asarray(read_mesh(path).vertices, dtype=np.float64)


def measure_size(n: int, folder: str, target: dict) -> dict:
    """Build one source of ``n`` vertices, run the three jobs, measure them against truth."""
    ps, fs = sphere_points(n, seed=n)
    src = os.path.join(folder, f"source_{n}.ply")
    write(src, surface(ps, detail=True), fs, colour(ps))
    del fs
    out: dict = {"n": n}
    for mode in ("aligned", "intrinsic"):
        tgt = target["aligned" if mode == "aligned" else "posed"]
        res = os.path.join(folder, f"out_{mode}_{n}.ply")
        out[mode] = run_job(["transfer", src, tgt, "-o", res, "--match", mode, "--attributes", "color"])
        got = read_colour(res)
        out[mode]["colour_rmse"] = float(np.sqrt(np.mean((got - target["colour"]) ** 2)))
    res = os.path.join(folder, f"out_detail_{n}.ply")
    out["detail"] = run_job(["detail", src, target["aligned"], "-o", res, "--size", str(DETAIL_SIZE)])
    carried = read_positions(res) - target["vertices"]
    truth = target["true_displacement"]
    out["detail"]["recovered"] = float(np.sum(carried * truth) / np.sum(truth * truth))
    out["detail"]["relative_rmse"] = float(np.sqrt(np.sum((carried - truth) ** 2) / np.sum(truth * truth)))
    return out


def build_target(n: int, folder: str) -> dict:
    from engine.carrying.detail import vertex_normals

    pt, ft = sphere_points(n, seed=7)
    vt = surface(pt, detail=False)
    aligned, posed = os.path.join(folder, "target.ply"), os.path.join(folder, "target_posed.ply")
    write(aligned, vt, ft)
    write(posed, pose(vt), ft)
    # the true detail on the target: the source's bump field at the target's parameter, radial
    # then stretched, taken along the target's normal (the part a base-and-normal offset carries)
    radial = (pt * bumps(pt)[:, None]) * STRETCH
    nrm = vertex_normals(vt, ft)
    true = nrm * np.einsum("ij,ij->i", radial, nrm)[:, None]
    return {"aligned": aligned, "posed": posed, "colour": colour(pt), "vertices": vt, "true_displacement": true}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", default="30000,300000,1000000", help="source vertex counts, comma-separated")
    ap.add_argument("--target", type=int, default=25000, help="target vertices")
    a = ap.parse_args()
    sizes = [int(s) for s in a.sizes.split(",")]
    print(f"load average at start: {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores; one BLAS thread per job")
    results = []
    with tempfile.TemporaryDirectory() as folder:
        target = build_target(a.target, folder)
        for n in sizes:
            r = measure_size(n, folder, target)
            results.append(r)
            for job in ("aligned", "intrinsic", "detail"):
                j = r[job]
                acc = (f"colour RMSE {j['colour_rmse']:.4f}" if job != "detail" else
                       f"recovered {j['recovered']:.1%} of the true displacement, relative RMSE "
                       f"{j['relative_rmse']:.2f}")
                print(f"{n:>8} -> {a.target}: {job:<9} {j['seconds']:7.1f} s wall {j['cpu_seconds']:7.1f} s CPU  "
                      f"peak {j['peak_gib']:.2f} GiB  {acc}",
                      flush=True)
    small, big = results[0], results[-1]
    for job in ("aligned", "intrinsic", "detail"):
        print(f"cost ratio {big['n']} / {small['n']} source vertices, {job}: "
              f"{big[job]['seconds'] / small[job]['seconds']:.2f}x wall, "
              f"{big[job]['cpu_seconds'] / small[job]['cpu_seconds']:.2f}x CPU")
    print(f"load average at end: {os.getloadavg()[0]:.1f}")


if __name__ == "__main__":
    if len(sys.argv) > 1 and sys.argv[1] == "--child":
        child(sys.argv[2:])
    else:
        main()
