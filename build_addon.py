#!/usr/bin/env python3
"""Assemble the Blender extension: ``python build_addon.py`` -> ``dist/overtone-<version>.zip``.

The zip holds ``blender_manifest.toml``, the add-on (``addon/*.py`` at the top
level), the engine as the subpackage ``engine/``, and unmodified SciPy wheels
under ``wheels/`` for linux-x64, windows-x64, macos-arm64 and macos-x64, each
for CPython 3.11 (Blender 4.2-5.0) and CPython 3.13 (Blender 5.1). Blender's
installer keeps only the wheels whose platform and Python tag match the running
Blender (``bl_pkg/bl_extension_ops.py``, ``_extensions_wheel_filter_for_this_system``),
so one zip serves every platform and both Python versions.

Wheels are fetched once with ``pip download`` into ``.cache/wheels/`` and
reused. The zip is deterministic (sorted entries, fixed timestamps and
permissions); a build whose inputs have not changed reuses the zip in ``dist/``
(the digest of the inputs sits beside it). When ``bpy`` is importable here,
Blender's own validator checks the result.

Standard library only.

    python build_addon.py [--output-dir DIR] [--force] [--no-validate] [--python 3.11 3.13]
"""

from __future__ import annotations

import argparse
import hashlib
import importlib.util
import re
import subprocess
import sys
import tempfile
import time
import zipfile
from pathlib import Path

ROOT = Path(__file__).resolve().parent
WHEEL_CACHE = ROOT / ".cache" / "wheels"
EXTENSION_ID = "overtone"

# (Blender platform, platform tag given to pip, how the chosen wheel's platform tag ends).
# One wheel per platform and Python: Blender ignores the macOS version in the tag,
# so two macOS wheels of one architecture would both be installed. The oldest
# macOS builds SciPy publishes are chosen (arm64: 12.0, x86-64: 10.14).
PLATFORMS = [
    ("linux-x64", "manylinux_2_28_x86_64", "manylinux_2_28_x86_64"),
    ("windows-x64", "win_amd64", "win_amd64"),
    ("macos-arm64", "macosx_12_0_arm64", "macosx_12_0_arm64"),
    ("macos-x64", "macosx_10_14_x86_64", "macosx_10_14_x86_64"),
]
PYTHONS = ("3.11", "3.13")
TAGLINE = "Carry colours, weights and detail between meshes by their shape"
MAINTAINER = "Overtone developers"
PERMISSION_FILES = "Cache of surface eigenbases; batch job, report and .blend files"
_EPOCH = (2024, 1, 1, 0, 0, 0)  # fixed zip timestamp: the build is reproducible


class BuildError(RuntimeError):
    pass


def _pinned(relative: str, pattern: str, what: str) -> str:
    match = re.search(pattern, (ROOT / relative).read_text(encoding="utf-8"), re.M)
    if not match:
        raise BuildError(f"{relative} has no {what}")
    return match.group(1)


def engine_version() -> str:
    return _pinned("engine/__init__.py", r'^__version__\s*=\s*["\']([^"\']+)["\']',
                   '__version__ = "X.Y.Z"')


def scipy_pin() -> str:
    return _pinned("requirements/engine.txt", r"^scipy==([\w.]+)\s*$", "scipy==X pin")


def _wheel_glob(version: str, python: str, tag_end: str) -> str:
    cp = "cp" + python.replace(".", "")
    return f"scipy-{version}-{cp}-{cp}-*{tag_end}.whl"


def fetch_wheels(version: str, pythons: tuple[str, ...]) -> list[Path]:
    """The SciPy wheels, downloaded into ``.cache/wheels/`` on first use."""
    WHEEL_CACHE.mkdir(parents=True, exist_ok=True)
    wheels = []
    for python in pythons:
        for blender_platform, pip_platform, tag_end in PLATFORMS:
            pattern = _wheel_glob(version, python, tag_end)
            found = sorted(WHEEL_CACHE.glob(pattern))
            if not found:
                with tempfile.TemporaryDirectory(dir=WHEEL_CACHE) as tmp:
                    cmd = [sys.executable, "-m", "pip", "download", "--disable-pip-version-check",
                           "-q", "--only-binary=:all:", "--python-version", python,
                           "--platform", pip_platform, "--no-deps", "-d", tmp,
                           f"scipy=={version}"]
                    print(f"build_addon: downloading scipy {version} for {blender_platform}, "
                          f"Python {python}", flush=True)
                    proc = subprocess.run(cmd, capture_output=True, text=True)
                    got = sorted(Path(tmp).glob(pattern))
                    if proc.returncode != 0 or not got:
                        tail = (proc.stderr or proc.stdout).strip().splitlines()[-3:]
                        raise BuildError(
                            f"could not download scipy=={version} for {blender_platform} "
                            f"(pip platform {pip_platform}, Python {python}): "
                            + (" | ".join(tail) or f"no file matching {pattern}"))
                    for path in got:
                        path.replace(WHEEL_CACHE / path.name)
                found = sorted(WHEEL_CACHE.glob(pattern))
            if len(found) != 1:
                raise BuildError(f"expected one wheel matching {pattern} in {WHEEL_CACHE}, "
                                 f"found {[p.name for p in found]}")
            wheels.append(found[0])
    return sorted(wheels, key=lambda p: p.name)


