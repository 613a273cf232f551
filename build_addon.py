#!/usr/bin/env python3
"""Assemble the Blender extension: one zip per platform in ``dist/``.

``python build_addon.py`` writes ``dist/overtone-<version>-<platform>.zip`` for
linux_x64, windows_x64, macos_arm64 and macos_x64. Each holds
``blender_manifest.toml``, the add-on (``addon/*.py`` at the top level), the
engine as the subpackage ``engine/``, and the unmodified wheels of the
engine's dependencies Blender does not ship (:data:`BUNDLED`: SciPy,
mapbox-earcut, fast-simplification) for its platform under ``wheels/``, for CPython 3.11 (Blender
4.2-5.0) and CPython 3.13 (Blender 5.1).

The split is the one Blender's own ``blender_ext.py build --split-platforms``
makes (``bl_pkg/cli/blender_ext.py`` in the bpy wheel, 4.2 to 5.0): the same
file names, the manifest as written plus a ``[build.generated]`` table naming
the zip's one platform and its wheels (Blender 4.2+ reads that table in place
of the top-level ``platforms`` and ``wheels``), and only that platform's wheels
in the zip. It is done here rather than by calling that script so the build
needs no Blender (standard library only) and stays reproducible; the tests
compare the two.

``--all-platforms`` writes the single ``dist/overtone-<version>.zip`` with every
wheel instead (Blender's installer keeps the wheels matching its platform and
Python: ``bl_pkg/bl_extension_ops.py``, ``_extensions_wheel_filter_for_this_system``).

Wheels are fetched once with ``pip download`` into ``.cache/wheels/`` and
reused. Each zip is deterministic (sorted entries, fixed timestamps and
permissions); a zip whose inputs have not changed is reused from ``dist/`` (the
digest of its inputs sits beside it). When ``bpy`` is importable here,
Blender's own validator checks every zip written.

    python build_addon.py [--platform P ...] [--all-platforms] [--python 3.11 3.13]
                          [--output-dir DIR] [--force] [--no-validate]
"""

from __future__ import annotations

import argparse
import hashlib
import importlib.util
import platform as platform_module
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

