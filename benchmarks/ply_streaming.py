"""Reading and writing a million-vertex PLY: time and peak memory against NumPy's own files.

The mesh: a torus grid of 1000 x 1000 vertices (1M vertices, 2M triangles)
with a uchar colour and a float attribute per vertex, the arrays as
``read_mesh`` returns them (float64 vertices, int64 corners and sizes). Each
measurement runs in its own process: the engine's ``read_mesh`` / ``write_ply``
(binary little-endian, and ASCII with ``--ascii``) and, as the baseline of the
same run, ``np.load`` / ``np.save`` of the same arrays as ``.npy`` files (a
plain copy between the file and the arrays). Memory is the process's peak
resident size (VmHWM) above what it held before the step, printed against the
bytes of the arrays themselves: a reader that kept several copies of the
arrays would show a multiple of them, a writer that built the file's bytes
whole about one or more. Time is CPU time (user + system, the
better figure on a shared machine) and wall time. The read is also checked
value for value against the ``.npy`` arrays.

Run: ``python benchmarks/ply_streaming.py [--side 1000] [--ascii]``
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time

import numpy as np

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, ROOT)
NAMES = ("vertices", "corners", "sizes", "color", "weight")


def torus(side: int) -> dict[str, np.ndarray]:
    """A side x side torus grid: vertices, triangle corners (flat), sizes and two vertex properties."""
    u, v = np.meshgrid(np.linspace(0, 2 * np.pi, side, endpoint=False),
                       np.linspace(0, 2 * np.pi, side, endpoint=False), indexing="ij")
    r = 1 + 0.3 * np.cos(v)
    xyz = np.column_stack([(r * np.cos(u)).ravel(), (r * np.sin(u)).ravel(), (0.3 * np.sin(v)).ravel()])
    i, j = np.meshgrid(np.arange(side), np.arange(side), indexing="ij")
    a, b = i * side + j, ((i + 1) % side) * side + j
    c, d = ((i + 1) % side) * side + (j + 1) % side, i * side + (j + 1) % side
    tris = np.concatenate([np.stack([a, b, c], -1).reshape(-1, 3), np.stack([a, c, d], -1).reshape(-1, 3)])
    colour = (np.column_stack([np.cos(u).ravel(), np.sin(v).ravel(), np.cos(u + v).ravel()]) * 127 + 128)
    return {"vertices": xyz, "corners": tris.reshape(-1).astype(np.int64), "sizes": np.full(len(tris), 3, np.int64),
            "color": colour.astype(np.uint8), "weight": np.sin(3 * u).ravel().astype(np.float32)}


def _status(key: str) -> float:
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith(key):
                return int(line.split()[1]) / 1024
    return float("nan")


def _reset_peak() -> None:
    """Start VmHWM afresh (Linux: writing 5 to /proc/self/clear_refs; proc(5))."""
    with open("/proc/self/clear_refs", "w") as fh:
        fh.write("5")


def child(step: str, folder: str, binary: bool) -> None:
    """One step in this process; prints its CPU and wall time and the peak memory it added (MiB)."""
    from engine.intake.files import read_mesh, write_ply

    ply = os.path.join(folder, "mesh.ply" if binary else "mesh_ascii.ply")
    arrays = {}
    if step.endswith("write"):
        arrays = {k: np.load(os.path.join(folder, f"{k}.npy")) for k in NAMES}
    _reset_peak()
    before = _status("VmRSS:")
    use = resource.getrusage(resource.RUSAGE_SELF)
    t0 = time.perf_counter()
    if step == "npy-read":
        arrays = {k: np.load(os.path.join(folder, f"{k}.npy")) for k in NAMES}
    elif step == "npy-write":
        for k, a in arrays.items():
            np.save(os.path.join(folder, f"out_{k}.npy"), a)
    elif step == "ply-read":
        m = read_mesh(ply)
    else:
        write_ply(os.path.join(folder, "out.ply"), arrays["vertices"], corners=arrays["corners"],
                  sizes=arrays["sizes"], properties={"color": arrays["color"], "weight": arrays["weight"]},
                  binary=binary)
    wall = time.perf_counter() - t0
    after = resource.getrusage(resource.RUSAGE_SELF)
    out = {"cpu": after.ru_utime + after.ru_stime - use.ru_utime - use.ru_stime, "wall": wall,
           "added_mib": _status("VmHWM:") - before}
    if step == "ply-read":
        ref = {k: np.load(os.path.join(folder, f"{k}.npy")) for k in NAMES}
        got = {"vertices": m.vertices, "corners": m.corners, "sizes": m.sizes, **m.properties}
        out["same"] = all(got[k].dtype == ref[k].dtype and np.array_equal(got[k], ref[k]) for k in NAMES)
    print("RESULT " + json.dumps(out))


def run(step: str, folder: str, binary: bool) -> dict:
    env = {**os.environ, "OPENBLAS_NUM_THREADS": "1", "OMP_NUM_THREADS": "1"}
    proc = subprocess.run([sys.executable, os.path.abspath(__file__), "--child", step, folder, str(int(binary))],
                          capture_output=True, text=True, env=env, cwd=ROOT)
    lines = [ln for ln in proc.stdout.splitlines() if ln.startswith("RESULT ")]
    if proc.returncode or not lines:
        raise RuntimeError(f"{step} failed:\n{proc.stdout[-2000:]}\n{proc.stderr[-2000:]}")
    result: dict = json.loads(lines[-1][7:])
    return result


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--side", type=int, default=1000, help="torus grid side (vertices = side^2)")
    ap.add_argument("--ascii", action="store_true", help="also read and write ASCII PLY")
    a = ap.parse_args()
    from engine.intake.files import write_ply

    print(f"load average at start: {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores")
    with tempfile.TemporaryDirectory() as folder:
        arrays = torus(a.side)
        for k, arr in arrays.items():
            np.save(os.path.join(folder, f"{k}.npy"), arr)
        mib = sum(arr.nbytes for arr in arrays.values()) / 2 ** 20
        props = {"color": arrays["color"], "weight": arrays["weight"]}
        print(f"{len(arrays['vertices'])} vertices, {len(arrays['sizes'])} triangles: the arrays take {mib:.1f} MiB")
        for binary in (True, False) if a.ascii else (True,):
            write_ply(os.path.join(folder, "mesh.ply" if binary else "mesh_ascii.ply"), arrays["vertices"],
                      corners=arrays["corners"], sizes=arrays["sizes"], properties=props, binary=binary)
            kind = "binary" if binary else "ASCII"
            for what in ("read", "write"):
                base, ply = run(f"npy-{what}", folder, binary), run(f"ply-{what}", folder, binary)
                same = "" if what == "write" else f"; values identical to the .npy arrays: {ply['same']}"
                print(f"{kind} PLY {what}: {ply['cpu']:.2f} s CPU ({ply['wall']:.2f} s wall), peak memory added "
                      f"{ply['added_mib']:.0f} MiB = {ply['added_mib'] / mib:.2f}x the arrays; "
                      f"np.{'load' if what == 'read' else 'save'}: {base['cpu']:.2f} s CPU ({base['wall']:.2f} s "
                      f"wall), {base['added_mib']:.0f} MiB = {base['added_mib'] / mib:.2f}x the arrays; "
                      f"CPU ratio PLY / npy {ply['cpu'] / max(base['cpu'], 1e-3):.1f}x{same}", flush=True)
    print(f"load average at end: {os.getloadavg()[0]:.1f}")


if __name__ == "__main__":
    if len(sys.argv) > 1 and sys.argv[1] == "--child":
        child(sys.argv[2], sys.argv[3], sys.argv[4] == "1")
    else:
        main()
