#!/usr/bin/env python3
"""Set-up and everyday commands for Overtone developers.

    python3 dev.py demo     run the main job on the built-in demo
    python3 dev.py test     run the whole test suite (what CI runs)
    python3 dev.py bench    run the benchmark scripts
    python3 dev.py fuzz [N] the generated-input tests with N examples each (default 500)

Every command creates (once) and then reuses the environments it needs, with
the pinned versions in ``requirements/``:

    .venv           the engine on numpy 2, scipy, the test reference libraries
    .venv-blender   real Blender (bpy 5.0.1 from PyPI) on numpy 1.26, scipy,
                    the same test libraries: Blender tests and the engine on
                    numpy 1.26
    .venv-typing    mypy with the Blender API stubs (they cannot share an
                    environment with the real bpy)

Only the standard library is used here, so this file runs on a bare Python.
"""

from __future__ import annotations

import hashlib
import os
import re
import shutil
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent
REQ = ROOT / "requirements"

ENVIRONMENTS = {
    ".venv": ["engine.txt", "test.txt"],
    ".venv-blender": ["blender.txt", "test.txt"],
    ".venv-typing": ["typing.txt"],
}


def _python311() -> str:
    """A Python 3.11 interpreter: bpy 5.0.1 is built for CPython 3.11 only."""
    if sys.version_info[:2] == (3, 11):
        return sys.executable
    found = shutil.which("python3.11")
    if found:
        return found
    sys.exit("dev.py: Python 3.11 is needed (bpy 5.0.1 is built for it); "
             f"this is Python {sys.version.split()[0]} and no python3.11 is on PATH")


def _stamp(files: list[str]) -> str:
    digest = hashlib.sha256()
    for name in files:
        digest.update((REQ / name).read_bytes())
    return digest.hexdigest()


def env_python(name: str) -> Path:
    """Create ``name`` if missing or stale, and return its interpreter."""
    files = ENVIRONMENTS[name]
    folder = ROOT / name
    python = folder / "bin" / "python"
    stamp_file = folder / ".overtone-requirements"
    stamp = _stamp(files)
    if python.exists() and stamp_file.exists() and stamp_file.read_text() == stamp:
        return python
    print(f"dev.py: preparing {name} ({', '.join(files)})", flush=True)
    if folder.exists():
        shutil.rmtree(folder)
    subprocess.run([_python311(), "-m", "venv", str(folder)], check=True)
    pip = [str(python), "-m", "pip", "--disable-pip-version-check", "-q"]
    subprocess.run(pip + ["install", "--upgrade", "pip"], check=True)
    args = []
    for f in files:
        args += ["-r", str(REQ / f)]
    subprocess.run(pip + ["install"] + args, check=True)
    stamp_file.write_text(stamp)
    return python


def blender_sandbox_env(base: dict[str, str] | None = None) -> dict[str, str]:
    """Environment that keeps Blender away from the user's home folder."""
    env = dict(os.environ if base is None else base)
    sandbox = ROOT / ".sandbox"
    for var in ("BLENDER_USER_CONFIG", "BLENDER_USER_SCRIPTS", "BLENDER_USER_EXTENSIONS",
                "BLENDER_USER_DATAFILES", "BLENDER_USER_RESOURCES", "XDG_CACHE_HOME"):
        path = sandbox / var.lower()
        path.mkdir(parents=True, exist_ok=True)
        env.setdefault(var, str(path))
    return env


_SUMMARY = re.compile(r"^=*\s*((?:\d+ \w+(?:, )?)+) in [\d.]+s")