# (Blender platform, platform tag given to pip). pip picks the newest wheel whose
# tag this platform accepts, one per package, platform and Python: Blender ignores
# the macOS version in a tag, so two macOS wheels of one architecture would both be
# installed. The tags are the oldest SciPy publishes (macOS arm64 12.0, x86-64 10.14).
PLATFORMS = [
    ("linux-x64", "manylinux_2_28_x86_64"),
    ("windows-x64", "win_amd64"),
    ("macos-arm64", "macosx_12_0_arm64"),
    ("macos-x64", "macosx_10_14_x86_64"),
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


BUNDLED = ("scipy", "mapbox-earcut", "fast-simplification")
"""The engine's dependencies Blender does not ship (it ships NumPy), bundled as wheels."""


def bundled_pins() -> dict[str, str]:
    """name -> pinned version of each :data:`BUNDLED` package, from ``requirements/engine.txt``."""
    return {name: _pinned("requirements/engine.txt", rf"^{re.escape(name)}==([\w.]+)\s*$", f"{name}==X pin")
            for name in BUNDLED}


def wheel_platform(path: Path) -> str | None:
    """The Blender platform a wheel's platform tag names; None for a pure-Python wheel."""
    tag = path.stem.rsplit("-", 1)[-1]
    if tag == "any":
        return None
    if "win_amd64" in tag:
        return "windows-x64"
    if "macosx" in tag:
        return "macos-arm64" if "arm64" in tag else "macos-x64"
    if "linux" in tag and "x86_64" in tag:
        return "linux-x64"
    raise BuildError(f"wheel {path.name} is for no platform this extension ships")


def _download(name: str, version: str, python: str, platform: tuple[str, str], folder: Path) -> Path:
    """One wheel of ``name==version`` for one platform and Python, into ``folder``."""
    blender_platform, pip_platform = platform
    folder.mkdir(parents=True, exist_ok=True)
    with tempfile.TemporaryDirectory(dir=folder) as tmp:
        cmd = [sys.executable, "-m", "pip", "download", "--disable-pip-version-check",
               "-q", "--only-binary=:all:", "--python-version", python,
               "--platform", pip_platform, "--no-deps", "-d", tmp, f"{name}=={version}"]
        print(f"build_addon: downloading {name} {version} for {blender_platform}, Python {python}", flush=True)
        proc = subprocess.run(cmd, capture_output=True, text=True)
        got = sorted(Path(tmp).glob("*.whl"))
        if proc.returncode != 0 or len(got) != 1:
            tail = (proc.stderr or proc.stdout).strip().splitlines()[-3:]
            raise BuildError(f"could not download {name}=={version} for {blender_platform} "
                             f"(pip platform {pip_platform}, Python {python}): "
                             + (" | ".join(tail) or "no wheel"))
        return got[0].replace(folder / got[0].name)


def fetch_wheels(pins: dict[str, str], pythons: tuple[str, ...]) -> list[Path]:
    """The bundled wheels (:data:`BUNDLED`), downloaded into ``.cache/wheels/`` on first use:
    one per package, platform and Python."""
    wheels = []
    for python in pythons:
        for platform in PLATFORMS:
            folder = WHEEL_CACHE / f"py{python}" / platform[0]
            for name, version in pins.items():
                stem = f"{re.sub(r'[-_.]+', '_', name)}-{version}-"
                found = sorted(folder.glob(stem + "*.whl")) if folder.is_dir() else []
                if len(found) > 1:
                    raise BuildError(f"expected one {name} {version} wheel in {folder}, "
                                     f"found {[p.name for p in found]}")
                wheels.append(found[0] if found else _download(name, version, python, platform, folder))
    return sorted(wheels, key=lambda p: p.name)


def _strings(items: list[str]) -> str:
    return "[\n" + "".join(f'  "{item}",\n' for item in items) + "]"


def manifest(version: str, wheels: list[Path]) -> str:
    """``blender_manifest.toml`` text, naming every platform and wheel."""
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
        f"platforms = {_strings([p[0] for p in PLATFORMS])}",
        f"wheels = {_strings([f'./wheels/{w.name}' for w in wheels])}",
        "",
        "[permissions]",
        f'files = "{PERMISSION_FILES}"',
        "",
    ])


def platform_wheels(wheels: list[Path], platform: str) -> list[Path]:
    """The wheels of one Blender platform (the tag the wheel was fetched for)."""
    return [w for w in wheels if wheel_platform(w) in (platform, None)]


def generated_table(platform: str, wheels: list[Path]) -> str:
    """The ``[build.generated]`` table Blender's ``build --split-platforms``
    appends to the manifest of a one-platform zip (same text)."""
    names = ", ".join(f'"./wheels/{w.name}"' for w in platform_wheels(wheels, platform))
    return ("\n\n# BEGIN GENERATED CONTENT.\n# This must not be included in source manifests.\n"
            f'[build.generated]\nplatforms = ["{platform}"]\nwheels = [{names}]\n'
            "# END GENERATED CONTENT.\n")


def this_platform() -> str:
    """The Blender platform name of this machine (``linux-x64``, ...)."""
    system = {"darwin": "macos", "win32": "windows"}.get(sys.platform, sys.platform)
    machine = platform_module.machine().lower()
    arch = {"x86_64": "x64", "amd64": "x64", "aarch64": "arm64"}.get(machine, machine)
    name = f"{system}-{arch}"
    if name not in {p[0] for p in PLATFORMS}:
        raise BuildError(f"no extension build for this machine ({name}); "
                         f"builds exist for {', '.join(p[0] for p in PLATFORMS)}")
    return name


