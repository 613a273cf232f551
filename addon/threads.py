"""BLAS thread limits for engine work inside Blender's process and in the worker.

No ``bpy`` here. One rule (:func:`thread_limits`) for every engine run: the
worker process gets it as environment variables (:func:`.worker.child_environment`);
work in Blender's own process (the batch handler, background-mode operators,
scripts calling :func:`.job.run_job`) sets it through OpenBLAS's own setter
(:func:`limited_threads`), since the variables come too late once numpy is loaded.
"""

from __future__ import annotations

import os
import sys
from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from pathlib import Path
from typing import Any

__all__ = ["thread_limits", "openblas_thread_controls", "limited_threads"]


# BLAS thread pools of the worker, unless the user set them: one thread each.
# The engine's eigensolver runs thousands of small dense blocks; with two
# OpenBLAS threads on a machine busy with other work each call waits for a
# descheduled thread and the factor takes many times longer; on an idle 2-core
# machine two threads gained nothing over one (figures: docs/measurements.md,
# "Add-on: Blender data access and BLAS threads").
_THREAD_VARIABLES = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS", "VECLIB_MAXIMUM_THREADS")


def thread_limits(environ: Mapping[str, str]) -> dict[str, str]:
    """The rule for every engine run, here or in the worker: the BLAS thread
    variables the user left unset in ``environ``, each set to one thread."""
    return {name: "1" for name in _THREAD_VARIABLES if name not in environ}


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
