"""Whole-file writes (engine.common.atomic) and the four writers built on them.

What is checked is the contract of ``os.replace`` over a temporary file in the
same folder: POSIX rename() replaces an existing target in one step
(POSIX.1-2008, rename(), from memory), so the target holds either its old or
its new content; the temporary file never outlives the write.
"""

import json
import os
import stat
import sys

import numpy as np
import pytest

from engine.common import atomic as _atomic
from engine.common.atomic import atomic_write
from engine.common.cache import Cache
from engine.jobs.commands import save_npz
from engine.intake.files import read_mesh, write_ply
from engine.jobs.file_jobs import report_text


def _write_json(path, data):
    with atomic_write(path, text=True) as fh:
        fh.write(report_text(data))


class Boom(Exception):
    pass


def test_success_replaces_the_old_content(tmp_path):
    path = tmp_path / "out.bin"
    path.write_bytes(b"old content")
    with atomic_write(path) as fh:
        fh.write(b"new ")
        fh.write(b"content")
        assert path.read_bytes() == b"old content"  # nothing visible until the rename
    assert path.read_bytes() == b"new content"
    assert os.listdir(tmp_path) == ["out.bin"]


def test_success_creates_a_missing_file(tmp_path):
    with atomic_write(tmp_path / "new.txt", text=True) as fh:
        fh.write("line\n")
    assert (tmp_path / "new.txt").read_text() == "line\n"
    assert os.listdir(tmp_path) == ["new.txt"]


@pytest.mark.parametrize("error", [Boom, KeyboardInterrupt])
def test_exception_mid_write_keeps_the_old_file_and_no_temp(tmp_path, error):
    path = tmp_path / "keep.bin"
    path.write_bytes(b"old content")
    with pytest.raises(error):
        with atomic_write(path) as fh:
            fh.write(b"half of the new")
            fh.flush()
            temps = [p for p in os.listdir(tmp_path) if p != "keep.bin"]
            assert len(temps) == 1 and temps[0].startswith(f".keep.bin.{os.getpid()}-")
            assert temps[0].endswith(".overtone-tmp") and _atomic.is_temporary(temps[0])
            assert (tmp_path / temps[0]).read_bytes() == b"half of the new"  # really mid-write
            raise error()
    assert path.read_bytes() == b"old content"
    assert os.listdir(tmp_path) == ["keep.bin"]


def test_failed_rename_removes_the_temp(tmp_path):
    target = tmp_path / "a_folder"
    target.mkdir()
    (target / "inside").write_bytes(b"x")
    with pytest.raises(OSError):  # a non-empty folder cannot be replaced by a file
        with atomic_write(target) as fh:
            fh.write(b"data")
    assert sorted(os.listdir(tmp_path)) == ["a_folder"]
    assert os.listdir(target) == ["inside"]


def test_missing_folder_raises_and_creates_nothing(tmp_path):
    with pytest.raises(FileNotFoundError):
        with atomic_write(tmp_path / "no" / "such.bin") as fh:
            fh.write(b"never")
    assert os.listdir(tmp_path) == []


def test_fsync_before_the_rename(tmp_path, monkeypatch):
    path = tmp_path / "f.bin"
    path.write_bytes(b"old")
    seen = []
    real = os.fsync

    def spy(fd):
        if stat.S_ISREG(os.fstat(fd).st_mode):
            seen.append((os.fstat(fd).st_size, path.read_bytes()))
        real(fd)

    monkeypatch.setattr(os, "fsync", spy)
    with atomic_write(path) as fh:
        fh.write(b"12345")  # still in the buffer: the file must be flushed first
    assert path.read_bytes() == b"12345"
    assert seen == [(5, b"old")]


@pytest.mark.skipif(sys.platform == "win32", reason="POSIX permission bits")
def test_permissions_follow_the_umask(tmp_path):
    # open(2) creates a file with mode & ~umask (POSIX.1-2008, open(), from
    # memory): every output gets what Path.write_text would give.
    old = os.umask(0o027)
    try:
        with atomic_write(tmp_path / "mesh") as fh:
            fh.write(b"a")
        (tmp_path / "plain").write_text("c")
        _write_json(tmp_path / "report.json", {"a": 1})
        write_ply(tmp_path / "m.ply", np.eye(3), faces=[[0, 1, 2]])
        save_npz(tmp_path / "b.npz", {"x": np.arange(2.0)})
    finally:
        os.umask(old)
    mode = {p: stat.S_IMODE(os.stat(tmp_path / p).st_mode) for p in os.listdir(tmp_path)}
    assert mode == dict.fromkeys(["mesh", "plain", "report.json", "m.ply", "b.npz"], 0o640)


