"""``python -m engine``: the command-line contract, run as a user would."""

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from engine.carrying.color import encode_bytes
from engine.jobs.demo import creature, creature_signals
from engine.intake.files import read_mesh, write_ply

ROOT = Path(__file__).resolve().parents[1]


def run(*args, cwd):
    proc = subprocess.run([sys.executable, "-m", "engine", *map(str, args)], cwd=cwd, capture_output=True,
                          text=True, env={"PYTHONPATH": str(ROOT), "PATH": "/usr/bin:/bin"})
    return proc.returncode, proc.stdout, proc.stderr


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    d = tmp_path_factory.mktemp("cli")
    s = creature(40, 20)
    t = creature(48, 22, twist_offset=True, shuffle_seed=3)
    sig = creature_signals(s.uv)
    write_ply(d / "src.ply", s.vertices, faces=s.faces,
              properties={"color": encode_bytes(sig["tint"]), "dirt": sig["dirt"].astype(np.float32)})
    write_ply(d / "tgt.ply", t.vertices, faces=t.faces)
    (d / "bad.ply").write_bytes(b"ply\nformat ascii 1.0\nelement vertex 3\nend_header\n0 0\n")
    return d


def test_basis_writes_the_contract_arrays(files):
    code, out, err = run("basis", "src.ply", "-o", "b.npz", "--k", "12", "--order", "2", cwd=files)
    assert code == 0, err
    assert out.splitlines()[-1].startswith("12 eigenpairs of")
    with np.load(files / "b.npz", allow_pickle=False) as z:
        n = len(read_mesh(files / "src.ply").vertices)
        assert z["eigenvalues"].shape == (12,) and z["eigenvectors"].shape == (n, 12) and z["mass"].shape == (n,)
        assert np.all(np.diff(z["eigenvalues"]) >= -1e-9)  # ascending
        phi, m, q = z["eigenvectors"], z["mass"], z["products"]
        np.testing.assert_allclose(phi.T @ (m[:, None] * phi), np.eye(12), atol=1e-8)  # mass-orthonormal
        np.testing.assert_allclose(q.T @ (m[:, None] * q), np.eye(q.shape[1]), atol=1e-8)
        # the written products are the kept monomials of order 0..2 of the 12
        # eigenfunctions (C(12 + 2, 2) = 91 candidates, binomial count), and
        # they span the same space as those raw monomials
        e = z["product_exponents"]
        assert e.shape == (q.shape[1], 12) and (e >= 0).all() and (e.sum(axis=1) <= 2).all()
        assert len({tuple(r) for r in e.tolist()}) == len(e)
        assert f"{q.shape[1]} of 91 products kept" in out
        raw = np.prod(phi[:, None, :] ** e[None, :, :], axis=2)
        w = np.sqrt(m)[:, None]
        fit = np.linalg.lstsq(w * raw, w * q, rcond=None)[0]
        assert np.abs(w * (raw @ fit - q)).max() < 1e-6


def test_basis_prints_the_computed_size(files):
    # a mesh of n vertices has at most n - 1 eigenpairs beside the constant
    code, out, err = run("basis", "src.ply", "-o", "big.npz", "--k", "100000", cwd=files)
    assert code == 0, err
    with np.load(files / "big.npz", allow_pickle=False) as z:
        k = z["eigenvalues"].shape[0]
    assert k < 100000 and out.splitlines()[-1].startswith(f"{k} eigenpairs of")


def test_transfer_writes_ply_and_report(files):
    code, out, err = run("transfer", "src.ply", "tgt.ply", "-o", "o.ply", "--report", "r.json", cwd=files)
    assert code == 0, err
    assert "match: aligned" in out  # the meshes overlap in space: auto picks aligned
    out_mesh = read_mesh(files / "o.ply")
    assert {"color", "dirt", "confidence"} <= set(out_mesh.properties)
    assert out_mesh.properties["color"].dtype == np.uint8
    assert json.loads((files / "r.json").read_text())["mode"] == "aligned"


def test_approximate_prints_errors(files):
    code, out, err = run("approximate", "src.ply", "-o", "a.ply", "--basis", "laplacian", "--k", "30", cwd=files)
    assert code == 0, err
    assert "color: relative error" in out and "dirt: relative error" in out


