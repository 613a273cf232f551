"""Generated inputs through ``python -m engine``: nothing lost, no traceback, whatever the input.

Property-based tests (hypothesis) generate mesh files (PLY ascii/binary, OBJ,
OFF; odd geometry, every colour type, damaged bytes and headers), options,
output paths, landmark files, damaged cache entries and killed runs, and
assert the command line's promise for each:

- exit 0 with finite, valid output (a readable mesh or npz, strict JSON), or
  exit 2 with exactly one line on stderr, starting ``error:``;
- no input file changed;
- no temporary file left in the output or cache folder;
- no output after a failure.

The normal test run draws a bounded number of examples per category
(``OVERTONE_FUZZ_EXAMPLES``, default 100; killed runs a tenth of that); ``python3 dev.py fuzz`` (or the same
variable set higher) runs a longer, randomised search. With
``OVERTONE_FUZZ_REPORT=FILE`` the outcome counts per category are written to
FILE as JSON (the figures in docs/measurements.md, section "Reliability").
"""

from __future__ import annotations

import atexit
import contextlib
import hashlib
import io
import json
import os
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from collections import Counter
from pathlib import Path

import numpy as np
import pytest

hypothesis = pytest.importorskip("hypothesis")
from hypothesis import HealthCheck, given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402

from engine.common.atomic import is_temporary  # noqa: E402
from engine.intake.files import read_mesh, write_ply  # noqa: E402
from engine.jobs.cli import main  # noqa: E402
from tests import meshes  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
EXAMPLES = int(os.environ.get("OVERTONE_FUZZ_EXAMPLES", "100"))
LONG = EXAMPLES > 100
FUZZ = settings(max_examples=EXAMPLES, deadline=None, database=None, derandomize=not LONG,
                suppress_health_check=list(HealthCheck))
OUTCOMES: Counter[str] = Counter()


def _write_outcomes() -> None:
    target = os.environ.get("OVERTONE_FUZZ_REPORT")
    if target and OUTCOMES:
        Path(target).write_text(json.dumps(dict(sorted(OUTCOMES.items())), indent=2))


atexit.register(_write_outcomes)


# ---------------------------------------------------------------- the promise

def _digests(folder: Path) -> dict[str, str]:
    return {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in folder.iterdir() if p.is_file()}


def _strict_json(text: str) -> object:
    def refuse(name: str) -> None:
        raise AssertionError(f"non-finite number {name} written")
    return json.loads(text, parse_constant=refuse)


def _check_output(path: Path) -> None:
    if path.suffix == ".ply":
        mesh = read_mesh(path)
        assert np.isfinite(mesh.vertices).all()
        for name, a in mesh.properties.items():
            assert np.isfinite(a.astype(np.float64)).all(), name
    elif path.suffix == ".npz":
        with np.load(path, allow_pickle=False) as z:
            for name in z.files:
                assert np.isfinite(z[name]).all(), name
    elif path.suffix == ".json":
        _strict_json(path.read_text())


def run_cli(category: str, args: list[str], folder: Path, outputs: list[str],
            extra_folders: tuple[Path, ...] = ()) -> int:
    """Run one command in-process and assert the promise; returns the exit code."""
    before = _digests(folder)
    existed = {o for o in outputs if (folder / o).exists()}
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main(args)
    OUTCOMES[f"{category}: exit {code}"] += 1
    message = err.getvalue()
    assert code in (0, 2), (args, code, message)
    assert "Traceback" not in message and "Warning" not in message, message
    after = _digests(folder)
    for name, digest in before.items():
        if name not in outputs:
            assert after.get(name) == digest, f"input {name} changed"
    for place in (folder, *extra_folders):
        if place.is_dir():
            left = [p.name for p in place.iterdir() if is_temporary(p.name)]
            assert not left, f"temporary files left: {left}"
    if code == 2:
        lines = message.strip().splitlines()
        assert len(lines) == 1 and lines[0].startswith("error: "), message
        for o in outputs:
            if o not in existed:
                assert not (folder / o).exists(), f"output {o} written by a failed run"
    else:
        assert message == "", message
        for o in outputs:
            if (folder / o).is_file():
                _check_output(folder / o)
    return code


@contextlib.contextmanager
def workspace():
    folder = Path(tempfile.mkdtemp(prefix="overtone-fuzz-"))
    try:
        yield folder
    finally:
        shutil.rmtree(folder, ignore_errors=True)


# ---------------------------------------------------------------- meshes and files

