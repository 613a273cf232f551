"""Cold aligned transfer (two ~30k-vertex meshes) through the add-on's job function,
three ways, on a machine kept busy by ``--busy`` spinning processes:

    plain    in this process, BLAS threads as the process started them
    limited  in this process under ``threads.limited_threads`` (what the add-on does)
    worker   in the add-on's worker process (process start and file exchange included)

Each run is a fresh interpreter (cold: nothing cached in memory or on disk); the
three ways alternate, ``--repeat`` times. The add-on's own ``job.py`` and
``worker.py`` run, with the checkout's engine as their ``.engine``.

    python benchmarks/inprocess_threads.py [--busy 2] [--repeat 2]
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
WAYS = ("plain", "limited", "worker")


def one_run(way: str, package: Path) -> float:
    """Time one cold transfer in this interpreter (called in a child process)."""
    import importlib

    import numpy as np

    sys.path[:0] = [str(package.parent), str(ROOT)]
    job = importlib.import_module(f"{package.name}.job")
    worker = importlib.import_module(f"{package.name}.worker")
    from tests import pairs

    p = pairs.creature_resolution(source=(250, 120), target=(240, 126))

    engine = importlib.import_module(f"{package.name}.engine")

    def mesh(v: np.ndarray, f: np.ndarray) -> object:
        return engine.MeshData(np.asarray(v, float), np.asarray(f, np.int64).ravel(),
                               np.full(len(f), 3, np.int64))

    col = pairs.colour(p.source_rest, pairs.rest_scale(p))
    rgba = np.column_stack([col, np.ones(len(col))]).astype(np.float32)
    inp = job.JobInput("transfer", mesh(p.source_vertices, p.source_faces),
                       mesh(p.target_vertices, p.target_faces),
                       (engine.Signal("c", "color", rgba, rgba.dtype, domain="POINT", data_type="FLOAT_COLOR"),),
                       settings=engine.Settings(basis="pointwise"))
    started = time.perf_counter()
    if way == "plain":
        job.run_job.__wrapped__(inp)  # the job without its thread rule
    elif way == "limited":
        job.run_job(inp)
    else:
        with tempfile.TemporaryDirectory() as folder:
            worker.save_input(Path(folder), inp)
            w = worker.Worker()
            w.submit(Path(folder))
            status = w.wait()
            assert status.state == "done", status
            worker.load_output(Path(folder))
            w.stop()
    return time.perf_counter() - started


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--busy", type=int, default=2, help="spinning processes to start")
    ap.add_argument("--repeat", type=int, default=2)
    ap.add_argument("--way", choices=WAYS, help=argparse.SUPPRESS)  # one run, in a child
    ap.add_argument("--package", type=Path, help=argparse.SUPPRESS)
    a = ap.parse_args()
    if a.way:
        print(f"{one_run(a.way, a.package):.2f}")
        return
    env = {k: v for k, v in os.environ.items() if not k.endswith("_NUM_THREADS")}
    with tempfile.TemporaryDirectory() as tmp:
        package = Path(tmp) / "overtone_bench"
        package.mkdir()
        for name in ("job.py", "worker.py", "threads.py"):
            (package / name).symlink_to(ROOT / "addon" / name)
        (package / "engine").symlink_to(ROOT / "engine")
        spinners = [subprocess.Popen([sys.executable, "-c", "while True: pass"]) for _ in range(a.busy)]
        try:
            times: dict[str, list[float]] = {w: [] for w in WAYS}
            for _ in range(a.repeat):
                for way in WAYS:
                    out = subprocess.run([sys.executable, __file__, "--way", way, "--package", str(package)],
                                         env=env, capture_output=True, text=True, check=True)
                    times[way].append(float(out.stdout.split()[-1]))
        finally:
            for s in spinners:
                s.terminate()
                s.wait()
    print(f"cold aligned transfer, {a.busy} busy processes, {os.cpu_count()} cores; seconds per run:")
    for way in WAYS:
        print(f"  {way:8s} {' '.join(f'{t:.2f}' for t in times[way])}")
    best = {w: min(t) for w, t in times.items()}
    print(f"plain / limited {best['plain'] / best['limited']:.2f}x; "
          f"worker / limited {best['worker'] / best['limited']:.2f}x (fastest runs)")


if __name__ == "__main__":
    main()
