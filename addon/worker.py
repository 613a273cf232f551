"""The background worker: engine jobs in a separate process, so Blender never freezes.

No ``bpy`` here: the operators write a job into a folder (:func:`save_input`)
and hand it to :class:`Worker`, which keeps one Python process alive between
jobs (so the pairs it matched stay in its memory, :data:`.job.PAIRS`), and
poll :meth:`Worker.poll` from a modal timer. Cancelling terminates the
process; nothing is ever written to Blender data by it.

The file protocol (one folder per job)
    ``input.npz`` then ``input.json``    the job (:func:`save_input`)
    ``progress.json``                    the stage it is in while it runs: ``{"stage", "done",
                                         "total", "seconds", "fraction"}`` (:func:`step_record`)
    ``output.npz`` then ``output.json``  the result (:func:`save_output`)
    ``error.json``                       ``{"error"}`` when it failed
Every file is written whole (``engine/common/atomic.py``); the ``.json`` of a
pair is written last, so its presence means the pair is complete.

Run as a script (``python worker.py``) this file is the process itself: it
loads :mod:`.job` and the bundled engine from its own folder without running
the add-on's ``__init__`` (which needs ``bpy``).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import tempfile
import time
import types
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

_PACKAGE = "_overtone_worker"

if __name__ == "__main__" and not __package__:
    # Run as the worker process: make this folder a package without its
    # __init__ (which needs bpy), so the relative imports below resolve.
    _package = types.ModuleType(_PACKAGE)
    _package.__path__ = [os.path.dirname(os.path.abspath(__file__))]
    sys.modules[_PACKAGE] = _package
    __package__ = _PACKAGE

import numpy as np  # noqa: E402  (after the package set-up above)

from .engine import MeshData, Settings, Signal  # noqa: E402
from .engine.common.allocator import keep_freed_memory, release_freed_memory  # noqa: E402
from .engine.common.atomic import atomic_write  # noqa: E402
from .engine.common.progress import DONE, WRITING, Step, job_stages, showing, stage  # noqa: E402
from .job import JobInput, JobOutput, run_job  # noqa: E402
from .threads import thread_limits  # noqa: E402

__all__ = ["Status", "Worker", "step_record", "step_of", "child_environment", "python_executable", "shared_worker", "stop_shared_worker",
           "save_input", "load_input", "save_output", "load_output"]


def python_executable() -> str:
    """The Python that runs the worker: Blender's own (``sys.executable`` in 4.2+)."""
    return sys.executable


def child_environment() -> dict[str, str]:
    """Environment of the worker process: this one's, with ``sys.path`` as
    ``PYTHONPATH``, no user site-packages, and :func:`thread_limits`."""
    env = dict(os.environ)
    paths = [p for p in sys.path if p and os.path.isdir(p)]
    env["PYTHONPATH"] = os.pathsep.join(paths)
    env["PYTHONNOUSERSITE"] = "1"
    env.update(thread_limits(env))
    return env


@dataclass(frozen=True)
class Status:
    """Where a job stands: state is "running", "done", "failed" or "died"; ``step``, the
    engine's stage it last entered (None before the first), and ``done`` once done."""

    state: str
    fraction: float = 0.0
    text: str = ""
    step: Step | None = None


def step_record(step: Step) -> dict[str, Any]:
    """A stage as the progress file holds it."""
    return {"stage": step.name, "done": step.done, "total": step.total, "seconds": round(step.seconds, 3),
            "fraction": step.fraction}


def step_of(record: Any) -> Step | None:
    """The stage a progress file holds (None for none, or one not written by :func:`step_record`)."""
    try:
        return Step(str(record["stage"]), int(record["done"]), int(record["total"]), float(record["seconds"]))
    except (KeyError, TypeError, ValueError):
        return None


def _read_json(path: Path) -> Any:
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None