BASES = {
    "sphere": lambda: meshes.icosphere(1),
    "grid": lambda: meshes.grid(6, 4, jitter=0.3),
    "bumpy": lambda: meshes.noisy_sphere(1, 0.1),
}
COLOUR_TYPES = ["u1", "u2", "u4", "i2", "i4", "f4", "f8"]


@st.composite
def mesh_arrays(draw):
    """A small mesh with the odd geometry real files have, and vertex properties."""
    v, f = BASES[draw(st.sampled_from(sorted(BASES)))]()
    v, f = v.copy(), [list(t) for t in f]
    exponent = draw(st.sampled_from([0, 0, 0, -100, 100, -300, 300, 8, -8]))
    v = v * 10.0 ** exponent + draw(st.sampled_from([0.0, 0.0, 1e3, -7.5])) * 10.0 ** exponent
    for edit in draw(st.lists(st.sampled_from(["isolated", "zero_area", "hole", "duplicate", "flip", "quad",
                                                "nan", "out_of_range", "far"]), max_size=3)):
        n = len(v)
        if edit == "isolated":
            v = np.vstack([v, v[:2] * 3.0])
        elif edit == "far":  # a stray vertex at the end of the floating-point range
            v = np.vstack([v, [[1e308, -1e308, 1e308]]])
        elif edit == "zero_area":
            v = np.vstack([v, v[0], (v[0] + v[1]) / 2, v[1]])
            f.append([n, n + 1, n + 2])
        elif edit == "hole" and len(f) > 4:
            del f[draw(st.integers(0, len(f) - 1))]
        elif edit == "duplicate":
            f.append(list(f[0]))
        elif edit == "flip":
            f[0] = f[0][::-1]
        elif edit == "quad":
            v = np.vstack([v, v[:4] + 0.5])
            f.append([n, n + 1, n + 2, n + 3])
        elif edit == "nan":
            v[draw(st.integers(0, n - 1)), 0] = np.nan
        elif edit == "out_of_range":
            f.append([0, 1, n + 5])
    props = {}
    n = len(v)
    rng = np.random.default_rng(draw(st.integers(0, 1000)))
    if draw(st.booleans()):
        dt = np.dtype(draw(st.sampled_from(COLOUR_TYPES)))
        width = draw(st.sampled_from([3, 4]))
        if dt.kind == "f":
            top = draw(st.sampled_from([1.0, 255.0]))
            props["color"] = (rng.random((n, width)) * top).astype(dt)
        else:
            info = np.iinfo(dt)
            low = draw(st.sampled_from([0, int(info.min)]))
            props["color"] = rng.integers(low, int(info.max), size=(n, width), endpoint=True).astype(dt)
    if draw(st.booleans()):
        props["dirt"] = rng.random(n).astype(draw(st.sampled_from(["f4", "f8"])))
    if draw(st.booleans()):
        labels = rng.integers(0, draw(st.sampled_from([2, 5, 200])), n)
        props["part"] = labels.astype(draw(st.sampled_from(["u1", "i2", "i4", "u4"])))
    return v, f, props


def _polygons(f):
    return np.array([i for t in f for i in t], dtype=np.int64), np.array([len(t) for t in f], dtype=np.int64)


def _obj_text(v, f, props, draw) -> bytes:
    lines = [f"v {x!r} {y!r} {z!r}" for x, y, z in v.tolist()]
    comment = draw(st.sampled_from(["", " # a comment", "\t#x"]))
    lines += ["f " + " ".join(str(i + 1) for i in t) + comment for t in f]
    text = "\n".join(lines) + "\n"
    return (b"\xef\xbb\xbf" if draw(st.booleans()) else b"") + text.encode()


def _off_text(v, f, props, draw) -> bytes:
    lines = ["OFF", f"{len(v)} {len(f)} 0"] + [f"{x!r} {y!r} {z!r}" for x, y, z in v.tolist()]
    lines += [f"{len(t)} " + " ".join(map(str, t)) for t in f]
    return ("\n".join(lines) + "\n").encode()


def _ply_bytes(v, f, props, draw, binary: bool) -> bytes:
    with workspace() as tmp:
        c, s = _polygons(f)
        try:
            write_ply(tmp / "m.ply", np.nan_to_num(v, nan=0.0), corners=c, sizes=s, properties=props,
                      binary=binary)
        except ValueError:
            write_ply(tmp / "m.ply", np.zeros((3, 3)), faces=[[0, 1, 2]], binary=binary)
        data = (tmp / "m.ply").read_bytes()
    return data


