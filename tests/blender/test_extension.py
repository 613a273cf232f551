"""The built zip: Blender's validator, its contents, installation and registration."""

import hashlib
import importlib
import importlib.util
import shutil
import subprocess
import sys
import tomllib
import zipfile
from pathlib import Path

import bpy
import pytest

from .conftest import EXTENSIONS_SITE, MODULE, ROOT, blender_ext_script

PLATFORMS = {"linux-x64", "windows-x64", "macos-arm64", "macos-x64"}


def load_blender_ext():
    """Blender's packaging script as a module (its platform helpers are the reference)."""
    spec = importlib.util.spec_from_file_location("blender_ext", blender_ext_script())
    module = importlib.util.module_from_spec(spec)
    sys.modules.setdefault("blender_ext", module)
    spec.loader.exec_module(module)
    return module


def read_manifest(path):
    """The manifest of a zip as Blender reads it: ``[build.generated]`` replaces
    ``platforms`` and ``wheels`` (``pkg_manifest_dict_apply_build_generated_table``
    in blender_ext.py, 4.2 to 5.0)."""
    with zipfile.ZipFile(path) as archive:
        names = set(archive.namelist())
        manifest = tomllib.loads(archive.read("blender_manifest.toml").decode())
    generated = manifest.pop("build", {}).get("generated", {})
    manifest.update(generated)
    return manifest, names


@pytest.mark.every_blender
@pytest.mark.parametrize("platform", sorted(PLATFORMS))
def test_blender_validator_accepts_each_zip(platform_zips, platform):
    # this Blender's own validator (each environment runs its own bpy's script)
    proc = subprocess.run([sys.executable, str(blender_ext_script()), "validate",
                           str(platform_zips[platform])], capture_output=True, text=True)
    assert proc.returncode == 0, proc.stdout + proc.stderr


def test_blender_validator_rejects_a_long_tagline(tmp_path, extension_zip):
    # The validator itself must be able to fail (docs/platform.md: tagline <= 64 characters).
    bad = tmp_path / "bad.zip"
    with zipfile.ZipFile(extension_zip) as src, zipfile.ZipFile(bad, "w") as dst:
        text = src.read("blender_manifest.toml").decode()
        dst.writestr("blender_manifest.toml", text.replace('tagline = "', 'tagline = "' + "x" * 60))
        dst.writestr("__init__.py", src.read("__init__.py"))
    proc = subprocess.run([sys.executable, str(blender_ext_script()), "validate", str(bad)],
                          capture_output=True, text=True)
    assert proc.returncode != 0
    assert "tagline" in proc.stdout + proc.stderr


@pytest.mark.parametrize("platform", sorted(PLATFORMS))
def test_manifest_and_contents(platform_zips, platform):
    from build_addon import engine_version
    manifest, names = read_manifest(platform_zips[platform])
    assert manifest["id"] == "overtone"
    assert manifest["version"] == engine_version()
    assert manifest["schema_version"] == "1.0.0"
    assert manifest["type"] == "add-on"
    assert manifest["blender_version_min"] == "4.2.0"
    assert manifest["license"] == ["SPDX:GPL-3.0-or-later"]
    assert len(manifest["tagline"]) <= 64 and manifest["tagline"][-1].isalnum()
    assert manifest["platforms"] == [platform]
    assert "files" in manifest["permissions"]
    wheels = [w.removeprefix("./") for w in manifest["wheels"]]
    # exactly the listed wheels are in the zip, and Blender's own filter agrees
    # they are this platform's (blender_ext.py, paths_filter_wheels_by_platform)
    assert set(wheels) == {n for n in names if n.startswith("wheels/")}
    assert load_blender_ext().paths_filter_wheels_by_platform(wheels, platform) == wheels
    from build_addon import bundled_pins
    # one wheel per bundled package and Python tag (Blender 4.2-5.0: cp311, 5.1: cp313)
    for name, version in bundled_pins().items():
        stem = f"wheels/{name.replace('-', '_')}-{version}-"
        for tag in ("cp311", "cp313"):
            mine = [w for w in wheels if w.startswith(stem) and f"-{tag}-" in w]
            assert len(mine) == 1, (name, tag, mine)
    for name in ("__init__.py", "bridge.py", "batch.py", "engine/__init__.py", "LICENSE"):
        assert name in names
    repo_engine = {f"engine/{p.relative_to(ROOT / 'engine').as_posix()}"
                   for p in (ROOT / "engine").rglob("*.py") if "__pycache__" not in p.parts}
    assert repo_engine == {n for n in names if n.startswith("engine/")}


