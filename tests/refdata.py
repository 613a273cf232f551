"""Open reference meshes, fetched on first use from the package registries.

Every mesh here ships inside a package of Debian or PyPI (docs/platform.md lists
them); nothing is fetched from anywhere else. Files land in
``.cache/refdata/<source>/`` at the repository root and are reused.

    from tests import refdata
    path = refdata.path("bunny_pymeshlab")

A failed fetch raises ``RefDataError`` with the command that failed, so a test
that needs the data fails loudly instead of passing without checking.
"""

from __future__ import annotations

import fcntl
import io
import os
import shutil
import subprocess
import sys
import tarfile
import tempfile
import zipfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
CACHE = Path(os.environ.get("OVERTONE_REFDATA", ROOT / ".cache" / "refdata"))


class RefDataError(RuntimeError):
    pass


# name -> (source, member path inside the package, description)
MESHES: dict[str, tuple[str, str, str]] = {
    # Debian libcgal-demo 5.5: data.tar.gz inside; files without a notice are CC0 1.0.
    "armadillo": ("cgal", "data/meshes/armadillo.off", "26k vertices"),
    "bunny_cgal": ("cgal", "data/meshes/bunny00.off", "bunny scan, 38k vertices"),
    "elephant": ("cgal", "data/meshes/elephant.off", "2.8k vertices"),
    "refined_elephant": ("cgal", "data/meshes/refined_elephant.off", "same object remeshed, 44k"),
    "camel": ("cgal", "data/meshes/camel.off", ""),
    "cow_cgal": ("cgal", "data/meshes/cow.off", "same faces as pymeshlab cow.obj"),
    "homer": ("cgal", "data/meshes/homer.off", ""),
    "hand": ("cgal", "data/meshes/hand.off", "many slivers"),
    "femur": ("cgal", "data/meshes/femur.off", "genus > 0"),
    "elk": ("cgal", "data/meshes/elk.off", "genus > 0"),
    "knot1": ("cgal", "data/meshes/knot1.off", "genus 1"),
    "nefertiti": ("cgal", "data/meshes/nefertiti.off", "open, with boundary"),
    "mannequin": ("cgal", "data/meshes/mannequin-devil.off", ""),
    # PyPI pymeshlab wheel (GPL-3): pymeshlab/tests/sample_meshes/
    "bunny_pymeshlab": ("pymeshlab", "pymeshlab/tests/sample_meshes/bunny.obj", "28k, closed"),
    "bunny10k_textured": ("pymeshlab", "pymeshlab/tests/sample_meshes/bunny10k_textured.obj", "holes, UV seams"),
    "cow_pymeshlab": ("pymeshlab", "pymeshlab/tests/sample_meshes/cow.obj", "2.9k"),
    # Debian glmark2-data (GPL-3+)
    "bunny_glmark2": ("glmark2", "usr/share/glmark2/models/bunny.obj", "35k, slivers"),
    # PyPI pymeshfix wheel: a raw scan with non-manifold edges and holes
    "bunny_raw_scan": ("pymeshfix", "pymeshfix/examples/StanfordBunny.ply", "50k, 132 non-manifold edges"),
}


# Pinned so the reference files never change under the tests.
PINNED = {"pymeshlab": "pymeshlab==2025.7.post1", "pymeshfix": "pymeshfix==0.18.1"}


def _run(cmd: list[str], cwd: Path) -> None:
    proc = subprocess.run(cmd, cwd=cwd, capture_output=True, text=True)
    if proc.returncode != 0:
        raise RefDataError(f"{' '.join(cmd)} failed: {proc.stderr.strip()[-400:]}")


def _apt_download(package: str, workdir: Path) -> Path:
    try:
        _run(["apt-get", "download", package], workdir)
    except RefDataError:
        _run(["apt-get", "update"], workdir)  # a fresh machine has no package lists yet
        _run(["apt-get", "download", package], workdir)
    debs = sorted(workdir.glob(f"{package}_*.deb"))
    if not debs:
        raise RefDataError(f"apt-get download {package} produced no .deb")
    return debs[-1]


def _deb_tar(deb: Path) -> tarfile.TarFile:
    data = subprocess.run(["dpkg-deb", "--fsys-tarfile", str(deb)], capture_output=True, check=True).stdout
    return tarfile.open(fileobj=io.BytesIO(data))


def _pip_download(package: str, workdir: Path, *, binary: bool = True) -> Path:
    cmd = [sys.executable, "-m", "pip", "download", "--no-deps", "-q", "-d", str(workdir)]
    cmd += ["--only-binary", ":all:"] if binary else ["--no-binary", ":all:"]
    _run(cmd + [package], workdir)
    stem = package.split("==")[0].replace("-", "_").lower()
    found = [p for p in workdir.iterdir() if p.name.lower().startswith(stem)]
    if not found:
        raise RefDataError(f"pip download {package} produced no file")
    return found[0]


def _extract(source: str, members: list[str], dest: Path) -> None:
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        if source == "cgal":
            deb = _apt_download("libcgal-demo", work)
            with _deb_tar(deb) as outer:
                inner = outer.extractfile("./usr/share/doc/libcgal-dev/data.tar.gz")
                assert inner is not None
                with tarfile.open(fileobj=io.BytesIO(inner.read())) as tar:
                    for name in members:
                        _write(dest / name, tar.extractfile(name).read())  # type: ignore[union-attr]
        elif source == "glmark2":
            deb = _apt_download("glmark2-data", work)
            with _deb_tar(deb) as tar:
                for name in members:
                    _write(dest / name, tar.extractfile("./" + name).read())  # type: ignore[union-attr]
        elif source in ("pymeshlab", "pymeshfix"):
            wheel = _pip_download(PINNED[source], work)
            with zipfile.ZipFile(wheel) as z:
                names = z.namelist()
                for name in members:
                    # some wheels keep package data under <dist>.data/purelib/
                    match = [n for n in names if n == name or n.endswith("/purelib/" + name)]
                    if not match:
                        raise RefDataError(f"{wheel.name} has no {name}")
                    _write(dest / name, z.read(match[0]))
        else:
            raise RefDataError(f"unknown source {source!r}")


def _write(path: Path, data: bytes) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_suffix(path.suffix + ".part")
    tmp.write_bytes(data)
    os.replace(tmp, path)


def path(name: str) -> Path:
    """Local path of reference mesh ``name`` (see ``MESHES``), fetching it once."""
    if name not in MESHES:
        raise KeyError(f"unknown reference mesh {name!r}; known: {', '.join(sorted(MESHES))}")
    source, member, _ = MESHES[name]
    dest = CACHE / source
    target = dest / member
    if target.exists():
        return target
    dest.mkdir(parents=True, exist_ok=True)
    with open(dest / ".lock", "w") as lock:
        fcntl.flock(lock, fcntl.LOCK_EX)
        if not target.exists():
            # fetch every member of this source at once: one download per package
            members = [m for s, m, _ in MESHES.values() if s == source]
            _extract(source, members, dest)
    return target


def clear() -> None:
    shutil.rmtree(CACHE, ignore_errors=True)


if __name__ == "__main__":
    for key in sys.argv[1:] or sorted(MESHES):
        print(key, path(key))