def _damage(data: bytes, draw) -> bytes:
    how = draw(st.sampled_from(["none", "none", "none", "truncate", "flip", "huge", "header_count",
                                "comment_end_header", "list_in_vertex", "scalar_indices", "append"]))
    if how == "truncate" and data:
        return data[:draw(st.integers(0, len(data) - 1))]
    if how == "flip" and data:
        i = draw(st.integers(0, len(data) - 1))
        return data[:i] + bytes([data[i] ^ draw(st.integers(1, 255))]) + data[i + 1:]
    if how == "huge":
        return data.replace(b" 1 ", b" 99999999999999999999999 ", 1)
    if how == "header_count" and b"element face " in data:
        head, _, rest = data.partition(b"element face ")
        count, _, tail = rest.partition(b"\n")
        new = draw(st.sampled_from([b"0", b"1", b"99999999999999", str(max(int(count or 0) - 1, 0)).encode()]))
        return head + b"element face " + new + b"\n" + tail
    if how == "comment_end_header" and data.startswith(b"ply"):
        return data.replace(b"\n", b"\ncomment see end_header below\n", 1)
    if how == "list_in_vertex" and b"property double z\n" in data and b"format ascii" in data:
        return b"ply\nformat ascii 1.0\nelement vertex 3\nproperty float x\nproperty float y\nproperty float z\n" \
               b"property list uchar int neighbours\nelement face 1\nproperty list uchar int vertex_indices\n" \
               b"end_header\n0 0 0 2 1 2\n1 0 0 1 0\n0 1 0 0\n3 0 1 2\n"
    if how == "scalar_indices" and data.startswith(b"ply"):
        return data.replace(b"property list uchar int vertex_indices", b"property int vertex_indices")
    if how == "append":
        return data + draw(st.sampled_from([b"3 0 1 2\n", b"\x00\x01\x02\x03", b"\n", b"f 1 2 3\n"]))
    return data


@st.composite
def mesh_file(draw):
    """(file name, bytes) of a generated mesh file, possibly damaged."""
    v, f, props = draw(mesh_arrays())
    kind = draw(st.sampled_from(["ply-binary", "ply-ascii", "obj", "off"]))
    if kind == "obj":
        data, name = _obj_text(v, f, props, draw), "mesh.obj"
    elif kind == "off":
        data, name = _off_text(v, f, props, draw), "mesh.off"
    else:
        data, name = _ply_bytes(v, f, props, draw, binary=kind == "ply-binary"), "mesh.ply"
    return name, _damage(data, draw)


def _good_pair(folder: Path) -> None:
    s_v, s_f = meshes.icosphere(1)
    t_v, t_f = meshes.noisy_sphere(1, 0.05)
    dirt = (s_v[:, 2] + 1) / 2
    colour = np.column_stack([dirt, 1 - dirt, dirt * 0.5])
    write_ply(folder / "src.ply", s_v, faces=s_f,
              properties={"dirt": dirt, "color": (colour * 65535).astype(np.uint16)})
    write_ply(folder / "tgt.ply", t_v * 1.01, faces=t_f)


# ---------------------------------------------------------------- options and paths

NUMBERS = st.sampled_from(["1", "2", "3", "6", "0", "-3", "1e160", "-1e-300", "nan", "inf", "abc", "0.5",
                           "99999999999999999999", "0.05", "100", "100.5"])
OUTPUTS = st.sampled_from(["out", "out", "out", "src", "sub/../src", "link", "sub", "missing/out"])


def _output_path(folder: Path, choice: str, suffix: str) -> str:
    (folder / "sub").mkdir(exist_ok=True)
    if not (folder / "link.ply").exists():
        (folder / "link.ply").symlink_to(folder / "src.ply")
    if choice in ("sub", "missing/out"):
        return str(folder / choice)
    if choice in ("src", "sub/../src", "link"):
        return str(folder / f"{choice}.ply")
    return str(folder / f"out{suffix}")


@st.composite
def command(draw, folder: Path):
    """argv for one command on the good pair, with generated options and output paths."""
    name = draw(st.sampled_from(["basis", "approximate", "transfer", "detail"]))
    suffix = ".npz" if name == "basis" else ".ply"
    out = _output_path(folder, draw(OUTPUTS), suffix)
    src, tgt = str(folder / "src.ply"), str(folder / "tgt.ply")
    args = [name, src] + ([tgt] if name in ("transfer", "detail") else []) + ["-o", out]
    options = {
        "basis": ["--k", "--order"],
        "approximate": ["--k", "--order", "--basis", "--attributes"],
        "transfer": ["--k", "--order", "--basis", "--match", "--attributes", "--report"],
        "detail": ["--strength", "--size", "--match", "--report"],
    }[name]
    for opt in draw(st.lists(st.sampled_from(options), unique=True, max_size=3)):
        if opt == "--basis":
            value = draw(st.sampled_from(["laplacian", "products", "orthoproducts", "pointwise", "fourier"]))
        elif opt == "--match":
            value = draw(st.sampled_from(["auto", "aligned", "intrinsic", "nearest"]))
        elif opt == "--attributes":
            value = draw(st.sampled_from(["dirt", "color", "dirt,color", "", "ao", ","]))
        elif opt == "--report":
            value = _output_path(folder, draw(OUTPUTS), ".json")
        else:
            value = draw(NUMBERS)
        args += [opt, value]
    return args