def test_split_matches_blenders_own_split(tmp_path, platform_zips):
    """Blender's ``build --split-platforms`` on the all-platforms zip's files gives
    the same file names and the same manifest text for every platform."""
    full = tmp_path / "all"
    proc = subprocess.run([sys.executable, "build_addon.py", "--no-validate", "--all-platforms",
                           "--output-dir", str(full)], cwd=ROOT, capture_output=True, text=True)
    assert proc.returncode == 0, proc.stderr
    source, split = tmp_path / "source", tmp_path / "split"
    split.mkdir()
    (everything,) = full.glob("*.zip")
    with zipfile.ZipFile(everything) as archive:
        archive.extractall(source)
        all_names = set(archive.namelist())
    everything.unlink()  # 263 MB; pytest keeps old tmp folders around
    proc = subprocess.run([sys.executable, str(blender_ext_script()), "build", "--source-dir",
                           str(source), "--output-dir", str(split), "--split-platforms"],
                          capture_output=True, text=True)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    assert sorted(p.name for p in split.glob("*.zip")) == sorted(p.name for p in platform_zips.values())
    union = set()
    for ours in platform_zips.values():
        with zipfile.ZipFile(ours) as a, zipfile.ZipFile(split / ours.name) as b:
            assert sorted(a.namelist()) == sorted(b.namelist())
            assert a.read("blender_manifest.toml") == b.read("blender_manifest.toml")
            union |= set(a.namelist())
    assert union == all_names  # every wheel of the all-platforms zip is in one platform zip
    shutil.rmtree(source), shutil.rmtree(split)


def test_build_is_deterministic(tmp_path, platform_zips):
    proc = subprocess.run([sys.executable, "build_addon.py", "--no-validate", "--force",
                           "--output-dir", str(tmp_path)], cwd=ROOT, capture_output=True, text=True)
    assert proc.returncode == 0, proc.stderr
    digest = lambda p: hashlib.sha256(p.read_bytes()).hexdigest()  # noqa: E731
    for ours in platform_zips.values():
        again = tmp_path / ours.name
        same = digest(again) == digest(ours)
        again.unlink()  # tens of MB; pytest keeps old tmp folders around
        assert same, ours.name


def test_this_platform_is_blenders_name_for_it():
    from build_addon import this_platform
    assert this_platform() == load_blender_ext().platform_from_this_system()


def test_failed_download_is_a_clear_error(monkeypatch, tmp_path):
    import build_addon
    monkeypatch.setattr(build_addon, "WHEEL_CACHE", tmp_path)
    with pytest.raises(build_addon.BuildError, match=r"could not download scipy==0\.0\.1 for linux-x64"):
        build_addon.fetch_wheels({"scipy": "0.0.1"}, ("3.11",))


@pytest.mark.every_blender
def test_installed_and_registered(overtone):
    assert overtone.__name__ == MODULE
    assert MODULE in {a.module for a in bpy.context.preferences.addons}
    for op in ("transfer_attributes", "transfer_detail", "preview_carry", "refresh_signals", "clear_cache"):
        assert hasattr(bpy.ops.overtone, op)
        assert getattr(bpy.ops.overtone, op).get_rna_type() is not None
    for panel in ("OVERTONE_PT_main", "OVERTONE_PT_method", "OVERTONE_PT_detail",
                  "OVERTONE_PT_report"):
        cls = getattr(bpy.types, panel)
        assert cls.bl_space_type == 'VIEW_3D' and cls.bl_region_type == 'UI'
    settings = bpy.context.scene.overtone
    assert settings.match_mode == "AUTO" and settings.basis == "POINTWISE"
    prefs = bpy.context.preferences.addons[MODULE].preferences
    expected = bpy.utils.extension_path_user(MODULE, path="cache")
    assert Path(prefs.cache_folder) == Path(expected) and Path(expected).is_dir()
    assert prefs.cache_limit_mb > 0


def test_engine_is_the_bundled_subpackage(overtone):
    engine = importlib.import_module(MODULE + ".engine")
    assert Path(engine.__file__).parent == Path(overtone.__file__).parent / "engine"
    from build_addon import engine_version
    assert engine.__version__ == engine_version()