@pytest.mark.parametrize("args, message", [
    (("transfer", "src.ply", "nope.ply", "-o", "x.ply"), "nope.ply: No such file or directory"),
    (("transfer", "src.ply", "tgt.ply", "-o", "x.ply", "--attributes", "ao"), "no vertex property 'ao'"),
    (("basis", "bad.ply", "-o", "x.npz"), "bad.ply"),
    (("basis", "src.ply", "-o", "x.npz", "--order", "9"), "order must be between 1 and 5"),
    (("basis", "src.ply", "-o", "x.npz", "--k", "0"), "expected a positive number"),
    (("transfer", "src.ply", "tgt.ply", "-o", "no/such/dir/x.ply"), "output folder"),
    (("approximate", "src.ply", "-o", "x.ply", "--basis", "wavelets"), "invalid choice: 'wavelets'"),
    ((), "a command is needed"),
    (("detail", "src.ply", "tgt.ply", "-o", "x.ply", "--strength", "1e160"), "between -100 and 100"),
    (("detail", "src.ply", "tgt.ply", "-o", "x.ply", "--strength", "nan"), "expected a finite number"),
    (("detail", "src.ply", "tgt.ply", "-o", "x.ply", "--size", "inf"), "expected a finite number"),
    (("transfer", "src.ply", "tgt.ply", "-o", "src.ply"), "is the input 'src.ply'"),
    (("transfer", "src.ply", "tgt.ply", "-o", "sub/../tgt.ply"), "is the input 'tgt.ply'"),
    (("transfer", "src.ply", "tgt.ply", "-o", "link.ply"), "is the input 'src.ply'"),
    (("detail", "src.ply", "tgt.ply", "-o", "tgt.ply"), "is the input 'tgt.ply'"),
    (("approximate", "src.ply", "-o", "src.ply"), "is the input 'src.ply'"),
    (("basis", "src.ply", "-o", "src.ply"), "is the input 'src.ply'"),
    (("transfer", "src.ply", "tgt.ply", "-o", "x.ply", "--report", "src.ply"), "is the input 'src.ply'"),
    (("transfer", "src.ply", "tgt.ply", "-o", "x.ply", "--report", "sub/../x.ply"),
     "outputs 'x.ply' and 'sub/../x.ply' are the same file"),
    (("transfer", "src.ply", "tgt.ply", "-o", "x.ply", "--report", "sub"), "output 'sub' is a folder"),
])
def test_bad_input_is_one_line_and_exit_2(files, args, message):
    (files / "sub").mkdir(exist_ok=True)
    if not (files / "link.ply").exists():
        (files / "link.ply").symlink_to(files / "src.ply")
    before = {p.name: p.read_bytes() for p in files.iterdir() if p.is_file()}
    code, out, err = run(*args, cwd=files)
    assert code == 2
    assert message in err
    assert len(err.strip().splitlines()) == 1 and "Traceback" not in err
    after = {p.name: p.read_bytes() for p in files.iterdir() if p.is_file()}
    assert after == before  # no input changed, no output written, no temporary file left


def test_landmarks_out_of_range(files):
    (files / "lm.json").write_text("[[0, 100000]]")
    code, _, err = run("transfer", "src.ply", "tgt.ply", "-o", "x.ply", "--landmarks", "lm.json", cwd=files)
    assert code == 2 and "target vertex 100000 out of range" in err


def test_internal_error_is_one_line_with_a_log(files, tmp_path):
    # An unexpected exception inside the engine (here: a deliberately broken
    # reader) ends with one line naming the log file, and exit code 3.
    code = ("import sys, engine.intake.files as f\n"
            "def broken(path): raise AttributeError('deliberate')\n"
            "f.read_mesh = broken\n"
            "from engine.jobs.cli import main\n"
            "sys.exit(main(sys.argv[1:]))\n")
    proc = subprocess.run([sys.executable, "-c", code, "basis", "src.ply", "-o", "x.npz"], cwd=files,
                          capture_output=True, text=True, env={"PYTHONPATH": str(ROOT), "PATH": "/usr/bin:/bin",
                                                                  "TMPDIR": str(tmp_path)})
    assert proc.returncode == 3
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: internal error (AttributeError); details saved to ")
    log = Path(lines[0].rsplit(" ", 1)[1])
    assert log.parent == tmp_path and "AttributeError: deliberate" in log.read_text()


def test_sixteen_bit_colours_keep_their_range_and_type(tmp_path):
    # 16-bit colours with alpha: the carried colour keeps uint16, four
    # channels and values far beyond 8 bits (a mesh carried to itself keeps
    # every vertex's own colour up to the sRGB round trip).
    c = creature(30, 16)
    rng = np.random.default_rng(0)
    rgba = rng.integers(0, 65536, size=(len(c.vertices), 4)).astype(np.uint16)
    write_ply(tmp_path / "s.ply", c.vertices, faces=c.faces, properties={"color": rgba})
    write_ply(tmp_path / "t.ply", c.vertices, faces=c.faces)
    code, out, err = run("transfer", "s.ply", "t.ply", "-o", "o.ply", "--match", "aligned", cwd=tmp_path)
    assert code == 0, err
    got = read_mesh(tmp_path / "o.ply").properties["color"]
    assert got.dtype == np.uint16 and got.shape == rgba.shape
    assert np.abs(got.astype(np.int64) - rgba).max() <= 1


def test_failed_run_leaves_no_output(files):
    # --report names a folder: refused before any work, the mesh is not written
    (files / "rdir").mkdir(exist_ok=True)
    code, _, err = run("transfer", "src.ply", "tgt.ply", "-o", "new.ply", "--report", "rdir", cwd=files)
    assert code == 2 and not (files / "new.ply").exists() and "overtone-tmp" not in err