class Worker:
    """One worker process, started on demand and reused between jobs."""

    def __init__(self) -> None:
        self.process: subprocess.Popen[str] | None = None
        self.folder: Path | None = None
        self.log: Path | None = None

    @property
    def alive(self) -> bool:
        return self.process is not None and self.process.poll() is None

    def _start(self) -> subprocess.Popen[str]:
        env = child_environment()
        handle, log = tempfile.mkstemp(prefix="overtone-worker-", suffix=".log")
        self.log = Path(log)
        try:
            return subprocess.Popen([python_executable(), "-u", __file__], stdin=subprocess.PIPE,
                                    stdout=subprocess.DEVNULL, stderr=handle, text=True, env=env)
        finally:
            os.close(handle)

    def submit(self, folder: Path) -> None:
        """Start the job written in ``folder`` (see :func:`save_input`)."""
        if self.folder is not None and self.poll().state == "running":
            raise ValueError("a job is already running: wait for it or press Esc")
        if not self.alive:
            self.process = self._start()
        assert self.process is not None and self.process.stdin is not None
        self.folder = folder
        self.process.stdin.write(str(folder) + "\n")
        self.process.stdin.flush()

    def poll(self) -> Status:
        """The current job's status (cheap: reads small files)."""
        folder = self.folder
        if folder is None:
            return Status("failed", 0.0, "no job submitted")
        step = step_of(_read_json(folder / "progress.json"))
        if (folder / "output.json").exists():
            last = step or Step(DONE, 1, 1, 0.0)
            return Status("done", 1.0, DONE, Step(DONE, last.total, last.total, last.seconds))
        error = _read_json(folder / "error.json")
        if error is not None:
            return Status("failed", 1.0, str(error.get("error", "unknown error")))
        if not self.alive:
            stderr = ""
            if self.log is not None:
                try:
                    stderr = self.log.read_text(encoding="utf-8", errors="replace")[-2000:]
                except OSError:
                    pass
            return Status("died", 1.0, f"the worker process stopped ({stderr.strip() or 'no message'})")
        if step is None:
            return Status("running", 0.0, "starting")
        return Status("running", step.fraction, step.name, step)

    def wait(self, timeout: float = 600.0, interval: float = 0.05) -> Status:
        """Poll until the job is no longer running (for tests and scripts)."""
        end = time.monotonic() + timeout
        status = self.poll()
        while status.state == "running" and time.monotonic() < end:
            time.sleep(interval)
            status = self.poll()
        return status

    def cancel(self) -> None:
        """Stop the current job by terminating the process (the next job starts a fresh one)."""
        if self.process is not None:
            if self.process.poll() is None:
                self.process.terminate()
                try:
                    self.process.wait(timeout=5)
                except subprocess.TimeoutExpired:
                    self.process.kill()
                    self.process.wait()
            if self.process.stdin is not None:
                self.process.stdin.close()
        if self.log is not None:
            self.log.unlink(missing_ok=True)
        self.process = None
        self.folder = None
        self.log = None

    def stop(self) -> None:
        """End the process (closing stdin lets it finish its loop)."""
        self.cancel()


_shared: Worker | None = None


def shared_worker() -> Worker:
    """The add-on's one worker."""
    global _shared
    if _shared is None:
        _shared = Worker()
    return _shared


def stop_shared_worker() -> None:
    global _shared
    if _shared is not None:
        _shared.stop()
        _shared = None


# --------------------------------------------------------------------------- the files


def _write_json(path: Path, data: Any) -> None:
    with atomic_write(path, text=True) as fh:
        fh.write(json.dumps(data))


def _write(folder: Path, meta: dict[str, Any], arrays: dict[str, Any], stem: str) -> None:
    folder.mkdir(parents=True, exist_ok=True)
    with atomic_write(folder / f"{stem}.npz") as fh:
        np.savez(fh, **arrays)
    _write_json(folder / f"{stem}.json", meta)  # written last: its presence means complete


def _mesh_meta(mesh: MeshData, prefix: str, arrays: dict[str, Any]) -> dict[str, Any]:
    arrays[f"{prefix}_vertices"] = mesh.vertices
    arrays[f"{prefix}_corners"] = mesh.corners
    arrays[f"{prefix}_sizes"] = mesh.sizes
    given = mesh.given_triangles()
    if given is not None:
        arrays[f"{prefix}_tris"], arrays[f"{prefix}_tri_polygon"] = given
    return {"triangles": given is not None}