def test_staged_files_are_renamed_together_or_not_at_all(tmp_path):
    with pytest.raises(Boom):
        with _atomic.atomic_writes() as staging:
            with staging.open(tmp_path / "a") as fh:
                fh.write(b"first")
            raise Boom()  # the second output fails
    assert os.listdir(tmp_path) == []
    with _atomic.atomic_writes() as staging:
        with staging.open(tmp_path / "a") as fh:
            fh.write(b"first")
        with staging.open(tmp_path / "b", text=True) as fh:
            fh.write("second")
        assert sorted(p for p in os.listdir(tmp_path) if not _atomic.is_temporary(p)) == []
    assert sorted(os.listdir(tmp_path)) == ["a", "b"]


def test_sigterm_removes_the_temporary_file(tmp_path):
    # A job scheduler's SIGTERM ends the write like Ctrl-C: the temporary file
    # is removed, the process ends with 143 (128 + 15, common practice) and one
    # line, and the target keeps its old content.
    code = (
        "import os, signal, sys\n"
        "from engine.common.atomic import atomic_write, end_on_signals\n"
        "with end_on_signals():\n"
        "    with atomic_write(sys.argv[1]) as fh:\n"
        "        fh.write(b'half')\n"
        "        os.kill(os.getpid(), signal.SIGTERM)\n"
        "        fh.write(b'never')\n"
        "sys.exit(0)\n")
    target = tmp_path / "out.ply"
    target.write_bytes(b"old")
    import subprocess
    proc = subprocess.run([sys.executable, "-c", code, str(target)], cwd=os.path.dirname(os.path.dirname(__file__)),
                          capture_output=True, text=True)
    assert proc.returncode == 143 and proc.stderr == "error: terminated\n"
    assert os.listdir(tmp_path) == ["out.ply"] and target.read_bytes() == b"old"


def test_a_signal_waits_for_the_renames_of_a_staged_set(tmp_path):
    # A signal that arrives while staged outputs are renamed takes effect after
    # the last rename: both outputs or none, never one (POSIX signal masks).
    code = (
        "import os, signal, sys\n"
        "from engine.common import atomic\n"
        "real = os.replace\n"
        "def replace(a, b):\n"
        "    real(a, b)\n"
        "    os.kill(os.getpid(), signal.SIGINT)  # between the two renames\n"
        "atomic.os.replace = replace\n"
        "with atomic.end_on_signals():\n"
        "    with atomic.atomic_writes() as staging:\n"
        "        for name in ('a', 'b'):\n"
        "            with staging.open(os.path.join(sys.argv[1], name)) as fh:\n"
        "                fh.write(name.encode())\n"
        "sys.exit(0)\n")
    import subprocess
    proc = subprocess.run([sys.executable, "-c", code, str(tmp_path)], cwd=os.path.dirname(os.path.dirname(__file__)),
                          capture_output=True, text=True)
    assert proc.returncode == 130 and proc.stderr == "error: interrupted\n"
    assert sorted(os.listdir(tmp_path)) == ["a", "b"]


def test_name_collisions_are_retried(tmp_path, monkeypatch):
    names = iter(["aa", "aa", "bb"])
    monkeypatch.setattr(_atomic.secrets, "token_hex", lambda n: next(names))
    taken = tmp_path / f".x.{os.getpid()}-aa.overtone-tmp"
    taken.write_bytes(b"someone else's")
    with atomic_write(tmp_path / "x") as fh:
        fh.write(b"mine")
    assert (tmp_path / "x").read_bytes() == b"mine"
    assert taken.read_bytes() == b"someone else's"  # never opened, never removed
    assert sorted(os.listdir(tmp_path)) == [taken.name, "x"]


# ---------------------------------------------------------------- the four writers

