"""Real-Blender tests: the built extension installed into a sandboxed Blender.

Blender is kept away from the home folder: its user folders point into a
temporary directory before ``bpy`` is imported. These tests need real ``bpy``
(the ``.venv-blender`` environment); ``python3 dev.py test`` runs them there and
leaves this folder out of the numpy-2 engine run. Without ``bpy`` they fail at
import, loudly, rather than pass unchecked.
"""

import atexit
import importlib
import os
import shutil
import subprocess
import sys
import sysconfig
import tempfile
import time
from pathlib import Path

import numpy as np
import pytest

SANDBOX = Path(tempfile.mkdtemp(prefix="overtone-blender-tests-"))
atexit.register(shutil.rmtree, SANDBOX, ignore_errors=True)  # the install holds ~0.5 GB
for _var in ("BLENDER_USER_CONFIG", "BLENDER_USER_SCRIPTS", "BLENDER_USER_EXTENSIONS",
             "BLENDER_USER_DATAFILES", "BLENDER_USER_RESOURCES", "XDG_CACHE_HOME"):
    (SANDBOX / _var.lower()).mkdir()
    os.environ[_var] = str(SANDBOX / _var.lower())

import bpy  # noqa: E402  (after the sandbox variables above)

ROOT = Path(__file__).resolve().parents[2]
MODULE = "bl_ext.user_default.overtone"
EXTENSIONS_SITE = (SANDBOX / "blender_user_extensions" / ".local" / "lib"
                   / f"python{sys.version_info[0]}.{sys.version_info[1]}" / "site-packages")


def blender_ext_script() -> Path:
    """Blender's packaging script inside the bpy wheel (docs/platform.md)."""
    wheel = Path(sysconfig.get_paths()["purelib"]) / "bpy"
    found = sorted(wheel.glob("*/scripts/addons_core/bl_pkg/cli/blender_ext.py"))
    assert found, "bpy wheel without bl_pkg/cli/blender_ext.py"
    return found[-1]


@pytest.fixture(scope="session")
def platform_zips() -> dict[str, Path]:
    """The four per-platform extension zips, built once (reused from dist/ when
    their inputs are unchanged), by Blender platform name."""
    started = time.perf_counter()
    proc = subprocess.run([sys.executable, "build_addon.py", "--no-validate"], cwd=ROOT,
                          capture_output=True, text=True)
    assert proc.returncode == 0, proc.stderr
    print(f"\nbuild: {time.perf_counter() - started:.1f} s; {proc.stdout.strip()}")
    from build_addon import PLATFORMS, engine_version, zip_name
    return {p[0]: ROOT / "dist" / zip_name(engine_version(), p[0]) for p in PLATFORMS}


@pytest.fixture(scope="session")
def extension_zip(platform_zips) -> Path:
    """The zip these tests install: the linux-x64 one."""
    return platform_zips["linux-x64"]


@pytest.fixture(scope="session")
def overtone(extension_zip):
    """The installed, enabled extension's top-level module (from bl_ext, not the repo)."""
    bpy.ops.wm.read_factory_settings(use_empty=True)
    started = time.perf_counter()
    result = bpy.ops.extensions.package_install_files(
        filepath=str(extension_zip), repo='user_default', enable_on_install=True)
    print(f"\ninstall: {time.perf_counter() - started:.1f} s")
    assert result == {'FINISHED'}
    module = importlib.import_module(MODULE)
    assert Path(module.__file__).is_relative_to(SANDBOX)
    return module


@pytest.fixture
def scene(overtone):
    """An empty scene; the add-on stays enabled.

    ``wm.read_factory_settings`` would also reset the preferences and so disable
    the extension (re-enabling costs seconds: its wheels are synced again);
    ``read_homefile`` with the factory startup file empties the scene in ~20 ms.
    """
    bpy.ops.wm.read_homefile(use_empty=True, use_factory_startup=True)
    assert hasattr(bpy.types.Scene, "overtone")
    return bpy.context.scene


@pytest.fixture
def bridge(overtone):
    return importlib.import_module(MODULE + ".bridge")


def _link(name, positions, polygons_flat, sizes):
    mesh = bpy.data.meshes.new(name)
    mesh.vertices.add(len(positions))
    mesh.loops.add(len(polygons_flat))
    mesh.polygons.add(len(sizes))
    mesh.attributes["position"].data.foreach_set(
        "vector", np.asarray(positions, np.float32).ravel())
    mesh.attributes[".corner_vert"].data.foreach_set(
        "value", np.asarray(polygons_flat, np.int32))
    starts = np.concatenate([[0], np.cumsum(sizes)[:-1]]).astype(np.int32)
    mesh.polygons.foreach_set("loop_start", starts)
    mesh.update()
    assert not mesh.validate(verbose=False), f"{name}: generated mesh did not validate"
    obj = bpy.data.objects.new(name, mesh)
    bpy.context.scene.collection.objects.link(obj)
    return obj


def make_grid(name="grid", nx=6, ny=5):
    """A flat nx x ny vertex grid of quads in z = 0, spacing 1."""
    xs, ys = np.meshgrid(np.arange(nx, dtype=float), np.arange(ny, dtype=float))
    positions = np.column_stack([xs.ravel(), ys.ravel(), np.zeros(xs.size)])
    i, j = np.meshgrid(np.arange(nx - 1), np.arange(ny - 1))
    a = (j * nx + i).ravel()
    quads = np.column_stack([a, a + 1, a + 1 + nx, a + nx])
    return _link(name, positions, quads.ravel(), np.full(len(quads), 4))


def make_sphere(name="sphere", rings=8, segments=12):
    """A UV sphere: two poles with triangle fans, quads between."""
    theta = np.linspace(0, np.pi, rings + 1)[1:-1]
    phi = np.linspace(0, 2 * np.pi, segments, endpoint=False)
    t, p = np.meshgrid(theta, phi, indexing="ij")
    ring_pts = np.column_stack([np.sin(t).ravel() * np.cos(p).ravel(),
                                np.sin(t).ravel() * np.sin(p).ravel(), np.cos(t).ravel()])
    positions = np.vstack([[0, 0, 1], ring_pts, [0, 0, -1]])
    south = len(positions) - 1
    faces, sizes = [], []
    ring = lambda r, s: 1 + r * segments + s % segments  # noqa: E731
    for s in range(segments):
        faces += [0, ring(0, s), ring(0, s + 1)]
        sizes.append(3)
    for r in range(rings - 2):
        for s in range(segments):
            faces += [ring(r, s), ring(r + 1, s), ring(r + 1, s + 1), ring(r, s + 1)]
            sizes.append(4)
    for s in range(segments):
        faces += [ring(rings - 2, s + 1), ring(rings - 2, s), south]
        sizes.append(3)
    return _link(name, positions, faces, sizes)


@pytest.fixture
def grid(scene):
    return make_grid()


@pytest.fixture
def sphere(scene):
    return make_sphere()


def make_mesh(name, vertices, faces):
    """A triangle mesh object from arrays."""
    faces = np.asarray(faces)
    return _link(name, vertices, faces.ravel(), np.full(len(faces), faces.shape[1]))


def engine_module(name):
    """A module of the installed extension's bundled engine (``pipeline``, ``demo``, ...)."""
    return importlib.import_module(f"{MODULE}.engine.{name}")


def select(source, target):
    """Select both; the target is active (docs/platform.md: selection and active object are honoured)."""
    for obj in bpy.context.scene.objects:
        obj.select_set(obj in (source, target))
    bpy.context.view_layer.objects.active = target