def save_input(folder: Path, inp: JobInput) -> None:
    """Write a job into ``folder`` (``input.npz`` then ``input.json``)."""
    arrays: dict[str, Any] = {}
    settings = asdict(inp.settings)
    settings["landmarks"] = [list(p) for p in inp.settings.landmarks]
    meta: dict[str, Any] = {
        "kind": inp.kind, "source": _mesh_meta(inp.source, "source", arrays),
        "target": _mesh_meta(inp.target, "target", arrays) if inp.target is not None else None,
        "signals": [], "landmark_groups": sorted(inp.landmark_groups), "settings": settings,
        "names": list(inp.names), "cache_folder": inp.cache_folder,
        "cache_limit_bytes": inp.cache_limit_bytes,
    }
    for i, sig in enumerate(inp.signals):
        meta["signals"].append({"name": sig.name, "kind": sig.kind, "domain": sig.domain,
                                "data_type": sig.data_type, "dtype": np.dtype(sig.dtype).str})
        arrays[f"signal_{i}"] = sig.values
    for i, name in enumerate(meta["landmark_groups"]):
        arrays[f"group_source_{i}"], arrays[f"group_target_{i}"] = inp.landmark_groups[name]
    _write(folder, meta, arrays, "input")


def _mesh_from(prefix: str, z: Any, meta: dict[str, Any]) -> MeshData:
    given = bool(meta.get("triangles"))
    return MeshData(z[f"{prefix}_vertices"], z[f"{prefix}_corners"], z[f"{prefix}_sizes"],
                    tris=z[f"{prefix}_tris"] if given else None,
                    tri_polygon=z[f"{prefix}_tri_polygon"] if given else None)


def load_input(folder: Path) -> JobInput:
    """Read a job written by :func:`save_input`.

    Raises
    ------
    ValueError
        When the settings in the file are not the engine's.
    """
    meta = json.loads((folder / "input.json").read_text(encoding="utf-8"))
    try:
        settings = Settings(**meta["settings"])
    except (TypeError, ValueError) as error:
        raise ValueError(f"bad settings: {error}") from None
    with np.load(folder / "input.npz", allow_pickle=False) as z:
        signals = tuple(Signal(s["name"], s["kind"], z[f"signal_{i}"], np.dtype(s["dtype"]),
                               s["domain"], s["data_type"]) for i, s in enumerate(meta["signals"]))
        groups = {name: (z[f"group_source_{i}"], z[f"group_target_{i}"])
                  for i, name in enumerate(meta["landmark_groups"])}
        source = _mesh_from("source", z, meta["source"])
        target = _mesh_from("target", z, meta["target"]) if meta["target"] is not None else None
    return JobInput(meta["kind"], source, target, signals, groups, settings,
                    (meta["names"][0], meta["names"][1]), meta["cache_folder"],
                    int(meta["cache_limit_bytes"]))


def save_output(folder: Path, out: JobOutput) -> None:
    """Write a job's result into ``folder`` (``output.npz`` then ``output.json``)."""
    names = sorted(out.values)
    arrays: dict[str, Any] = {f"value_{i}": out.values[name] for i, name in enumerate(names)}
    if out.confidence is not None:
        arrays["confidence"] = out.confidence
    if out.positions is not None:
        arrays["positions"] = out.positions
    _write(folder, {"names": names, "report": out.report}, arrays, "output")


def load_output(folder: Path) -> JobOutput:
    """Read a result written by :func:`save_output`."""
    meta = json.loads((folder / "output.json").read_text(encoding="utf-8"))
    with np.load(folder / "output.npz", allow_pickle=False) as z:
        values = {name: z[f"value_{i}"] for i, name in enumerate(meta["names"])}
        confidence = z["confidence"] if "confidence" in z.files else None
        positions = z["positions"] if "positions" in z.files else None
    return JobOutput(values, confidence, positions, meta["report"])


# --------------------------------------------------------------------------- the process


def serve_folder(folder: Path) -> None:
    """Run the job in ``folder``: its output, or ``error.json`` saying why not. The stages
    it passes (``engine/common/progress.py``) go to ``progress.json`` as they come."""

    def progress(step: Step) -> None:
        _write_json(folder / "progress.json", step_record(step))

    try:
        inp = load_input(folder)
        with showing(progress, job_stages(inp.kind)):
            out = run_job(inp)
            stage(WRITING)
            save_output(folder, out)
    except ValueError as error:
        _write_json(folder / "error.json", {"error": str(error)})
    except Exception as error:  # anything else: say what, never leave the caller waiting
        _write_json(folder / "error.json", {"error": f"internal error: {type(error).__name__}: {error}"})


def _serve() -> None:
    keep_freed_memory()
    for line in sys.stdin:
        if line.strip():
            serve_folder(Path(line.strip()))
            release_freed_memory()     # the worker waits for the next job: nothing kept


if __name__ == "__main__":
    _serve()