def _outputs_of(args: list[str], folder: Path) -> list[str]:
    names = []
    for flag in ("-o", "--report"):
        if flag in args:
            p = Path(args[args.index(flag) + 1])
            if p.parent == folder:
                names.append(p.name)
    return names


# ---------------------------------------------------------------- the tests

@FUZZ
@given(st.data())
def test_generated_mesh_files(data):
    with workspace() as folder:
        name, content = data.draw(mesh_file())
        (folder / name).write_bytes(content)
        _good_pair(folder)
        which = data.draw(st.sampled_from(["basis", "approximate", "transfer-source", "transfer-target",
                                           "detail-target"]))
        mesh = str(folder / name)
        if which == "basis":
            args = ["basis", mesh, "-o", str(folder / "out.npz"), "--k", "6"]
        elif which == "approximate":
            args = ["approximate", mesh, "-o", str(folder / "out.ply"), "--basis", "laplacian", "--k", "8"]
        elif which == "transfer-source":
            args = ["transfer", mesh, str(folder / "tgt.ply"), "-o", str(folder / "out.ply")]
        elif which == "transfer-target":
            args = ["transfer", str(folder / "src.ply"), mesh, "-o", str(folder / "out.ply"),
                    "--report", str(folder / "r.json")]
        else:
            args = ["detail", str(folder / "src.ply"), mesh, "-o", str(folder / "out.ply"),
                    "--report", str(folder / "r.json")]
        code = run_cli("mesh files", args, folder, _outputs_of(args, folder))
        if code == 0 and which == "detail-target":
            # detail never moves a vertex that belongs to no face
            before, after = read_mesh(folder / name), read_mesh(folder / "out.ply")
            loose = np.setdiff1d(np.arange(len(before.vertices)), before.corners)
            np.testing.assert_array_equal(after.vertices[loose], before.vertices[loose])


@FUZZ
@given(st.data())
def test_generated_options_and_paths(data):
    with workspace() as folder:
        _good_pair(folder)
        args = data.draw(command(folder))
        run_cli("options and paths", args, folder, _outputs_of(args, folder))


def _nested(inner: st.SearchStrategy) -> st.SearchStrategy:
    return st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=2), inner, max_size=3)


JSON = st.recursive(st.none() | st.booleans() | st.integers(-10, 100) | st.floats() | st.text(max_size=3),
                    _nested, max_leaves=12)
PAIRS = st.lists(st.tuples(st.integers(-2, 50) | st.booleans(), st.integers(-2, 50) | st.booleans())
                 .map(list), max_size=6)


@FUZZ
@given(st.one_of(JSON.map(json.dumps), PAIRS.map(json.dumps),
                 st.integers(100, 20000).map(lambda d: "[" * d + "]" * d),
                 st.binary(max_size=40).map(lambda b: b.decode("latin-1"))))
def test_generated_landmark_files(text):
    with workspace() as folder:
        _good_pair(folder)
        (folder / "lm.json").write_text(text, encoding="utf-8", errors="surrogatepass")
        args = ["transfer", str(folder / "src.ply"), str(folder / "tgt.ply"), "-o", str(folder / "out.ply"),
                "--landmarks", str(folder / "lm.json"), "--match", "aligned"]
        run_cli("landmark files", args, folder, ["out.ply"])


CACHE_DAMAGE = ["truncate", "garbage", "float32", "drop_column", "drop_field", "extra_field", "nan", "bad_meta"]


