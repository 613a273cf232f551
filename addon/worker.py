"""The background worker: engine jobs in a separate process, so Blender never freezes.

Standard library only on the Blender side (no ``bpy``): the operators hand a job
folder to :class:`Worker`, which keeps one Python process alive between jobs
(so the pairs it matched stay in its memory, :mod:`.job`), and poll
:meth:`Worker.poll` from a modal timer. The process reads one job folder per
line on stdin and writes into the folder ``progress.json`` while it works, then
``output.json`` / ``output.npz`` or ``error.json``. Cancelling terminates the
process; nothing is ever written to Blender data by it.

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
from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

__all__ = ["Status", "Worker", "child_environment", "limited_threads", "openblas_thread_controls",
           "python_executable", "shared_worker", "stop_shared_worker", "thread_limits"]

_PACKAGE = "_overtone_worker"


def python_executable() -> str:
    """The Python that runs the worker: Blender's own (``sys.executable`` in 4.2+)."""
    return sys.executable


# BLAS thread pools of the worker, unless the user set them: one thread each.
# The engine's eigensolver runs thousands of small dense blocks; with two
# OpenBLAS threads on a machine busy with other work each call waits for a
# descheduled thread, and the factor of a 30k-vertex mesh took 6 s instead of
# 0.2 s. On an idle 2-core machine two threads gained nothing over one (100k
# vertices, 100 eigenpairs: 7.25 s against 7.34 s, benchmarks/eigenbasis_speed.py).
_THREAD_VARIABLES = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS", "VECLIB_MAXIMUM_THREADS")


def thread_limits(environ: Mapping[str, str]) -> dict[str, str]:
    """The rule for every engine run, here or in the worker: the BLAS thread
    variables the user left unset in ``environ``, each set to one thread."""
    return {name: "1" for name in _THREAD_VARIABLES if name not in environ}


def child_environment() -> dict[str, str]:
    """Environment of the worker process: this one's, with ``sys.path`` as
    ``PYTHONPATH``, no user site-packages, and :func:`thread_limits`."""
    env = dict(os.environ)
    paths = [p for p in sys.path if p and os.path.isdir(p)]
    env["PYTHONPATH"] = os.pathsep.join(paths)
    env["PYTHONNOUSERSITE"] = "1"
    env.update(thread_limits(env))
    return env


# In this process the variables come too late: OpenBLAS reads them once, when
# it is loaded, and Blender (or the script) loaded numpy long before. The
# OpenBLAS builds inside the numpy and SciPy wheels export a setter under one of
# these names (prefix "scipy_" in the SciPy wheels, suffix "64_" for the 64-bit
# integer builds; checked with ``nm -D`` on numpy 1.26.4 and 2.4.6 and SciPy
# 1.17.1 for Linux). threadpoolctl does the same, but it is not in Blender.
_OPENBLAS_SETTERS = tuple(f"{prefix}openblas_set_num_threads{suffix}"
                          for prefix in ("", "scipy_") for suffix in ("", "64_", "_64"))


def _loaded_library(path: Path) -> Any:
    """``path`` as a ctypes library if this process has already loaded it, else None."""
    import ctypes
    try:
        if sys.platform == "win32":
            handle = ctypes.windll.kernel32.GetModuleHandleW(str(path))  # type: ignore[attr-defined]
            return ctypes.CDLL(str(path), handle=handle) if handle else None
        return ctypes.CDLL(str(path), mode=os.RTLD_NOLOAD | os.RTLD_NOW)
    except OSError:  # not loaded (RTLD_NOLOAD), or not a library
        return None


def _openblas_files() -> list[Path]:
    """OpenBLAS libraries the loaded numpy and SciPy brought (their wheels keep
    it in ``numpy.libs`` / ``scipy.libs``, or ``.dylibs`` inside the package on
    macOS) and, on Linux, any other this process has mapped (``/proc/self/maps``)."""
    found: set[Path] = set()
    for name in ("numpy", "scipy"):
        where = getattr(sys.modules.get(name), "__file__", None)
        if where:
            package = Path(where).parent
            for folder in (package.parent / f"{name}.libs", package / ".dylibs", package / ".libs"):
                found.update(folder.glob("*openblas*") if folder.is_dir() else ())
    try:
        maps = Path("/proc/self/maps").read_text(encoding="utf-8", errors="replace")
    except OSError:  # not Linux
        maps = ""
    found.update(Path(line[line.index("/"):]) for line in maps.splitlines()  # the path ends each line
                 if "/" in line and "openblas" in line.rsplit("/", 1)[-1].lower())
    return sorted({path.resolve() for path in found})


def openblas_thread_controls() -> list[tuple[Any, Any]]:
    """(set, get) function pairs of every loaded OpenBLAS (:func:`_openblas_files`).
    A numpy built without OpenBLAS (other BLAS, or none) contributes nothing."""
    controls = []
    for path in _openblas_files():
        library = _loaded_library(path)
        for setter in _OPENBLAS_SETTERS if library is not None else ():
            getter = setter.replace("_set_", "_get_")
            if hasattr(library, setter) and hasattr(library, getter):
                controls.append((getattr(library, setter), getattr(library, getter)))
                break
    return controls


@contextmanager
def limited_threads() -> Iterator[None]:
    """Run the enclosed engine work in this process under :func:`thread_limits`:
    OpenBLAS (numpy's and SciPy's) at one thread unless the user set
    ``OPENBLAS_NUM_THREADS``; the previous counts are restored afterwards.
    Usable as a decorator."""
    wanted = thread_limits(os.environ).get("OPENBLAS_NUM_THREADS")
    controls = openblas_thread_controls() if wanted is not None else []
    previous = [int(get()) for _, get in controls]
    for set_threads, _ in controls:
        set_threads(int(wanted or 1))
    try:
        yield
    finally:
        for (set_threads, _), count in zip(controls, previous):
            set_threads(count)


@dataclass(frozen=True)
class Status:
    """Where a job stands: state is "running", "done", "failed" or "died"."""

    state: str
    fraction: float = 0.0
    text: str = ""


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
        """Start the job written in ``folder`` (see :func:`.job.save_input`)."""
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
        if (folder / "output.json").exists():
            return Status("done", 1.0, "done")
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
        progress = _read_json(folder / "progress.json") or {}
        return Status("running", float(progress.get("fraction", 0.0)), str(progress.get("text", "starting")))

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


# --------------------------------------------------------------------------- the process


def _write_json(path: Path, data: Any) -> None:
    tmp = path.with_name(f".{path.name}.tmp")
    tmp.write_text(json.dumps(data), encoding="utf-8")
    os.replace(tmp, path)


def _load_job_module() -> Any:
    import importlib
    import types
    here = os.path.dirname(os.path.abspath(__file__))
    package = types.ModuleType(_PACKAGE)
    package.__path__ = [here]
    sys.modules[_PACKAGE] = package
    return importlib.import_module(_PACKAGE + ".job")


def _serve() -> None:
    job = _load_job_module()
    for line in sys.stdin:
        folder = Path(line.strip())
        if not line.strip():
            continue

        def progress(fraction: float, text: str, folder: Path = folder) -> None:
            _write_json(folder / "progress.json", {"fraction": fraction, "text": text})

        try:
            out = job.run_job(job.load_input(folder), progress)
            job.save_output(folder, out)
        except ValueError as error:
            _write_json(folder / "error.json", {"error": str(error)})
        except Exception as error:  # anything else: say what, never leave the caller waiting
            _write_json(folder / "error.json", {"error": f"internal error: {type(error).__name__}: {error}"})


if __name__ == "__main__":
    _serve()