def manifest(version: str, wheels: list[Path]) -> str:
    """``blender_manifest.toml`` text."""
    def strings(items: list[str]) -> str:
        return "[\n" + "".join(f'  "{item}",\n' for item in items) + "]"

    return "\n".join([
        'schema_version = "1.0.0"',
        "",
        f'id = "{EXTENSION_ID}"',
        f'version = "{version}"',
        'name = "Overtone"',
        f'tagline = "{TAGLINE}"',
        f'maintainer = "{MAINTAINER}"',
        'type = "add-on"',
        'tags = ["Mesh", "Modeling"]',
        'blender_version_min = "4.2.0"',
        'license = ["SPDX:GPL-3.0-or-later"]',
        f"platforms = {strings([p[0] for p in PLATFORMS])}",
        f"wheels = {strings([f'./wheels/{w.name}' for w in wheels])}",
        "",
        "[permissions]",
        f'files = "{PERMISSION_FILES}"',
        "",
    ])


def _sources() -> list[tuple[str, Path]]:
    """(name in the zip, file) for the add-on, the engine and the licence."""
    entries = [(p.name, p) for p in sorted((ROOT / "addon").glob("*.py"))]
    if not entries:
        raise BuildError("addon/ has no Python files")
    engine = ROOT / "engine"
    entries += [(f"engine/{p.relative_to(engine).as_posix()}", p)
                for p in sorted(engine.rglob("*.py")) if "__pycache__" not in p.parts]
    entries.append(("LICENSE", ROOT / "LICENSE"))
    return entries


def _info(name: str, compress: int) -> zipfile.ZipInfo:
    info = zipfile.ZipInfo(name, date_time=_EPOCH)
    info.compress_type = compress
    info.external_attr = 0o644 << 16
    info.create_system = 3  # unix, whatever builds it
    return info


def find_validator() -> Path | None:
    """Blender's packaging script, from the ``bpy`` wheel if this Python has one."""
    spec = importlib.util.find_spec("bpy")
    if spec is None or not spec.submodule_search_locations:
        return None
    for base in spec.submodule_search_locations:
        found = sorted(Path(base).glob("*/scripts/addons_core/bl_pkg/cli/blender_ext.py"))
        if found:
            return found[-1]
    return None


def validate(zip_path: Path, validator: Path) -> None:
    proc = subprocess.run([sys.executable, str(validator), "validate", str(zip_path)],
                          capture_output=True, text=True)
    if proc.returncode != 0:
        raise BuildError(f"Blender's validator rejected {zip_path.name}: "
                         f"{(proc.stdout + proc.stderr).strip()}")


def build(output_dir: Path = ROOT / "dist", *, force: bool = False,
          pythons: tuple[str, ...] = PYTHONS) -> Path:
    """Build (or reuse) the extension zip; return its path."""
    version = engine_version()
    wheels = fetch_wheels(scipy_pin(), pythons)
    text = manifest(version, wheels)
    sources = _sources()
    digest = hashlib.sha256(Path(__file__).read_bytes())
    digest.update(text.encode())
    for name, path in sources:
        digest.update(name.encode() + b"\0" + path.read_bytes())
    for wheel in wheels:
        digest.update(wheel.name.encode() + b"\0" + str(wheel.stat().st_size).encode())
    stamp = digest.hexdigest()

    output_dir.mkdir(parents=True, exist_ok=True)
    target = output_dir / f"{EXTENSION_ID}-{version}.zip"
    stamp_file = target.with_name(target.name + ".inputs")
    if (not force and target.exists() and stamp_file.exists()
            and stamp_file.read_text().strip() == stamp):
        print(f"build_addon: {target} is up to date")
        return target

    partial = target.with_name(target.name + ".part")
    with zipfile.ZipFile(partial, "w") as archive:
        archive.writestr(_info("blender_manifest.toml", zipfile.ZIP_DEFLATED), text)
        for name, path in sources:
            archive.writestr(_info(name, zipfile.ZIP_DEFLATED), path.read_bytes())
        for wheel in wheels:  # already compressed: stored as they are
            with wheel.open("rb") as src, archive.open(
                    _info(f"wheels/{wheel.name}", zipfile.ZIP_STORED), "w") as dst:
                while chunk := src.read(1 << 20):
                    dst.write(chunk)
    partial.replace(target)
    stamp_file.write_text(stamp + "\n")
    return target


def main(argv: list[str]) -> int:
    parser = argparse.ArgumentParser(prog="build_addon.py", description=__doc__.split("\n\n")[0])
    parser.add_argument("--output-dir", type=Path, default=ROOT / "dist")
    parser.add_argument("--force", action="store_true", help="rebuild even if up to date")
    parser.add_argument("--no-validate", action="store_true",
                        help="skip Blender's validator even when bpy is available")
    parser.add_argument("--python", nargs="+", default=list(PYTHONS), choices=PYTHONS,
                        help="Python versions to bundle SciPy wheels for")
    args = parser.parse_args(argv)
    started = time.perf_counter()
    try:
        path = build(args.output_dir, force=args.force, pythons=tuple(args.python))
        validator = None if args.no_validate else find_validator()
        if validator is not None:
            validate(path, validator)
            print(f"build_addon: Blender's validator accepts {path.name}")
        elif not args.no_validate:
            print("build_addon: bpy not importable here, Blender's validator not run")
    except (BuildError, OSError) as error:
        print(f"build_addon: error: {error}", file=sys.stderr)
        return 1
    size = path.stat().st_size / 1e6
    print(f"build_addon: {path} ({size:.1f} MB, {time.perf_counter() - started:.1f} s)")
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