def _damage_entry(path: Path, how: str) -> None:
    with np.load(path, allow_pickle=False) as z:
        fields = {name: z[name] for name in z.files}
    names = [n for n in fields if not n.startswith("__")]
    target = max(names, key=lambda n: fields[n].size)
    if how == "truncate":
        path.write_bytes(path.read_bytes()[: path.stat().st_size // 2])
        return
    if how == "garbage":
        path.write_bytes(b"not an npz" * 20)
        return
    a = fields[target]
    if how == "float32" and a.dtype.kind == "f":
        fields[target] = a.astype(np.float32)
    elif how == "drop_column" and a.ndim == 2 and a.shape[1] > 1:
        fields[target] = a[:, :-1]
    elif how == "drop_field":
        del fields[target]
    elif how == "extra_field":
        fields["extra"] = np.zeros(3)
    elif how == "nan" and a.dtype.kind == "f":
        fields[target] = a.copy()
        fields[target].flat[0] = np.nan
    elif how == "bad_meta" and "meta" in fields:
        fields["meta"] = np.asarray('{"mode": 3}')
    else:
        fields[target] = np.asarray(a).astype(np.int64) if a.dtype.kind == "f" else a
    np.savez(path, **fields)


@FUZZ
@given(st.sampled_from(CACHE_DAMAGE), st.integers(0, 50), st.sampled_from(["transfer", "detail"]))
def test_damaged_cache_entries_are_recomputed(how, pick, job):
    # A damaged entry is deleted and recomputed: the second run succeeds and
    # its output is the first's.
    with workspace() as folder:
        _good_pair(folder)
        cache = folder / "cache"
        args = [job, str(folder / "src.ply"), str(folder / "tgt.ply"), "-o", str(folder / "out.ply"),
                "--match", "aligned", "--cache", str(cache)]
        assert run_cli("cache entries", args, folder, ["out.ply"], (cache,)) == 0
        first = read_mesh(folder / "out.ply")
        entries = sorted(cache.iterdir())
        _damage_entry(entries[pick % len(entries)], how)
        assert run_cli("cache entries", args, folder, ["out.ply"], (cache,)) == 0
        second = read_mesh(folder / "out.ply")
        # equal up to the solver's rounding: a run that finds the map on disk
        # computes a smaller eigenbasis than one that computes the map
        np.testing.assert_allclose(second.vertices, first.vertices, rtol=0, atol=1e-9)
        for name in first.properties:
            a, b = first.properties[name], second.properties[name]
            assert a.dtype == b.dtype
            np.testing.assert_allclose(b.astype(np.float64), a.astype(np.float64), rtol=1e-6,
                                       atol=1.0 if a.dtype.kind in "iu" else 1e-9)


def _kill_run(folder: Path, sig: int, delay: float) -> int:
    env = {**os.environ, "PYTHONPATH": str(ROOT), "OPENBLAS_NUM_THREADS": "1", "OMP_NUM_THREADS": "1"}
    args = [sys.executable, "-m", "engine", "detail", str(folder / "src.ply"), str(folder / "tgt.ply"),
            "-o", str(folder / "out.ply"), "--report", str(folder / "r.json"), "--cache", str(folder / "cache")]
    proc = subprocess.Popen(args, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    time.sleep(delay)
    proc.send_signal(sig)
    _, err = proc.communicate(timeout=120)
    assert b"Traceback" not in err
    return proc.returncode


@settings(max_examples=max(2, EXAMPLES // 10), deadline=None, database=None, derandomize=not LONG,
          suppress_health_check=list(HealthCheck))
@given(st.sampled_from([signal.SIGINT, signal.SIGTERM, signal.SIGKILL]), st.floats(0.0, 1.6))
def test_killed_runs_leave_nothing_behind(sig, delay):
    # SIGINT and SIGTERM: the run removes its own temporary files. SIGKILL
    # cannot be handled: the next run removes what the killed one left.
    with workspace() as folder:
        # a run takes about 1.3 s here, 0.55 s of it importing: the delays
        # reach the computing and the writing
        v, f = meshes.icosphere(4)
        write_ply(folder / "src.ply", v * (1 + 0.02 * np.sin(9 * v[:, :1])), faces=f)
        t_v, t_f = meshes.noisy_sphere(4, 0.01)
        write_ply(folder / "tgt.ply", t_v, faces=t_f)
        code = _kill_run(folder, sig, delay)
        OUTCOMES[f"killed runs: {signal.Signals(sig).name} exit {code}"] += 1
        outputs = {p.name for p in folder.iterdir()} & {"out.ply", "r.json"}
        assert outputs in (set(), {"out.ply", "r.json"})  # all or nothing
        places = (folder, folder / "cache")
        left = [p for place in places if place.is_dir() for p in place.iterdir() if is_temporary(p.name)]
        if sig != signal.SIGKILL:
            assert code in (0, 130, 143, -sig), code
            assert not left, left
        elif left:
            OUTCOMES["killed runs: SIGKILL runs that left temporary files"] += 1
        args = ["detail", str(folder / "src.ply"), str(folder / "tgt.ply"), "-o", str(folder / "out.ply"),
                "--cache", str(folder / "cache")]
        assert run_cli("killed runs: next run", args, folder, ["out.ply"], (folder / "cache",)) == 0