def _pytest(python: Path, args: list[str], label: str, env: dict[str, str]) -> tuple[int, dict[str, int]]:
    print(f"\n=== {label} ===", flush=True)
    proc = subprocess.Popen([str(python), "-m", "pytest", *args], cwd=ROOT, env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
    counts: dict[str, int] = {}
    assert proc.stdout is not None
    for line in proc.stdout:
        sys.stdout.write(line)
        match = _SUMMARY.search(line)
        if match:
            for number, word in re.findall(r"(\d+) (\w+)", match.group(1)):
                counts[word] = counts.get(word, 0) + int(number)
    code = proc.wait()
    if code == 5:  # no tests collected in this part
        code = 0
    return code, counts


def cmd_test(extra: list[str]) -> int:
    started = time.time()
    engine_py = env_python(".venv")
    blender_py = env_python(".venv-blender")
    typing_py = env_python(".venv-typing")
    env = blender_sandbox_env()
    env["PYTHONDONTWRITEBYTECODE"] = "1"
    totals: dict[str, int] = {}
    failures = 0
    runs = [
        (engine_py, ["tests", "--ignore=tests/blender", "-q", *extra], "engine tests, numpy 2"),
        (blender_py, ["tests", "-q", *extra], "engine tests on numpy 1.26, and Blender tests in real bpy"),
    ]
    for python, args, label in runs:
        code, counts = _pytest(python, args, label, env)
        failures += code != 0
        for key, value in counts.items():
            totals[key] = totals.get(key, 0) + value
    if any((ROOT / "addon").glob("*.py")):
        print("\n=== mypy over engine/ and addon/ (addon against the Blender stubs) ===", flush=True)
        mypy = subprocess.run([str(typing_py), "-m", "mypy", "--config-file", "pyproject.toml",
                               "engine", "addon"], cwd=ROOT)
        if mypy.returncode != 0:
            failures += 1
            totals["failed"] = totals.get("failed", 0) + 1
        else:
            totals["passed"] = totals.get("passed", 0) + 1
    elapsed = time.time() - started
    print(f"\n(all parts, {elapsed:.0f} s; mypy counted as one test)")
    line = f"{totals.get('passed', 0)} passed, {totals.get('failed', 0) + totals.get('errors', 0) + totals.get('error', 0)} failed"
    if totals.get("skipped"):
        line += f", {totals['skipped']} skipped"
    print(line)
    return 1 if failures else 0


def cmd_demo(extra: list[str]) -> int:
    """The main job in real Blender: build the demo scene, carry colours,
    weights and detail, save the .blend and render before/after pictures."""
    python = env_python(".venv-blender")
    env = blender_sandbox_env()
    args = extra or ["--output", "demo_output"]
    return subprocess.run([str(python), "scripts/demo_scene.py", *args], cwd=ROOT, env=env).returncode


def cmd_bench(extra: list[str]) -> int:
    python = env_python(".venv")
    code = 0
    scripts = sorted((ROOT / "benchmarks").glob("*.py"))
    chosen = [s for s in scripts if not extra or s.stem in extra]
    for script in chosen:
        print(f"\n=== {script.name} ===", flush=True)
        code |= subprocess.run([str(python), str(script)], cwd=ROOT).returncode
    return code


def cmd_fuzz(extra: list[str]) -> int:
    """tests/test_fuzz.py with N randomised examples per category; counts in fuzz_outcomes.json."""
    count = extra[0] if extra and extra[0].isdigit() else "500"
    env = {**os.environ, "OVERTONE_FUZZ_EXAMPLES": count, "OVERTONE_FUZZ_REPORT": str(ROOT / "fuzz_outcomes.json"),
           "OPENBLAS_NUM_THREADS": "1", "OMP_NUM_THREADS": "1"}
    args = ["tests/test_fuzz.py", "-q", *[a for a in extra if a != count]]
    return subprocess.run([str(env_python(".venv")), "-m", "pytest", *args], cwd=ROOT, env=env).returncode


COMMANDS = {"test": cmd_test, "demo": cmd_demo, "bench": cmd_bench, "fuzz": cmd_fuzz}


def main(argv: list[str]) -> int:
    if not argv or argv[0] not in COMMANDS:
        print(__doc__.strip())
        return 0 if argv[:1] in (["-h"], ["--help"]) else 2
    return COMMANDS[argv[0]](argv[1:])


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
