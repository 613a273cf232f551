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
    with np.load(files / "b.npz", allow_pickle=False) as z:
        n = len(read_mesh(files / "src.ply").vertices)
        assert z["eigenvalues"].shape == (12,) and z["eigenvectors"].shape == (n, 12) and z["mass"].shape == (n,)
        assert np.all(np.diff(z["eigenvalues"]) >= -1e-9)  # ascending
        phi, m, q = z["eigenvectors"], z["mass"], z["products"]
        np.testing.assert_allclose(phi.T @ (m[:, None] * phi), np.eye(12), atol=1e-8)  # mass-orthonormal
        np.testing.assert_allclose(q.T @ (m[:, None] * q), np.eye(q.shape[1]), atol=1e-8)
        assert q.shape[1] <= 91  # C(12 + 2, 2) products at most


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
])
def test_bad_input_is_one_line_and_exit_2(files, args, message):
    code, out, err = run(*args, cwd=files)
    assert code == 2
    assert message in err
    assert len(err.strip().splitlines()) == 1 and "Traceback" not in err


def test_landmarks_out_of_range(files):
    (files / "lm.json").write_text("[[0, 100000]]")
    code, _, err = run("transfer", "src.ply", "tgt.ply", "-o", "x.ply", "--landmarks", "lm.json", cwd=files)
    assert code == 2 and "target vertex 100000 out of range" in err