# In a fresh interpreter without site: the extension's site-packages first, then
# this environment's (its numpy: the one this bpy declares, see the next test).
# The path graph's Laplacian has eigenvalues 2 - 2 cos(pi j / n), j = 0..n-1
# (common practice); points on a unit grid have nearest neighbours at distance 1.
_SCIPY_CHECK = """
import sys; sys.path[:0] = [sys.argv[1]]; sys.path.append(sys.argv[2])
import numpy as np, scipy, scipy.sparse, scipy.sparse.linalg, scipy.spatial, scipy.linalg
n = 40
L = scipy.sparse.diags([np.r_[1, np.full(n - 2, 2.0), 1], -np.ones(n - 1), -np.ones(n - 1)],
                       [0, -1, 1], format="csc")
got = np.sort(scipy.sparse.linalg.eigsh(L, k=4, sigma=-0.1, which="LM")[0])
want = 2 - 2 * np.cos(np.pi * np.arange(4) / n)
assert np.allclose(got, want, atol=1e-10), (got, want)
xs = np.stack(np.meshgrid(np.arange(5.0), np.arange(5.0)), -1).reshape(-1, 2)
d, _ = scipy.spatial.cKDTree(xs).query(xs, k=2)
assert np.allclose(d[:, 1], 1.0)
import mapbox_earcut
# a unit square (ring end index 4) is two triangles whose areas add to 1
square = np.array([[0.0, 0.0], [1.0, 0.0], [1.0, 1.0], [0.0, 1.0]])
tri = mapbox_earcut.triangulate_float64(square, np.array([4], dtype=np.uint32)).reshape(-1, 3)
a, b, c = square[tri[:, 0]], square[tri[:, 1]], square[tri[:, 2]]
area = 0.5 * np.abs((b - a)[:, 0] * (c - a)[:, 1] - (b - a)[:, 1] * (c - a)[:, 0])
assert len(tri) == 2 and np.isclose(area.sum(), 1.0), tri
import fast_simplification
# quadric simplification of a flat grid keeps it flat (every quadric error is zero there)
g = np.stack(np.meshgrid(np.arange(20.0), np.arange(20.0)), -1).reshape(-1, 2)
pts = np.column_stack([g, np.zeros(len(g))])
k = np.arange(19 * 20).reshape(19, 20)[:, :19].ravel()
faces = np.vstack([np.column_stack([k, k + 1, k + 21]), np.column_stack([k, k + 21, k + 20])])
v2, f2 = fast_simplification.simplify(pts, faces, target_reduction=0.5)
assert 0 < len(f2) < len(faces) and np.allclose(v2[:, 2], 0.0), (len(f2), np.abs(v2[:, 2]).max())
print(scipy.__file__, scipy.__version__, np.__file__, np.__version__, mapbox_earcut.__file__,
      fast_simplification.__file__)
"""


@pytest.mark.every_blender
def test_bundled_wheels_load_with_this_blenders_numpy(overtone):
    from importlib.metadata import version
    venv_site = Path(importlib.import_module("numpy").__file__).parents[1]
    proc = subprocess.run([sys.executable, "-S", "-c", _SCIPY_CHECK, str(EXTENSIONS_SITE), str(venv_site)],
                          capture_output=True, text=True)
    assert proc.returncode == 0, proc.stderr
    assert proc.stderr == ""  # no NumPy ABI warning either
    scipy_path, scipy_version, numpy_path, numpy_version, earcut_path, simplify_path = proc.stdout.split()
    assert Path(scipy_path).is_relative_to(EXTENSIONS_SITE)
    assert Path(earcut_path).is_relative_to(EXTENSIONS_SITE)
    assert Path(simplify_path).is_relative_to(EXTENSIONS_SITE)
    assert scipy_version == "1.17.1"
    assert Path(numpy_path).is_relative_to(venv_site) and numpy_version == version("numpy")


@pytest.mark.every_blender
def test_numpy_is_the_one_this_bpy_declares():
    """The environment's numpy satisfies bpy's Requires-Dist, and the requirements
    file that pins this bpy pins exactly that numpy."""
    from importlib.metadata import requires, version
    from pip._vendor.packaging.requirements import Requirement
    declared = [Requirement(r) for r in requires("bpy") if Requirement(r).name == "numpy"]
    assert len(declared) == 1
    assert declared[0].specifier.contains(version("numpy"), prereleases=True)
    pins = [f for f in (ROOT / "requirements").glob("blender*.txt")
            if f"bpy=={version('bpy')}" in f.read_text().split()]
    assert len(pins) == 1, pins
    assert f"numpy=={version('numpy')}" in pins[0].read_text().split()


def test_clear_cache_deletes_only_cache_files(overtone, scene):
    folder = Path(bpy.context.preferences.addons[MODULE].preferences.cache_folder)
    (folder / "a.npz").write_bytes(b"x" * 10)
    (folder / "b.npz").write_bytes(b"y" * 5)
    (folder / "keep.txt").write_text("not ours")
    assert bpy.ops.overtone.clear_cache() == {'FINISHED'}
    assert sorted(p.name for p in folder.iterdir()) == ["keep.txt"]


def _select(source, target):
    for obj in bpy.context.scene.objects:
        obj.select_set(obj in (source, target))
    bpy.context.view_layer.objects.active = target


def test_refresh_signals_lists_the_source(overtone, scene):
    from .conftest import make_grid
    source, target = make_grid("src"), make_grid("dst")
    source.data.color_attributes.new("tint", 'BYTE_COLOR', 'CORNER')
    source.vertex_groups.new(name="arm")
    _select(source, target)
    assert bpy.ops.overtone.refresh_signals() == {'FINISHED'}
    items = [(i.name, i.kind, i.domain, i.use) for i in scene.overtone.signals]
    assert items == [("tint", "color", "CORNER", True), ("arm", "weight", "POINT", True)]
    assert scene.overtone.signals_source == "src"


def test_transfer_operator_needs_a_pair(overtone, scene):
    from .conftest import make_grid
    target = make_grid("dst")
    _select(target, target)
    with pytest.raises(RuntimeError, match="only 'dst' is selected: also select the source mesh"):
        bpy.ops.overtone.transfer_attributes()
    assert scene.overtone.report_text.startswith("only 'dst' is selected")
    assert not scene.overtone.report_ok