def zip_name(version: str, platform: str | None) -> str:
    """``overtone-<version>.zip``, or ``overtone-<version>-<platform>.zip`` (``-`` as ``_``)."""
    suffix = f"-{platform.replace('-', '_')}" if platform else ""
    return f"{EXTENSION_ID}-{version}{suffix}.zip"


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


def _write_zip(target: Path, text: str, sources: list[tuple[str, Path]], wheels: list[Path],
               *, force: bool) -> Path:
    """Write one zip (or reuse it when the digest of its inputs is unchanged)."""
    digest = hashlib.sha256(Path(__file__).read_bytes())
    digest.update(text.encode())
    for name, path in sources:
        digest.update(name.encode() + b"\0" + path.read_bytes())
    for wheel in wheels:
        digest.update(wheel.name.encode() + b"\0" + str(wheel.stat().st_size).encode())
    stamp = digest.hexdigest()
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


def build(output_dir: Path = ROOT / "dist", *, force: bool = False,
          pythons: tuple[str, ...] = PYTHONS, platforms: tuple[str, ...] | None = None,
          all_platforms: bool = False) -> list[Path]:
    """Build (or reuse) the extension zips; return their paths.

    One zip per platform in ``platforms`` (default: all four), or with
    ``all_platforms`` the one zip carrying every platform's wheels.
    """
    chosen = tuple(p[0] for p in PLATFORMS) if platforms is None else platforms
    unknown = set(chosen) - {p[0] for p in PLATFORMS}
    if unknown:
        raise BuildError(f"unknown platform(s) {', '.join(sorted(unknown))}; "
                         f"choose from {', '.join(p[0] for p in PLATFORMS)}")
    version = engine_version()
    wheels = fetch_wheels(bundled_pins(), pythons)
    text = manifest(version, wheels)
    sources = _sources()
    output_dir.mkdir(parents=True, exist_ok=True)
    if all_platforms:
        return [_write_zip(output_dir / zip_name(version, None), text, sources, wheels, force=force)]
    return [_write_zip(output_dir / zip_name(version, platform), text + generated_table(platform, wheels),
                       sources, platform_wheels(wheels, platform), force=force)
            for platform in chosen]


def main(argv: list[str]) -> int:
    parser = argparse.ArgumentParser(prog="build_addon.py", description=__doc__.split("\n\n")[0])
    parser.add_argument("--output-dir", type=Path, default=ROOT / "dist")
    parser.add_argument("--force", action="store_true", help="rebuild even if up to date")
    parser.add_argument("--no-validate", action="store_true",
                        help="skip Blender's validator even when bpy is available")
    parser.add_argument("--python", nargs="+", default=list(PYTHONS), choices=PYTHONS,
                        help="Python versions to bundle SciPy wheels for")
    which = parser.add_mutually_exclusive_group()
    which.add_argument("--platform", nargs="+", choices=[p[0] for p in PLATFORMS],
                       help="build the zips of these platforms only (default: all four)")
    which.add_argument("--all-platforms", action="store_true",
                       help="one zip with the wheels of every platform instead of one per platform")
    args = parser.parse_args(argv)
    started = time.perf_counter()
    try:
        paths = build(args.output_dir, force=args.force, pythons=tuple(args.python),
                      platforms=tuple(args.platform) if args.platform else None,
                      all_platforms=args.all_platforms)
        validator = None if args.no_validate else find_validator()
        for path in paths if validator is not None else ():
            validate(path, validator)
            print(f"build_addon: Blender's validator accepts {path.name}")
        if validator is None and not args.no_validate:
            print("build_addon: bpy not importable here, Blender's validator not run")
    except (BuildError, OSError) as error:
        print(f"build_addon: error: {error}", file=sys.stderr)
        return 1
    for path in paths:
        print(f"build_addon: {path} ({path.stat().st_size / 1e6:.1f} MB)")
    print(f"build_addon: {len(paths)} zip(s) in {time.perf_counter() - started:.1f} s")
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