def _failing_savez(fh, **arrays):
    fh.write(b"PK\x03\x04 half a zip")
    raise Boom("disk full")


def test_cache_save_failure_keeps_the_entry(tmp_path, monkeypatch):
    c = Cache(tmp_path)
    path = c.save("k", {"x": np.arange(3.0)})
    before = open(path, "rb").read()
    monkeypatch.setattr(np, "savez", _failing_savez)
    with pytest.raises(Boom):
        c.save("k", {"x": np.arange(4.0)})
    assert open(path, "rb").read() == before
    assert os.listdir(tmp_path) == ["k.npz"]


def test_save_npz_failure_keeps_the_file(tmp_path, monkeypatch):
    path = tmp_path / "basis.npz"
    save_npz(path, {"x": np.arange(3.0)})
    before = path.read_bytes()
    monkeypatch.setattr(np, "savez", _failing_savez)
    with pytest.raises(Boom):
        save_npz(path, {"x": np.arange(4.0)})
    assert path.read_bytes() == before
    assert os.listdir(tmp_path) == ["basis.npz"]
    with pytest.raises(OSError, match="output folder .* does not exist"):
        save_npz(tmp_path / "missing" / "b.npz", {"x": np.arange(3.0)})


def test_save_npz_round_trip(tmp_path):
    save_npz(tmp_path / "b.npz", {"x": np.arange(3.0), "k": np.asarray(7)})
    with np.load(tmp_path / "b.npz", allow_pickle=False) as z:
        assert z["x"].tolist() == [0.0, 1.0, 2.0] and int(z["k"]) == 7
    assert os.listdir(tmp_path) == ["b.npz"]


def test_write_json_replaces_and_keeps_on_failure(tmp_path):
    path = tmp_path / "r.json"
    _write_json(path, {"mode": "aligned", "n": [1, 2]})
    assert json.loads(path.read_text()) == {"mode": "aligned", "n": [1, 2]}
    assert path.read_text() == json.dumps({"mode": "aligned", "n": [1, 2]}, indent=2)
    with pytest.raises(TypeError):
        _write_json(path, {"bad": object()})  # not JSON-serialisable
    assert json.loads(path.read_text()) == {"mode": "aligned", "n": [1, 2]}
    assert os.listdir(tmp_path) == ["r.json"]


def test_write_ply_replaces_the_old_mesh(tmp_path):
    path = tmp_path / "m.ply"
    path.write_bytes(b"old content")
    write_ply(path, np.eye(3), faces=[[0, 1, 2]])
    m = read_mesh(path)
    assert m.vertices.tolist() == np.eye(3).tolist() and m.sizes.tolist() == [3]
    assert os.listdir(tmp_path) == ["m.ply"]


def _interrupt_after_creating(monkeypatch):
    # An interrupt that lands just after a temporary file was created, before the
    # writer took charge of it (a signal handler runs between any two steps).
    real = _atomic._create

    def create_then_interrupt(target):
        fd, tmp = real(target)
        os.close(fd)
        raise KeyboardInterrupt

    monkeypatch.setattr(_atomic, "_create", create_then_interrupt)


def test_an_interrupt_between_steps_is_cleaned_up_at_the_end(tmp_path, monkeypatch):
    _interrupt_after_creating(monkeypatch)
    with pytest.raises(KeyboardInterrupt):
        _write_json(tmp_path / "r.json", {"a": 1})
    assert [_atomic.is_temporary(p.name) for p in tmp_path.iterdir()] == [True]  # the writer could not remove it
    assert _atomic.remove_own_temporaries() == 1
    assert list(tmp_path.iterdir()) == []
    assert _atomic.remove_own_temporaries() == 0


def test_an_interrupted_command_leaves_no_temporary_file(tmp_path, monkeypatch):
    from engine.jobs.cli import EXIT_INTERRUPTED, main
    from tests.meshes import icosphere

    v, f = icosphere(2)
    write_ply(tmp_path / "s.ply", v, faces=f)
    _interrupt_after_creating(monkeypatch)
    assert main(["basis", str(tmp_path / "s.ply"), "-o", str(tmp_path / "b.npz"), "--k", "8"]) == EXIT_INTERRUPTED
    assert sorted(p.name for p in tmp_path.iterdir()) == ["s.ply"]
