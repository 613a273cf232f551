"""The allocator settings of one-job processes (engine/common/allocator.py).

Checked against the operating system's own count of a process's resident
pages (/proc/self/statm, Linux proc(5)): freed arrays stay resident after
:func:`keep_freed_memory` and leave after :func:`release_freed_memory`.
"""

from __future__ import annotations

import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]

SCRIPT = textwrap.dedent("""
    import os, sys
    import numpy as np
    from engine.common.allocator import keep_freed_memory, release_freed_memory

    def resident_mib():
        with open("/proc/self/statm") as f:
            return int(f.read().split()[1]) * os.sysconf("SC_PAGE_SIZE") / 2**20

    if sys.argv[1] == "keep":
        assert keep_freed_memory()
    base = resident_mib()
    blocks = [np.ones(2_000_000) for _ in range(20)]     # 20 blocks of 15 MiB, written
    del blocks
    after_free = resident_mib() - base
    release_freed_memory()
    after_release = resident_mib() - base
    print(f"{after_free:.0f} {after_release:.0f}")
""")


def _resident_after(mode: str) -> tuple[float, float]:
    out = subprocess.run([sys.executable, "-c", SCRIPT, mode], cwd=ROOT, capture_output=True, text=True,
                         check=True, env={"PYTHONPATH": str(ROOT), "OPENBLAS_NUM_THREADS": "1"})
    free, release = out.stdout.split()
    return float(free), float(release)


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="glibc's allocator only")
def test_freed_arrays_are_kept_then_released() -> None:
    kept, released = _resident_after("keep")
    assert kept > 200, f"only {kept:.0f} MiB of the 300 MiB freed stayed resident"
    assert released < 50, f"{released:.0f} MiB still resident after the release"


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="glibc's allocator only")
def test_default_settings_return_large_arrays() -> None:
    """Without the settings the same freed blocks leave at once (the cost the settings avoid)."""
    kept, _ = _resident_after("default")
    assert kept < 50

