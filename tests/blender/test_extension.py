"""The built zip: Blender's validator, its contents, installation and registration."""

import hashlib
import importlib
import subprocess
import sys
import tomllib
import zipfile
from pathlib import Path

import bpy
import pytest

from .conftest import EXTENSIONS_SITE, MODULE, ROOT, blender_ext_script

PLATFORMS = {"linux-x64", "windows-x64", "macos-arm64", "macos-x64"}


def test_blender_validator_accepts_the_zip(extension_zip):
    proc = subprocess.run([sys.executable, str(blender_ext_script()), "validate",
                           str(extension_zip)], capture_output=True, text=True)
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


def test_manifest_and_contents(extension_zip):
    from build_addon import engine_version
    with zipfile.ZipFile(extension_zip) as archive:
        names = set(archive.namelist())
        manifest = tomllib.loads(archive.read("blender_manifest.toml").decode())
    assert manifest["id"] == "overtone"
    assert manifest["version"] == engine_version()
    assert manifest["schema_version"] == "1.0.0"
    assert manifest["type"] == "add-on"
    assert manifest["blender_version_min"] == "4.2.0"
    assert manifest["license"] == ["SPDX:GPL-3.0-or-later"]
    assert len(manifest["tagline"]) <= 64 and manifest["tagline"][-1].isalnum()
    assert set(manifest["platforms"]) == PLATFORMS
    assert "files" in manifest["permissions"]
    wheels = [w.removeprefix("./") for w in manifest["wheels"]]
    assert set(wheels) <= names
    scipy_pin = (ROOT / "requirements" / "engine.txt").read_text().split("scipy==")[1].split()[0]
    # one wheel per platform and Python tag (Blender 4.2-5.0: cp311, 5.1: cp313)
    for tag in ("cp311", "cp313"):
        mine = [w for w in wheels if f"-{tag}-{tag}-" in w]
        assert len(mine) == 4, mine
        assert all(w.startswith(f"wheels/scipy-{scipy_pin}-") for w in mine)
    for name in ("__init__.py", "bridge.py", "batch.py", "engine/__init__.py", "LICENSE"):
        assert name in names
    repo_engine = {f"engine/{p.relative_to(ROOT / 'engine').as_posix()}"
                   for p in (ROOT / "engine").rglob("*.py") if "__pycache__" not in p.parts}
    assert repo_engine == {n for n in names if n.startswith("engine/")}


def test_build_is_deterministic(tmp_path, extension_zip):
    proc = subprocess.run([sys.executable, "build_addon.py", "--no-validate", "--force",
                           "--output-dir", str(tmp_path)], cwd=ROOT, capture_output=True, text=True)
    assert proc.returncode == 0, proc.stderr
    again = tmp_path / extension_zip.name
    digest = lambda p: hashlib.sha256(p.read_bytes()).hexdigest()  # noqa: E731
    same = digest(again) == digest(extension_zip)
    again.unlink()  # 260 MB; pytest keeps old tmp folders around
    assert same


def test_failed_download_is_a_clear_error(monkeypatch, tmp_path):
    import build_addon
    monkeypatch.setattr(build_addon, "WHEEL_CACHE", tmp_path)
    with pytest.raises(build_addon.BuildError, match=r"could not download scipy==0\.0\.1 for linux-x64"):
        build_addon.fetch_wheels("0.0.1", ("3.11",))


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


def test_scipy_comes_from_the_extension_wheel(overtone):
    # The test venv has its own scipy; import with the extension's site-packages
    # first and the venv's numpy after it, in a fresh interpreter without site.
    venv_site = Path(importlib.import_module("numpy").__file__).parents[1]
    code = ("import sys; sys.path[:0] = [sys.argv[1]]; sys.path.append(sys.argv[2]);"
            "import scipy, scipy.sparse.linalg; print(scipy.__file__, scipy.__version__)")
    proc = subprocess.run([sys.executable, "-S", "-c", code, str(EXTENSIONS_SITE), str(venv_site)],
                          capture_output=True, text=True)
    assert proc.returncode == 0, proc.stderr
    path, version = proc.stdout.split()
    assert Path(path).is_relative_to(EXTENSIONS_SITE)
    assert version == "1.17.1"


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
