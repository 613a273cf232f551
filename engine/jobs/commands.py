"""The sub-commands of ``python -m engine`` (see engine/cli.py for the wrapper).

Each command is a pair: a function that adds its arguments to a parser and a
function that runs it and returns the exit code. Messages for users go to
stdout; errors are raised as ``ValueError``/``OSError`` and become one line.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
from numpy.typing import NDArray

from ..common.atomic import atomic_write
from ..spectra.approximation import SPECTRAL_BASES
from ..common.progress import job_stages, showing

if TYPE_CHECKING:
    from ..intake.files import MeshData
    from ..spectra.shape import Shape
    from .file_jobs import JobFiles



def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"expected a positive number, got {value}")
    return value


def _order(text: str) -> int:
    value = _positive_int(text)
    if value > 5:
        # orders above five add almost nothing (common practice)
        raise argparse.ArgumentTypeError(f"order must be between 1 and 5, got {value}")
    return value


def _finite(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None
    if not np.isfinite(value):
        raise argparse.ArgumentTypeError(f"expected a finite number, got {text!r}")
    return value


def _strength(text: str) -> float:
    from ..carrying.detail import check_strength

    try:
        return check_strength(_finite(text))
    except ValueError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from None


def _size(text: str) -> float:
    value = _finite(text)
    if not 0 < value <= 1:
        raise argparse.ArgumentTypeError(f"size must be in (0, 1] (a fraction of the shape's size), got {text}")
    return value


def _one_shape(path: str, output: str, cache_dir: str | None) -> tuple[MeshData, Shape, float]:
    """Check the output path, read the mesh and build its Shape in the unit frame; returns its scale."""
    from ..common.cache import Cache
    from ..intake.files import read_mesh
    from .file_jobs import check_paths, read_shape, surface_points, unit_frame

    check_paths([path], [output])
    data = read_mesh(path)
    frame = unit_frame(surface_points(data))
    return data, read_shape(data, Cache(cache_dir) if cache_dir else None, frame), frame[1]


def save_npz(path: str | os.PathLike[str], arrays: dict[str, NDArray[Any]]) -> None:
    """Write an ``.npz`` atomically: a temporary file in the same folder, then rename."""
    target = Path(path)
    folder = target.parent if str(target.parent) else Path(".")
    if not folder.is_dir():
        raise OSError(f"output folder {str(folder)!r} does not exist")
    with atomic_write(target) as fh:
        np.savez(fh, **arrays)


# -- basis ---------------------------------------------------------------------

def add_basis(p: argparse.ArgumentParser) -> None:
    p.add_argument("mesh", help="mesh file (.ply, .obj, .off)")
    p.add_argument("-o", "--output", required=True, help="output .npz")
    p.add_argument("--k", type=_positive_int, default=100, help="number of eigenpairs (default 100)")
    p.add_argument("--order", type=_order, help="also write the mass-orthonormal products of the "
                   "first K eigenfunctions up to this order (1-5)")
    p.add_argument("--cache", metavar="FOLDER", help="reuse and store bases in this folder")


def run_basis(args: argparse.Namespace) -> int:
    """Eigenpairs in the file's units: computed in the unit frame, then ``lambda / s^2``,
    ``phi / s`` and ``mass * s^2`` for the frame's scale ``s`` (so ``phi^T M phi = I``)."""
    data, shape, scale = _one_shape(args.mesh, args.output, args.cache)
    started = time.perf_counter()
    basis = shape.eigenbasis(args.k)
    prepared = shape.prepared
    mass = np.zeros(prepared.n_original)
    with np.errstate(over="ignore", under="ignore"):  # out of range: refused below
        mass[prepared.from_clean] = shape.mass * scale * scale
        arrays = {
            "eigenvalues": basis.eigenvalues / scale / scale,
            "eigenvectors": prepared.restore(basis.eigenvectors) / scale,
            "mass": mass,
            "residuals": basis.residuals,
        }
    line = (f"{basis.eigenvalues.shape[0]} eigenpairs of {prepared.n_original} vertices, eigenvalues "
            f"{basis.eigenvalues[0]:.3g}..{basis.eigenvalues[-1]:.4g}, worst residual {basis.residuals.max():.1e}")
    if args.order:
        products = shape.products(args.k, args.order)
        with np.errstate(over="ignore"):
            arrays["products"] = prepared.restore(products.basis) / scale
        arrays["product_exponents"] = products.exponents[products.kept]
        line += f"; {products.basis.shape[1]} of {products.exponents.shape[0]} products kept at order {args.order}"
    if not all(np.isfinite(a).all() for a in arrays.values()):
        raise ValueError(f"{args.mesh}: the eigenbasis in the file's units is beyond the floating-point range")
    save_npz(args.output, arrays)
    for note in prepared.notes:
        print(f"mesh: {note}")
    print(f"{line} ({time.perf_counter() - started:.1f} s) -> {args.output}")
    return 0


# -- approximate ---------------------------------------------------------------

def add_approximate(p: argparse.ArgumentParser) -> None:
    p.add_argument("mesh", help="mesh file with vertex properties (.ply)")
    p.add_argument("-o", "--output", required=True, help="output .ply")
    p.add_argument("--basis", choices=SPECTRAL_BASES, default="orthoproducts")
    p.add_argument("--k", type=_positive_int, help="eigenfunctions: the basis size for 'laplacian' "
                   "(default 100); the eigenfunctions multiplied for the product bases (default: "
                   "chosen from the vertex count)")
    p.add_argument("--order", type=_order, default=3, help="product order for the product bases (default 3)")
    p.add_argument("--attributes", help="comma-separated vertex properties (default: all but normals)")
    p.add_argument("--cache", metavar="FOLDER", help="reuse and store bases in this folder")


def run_approximate(args: argparse.Namespace) -> int:
    from ..carrying.preview import approximate_properties
    from ..intake.files import write_ply

    data, shape, _ = _one_shape(args.mesh, args.output, args.cache)
    names = _split_names(args.attributes)
    result = approximate_properties(shape, data.properties, basis=args.basis, k=args.k,
                                    order=args.order, names=names)
    props = dict(data.properties)
    props.update(result.properties)
    write_ply(args.output, data.vertices, corners=data.corners, sizes=data.sizes, properties=props)
    print(f"basis {args.basis}: {result.description}")
    for name, error in result.errors.items():
        print(f"  {name}: relative error {error:.4f}")
    return 0


def _split_names(text: str | None) -> list[str] | None:
    if text is None:
        return None
    names = [t.strip() for t in text.split(",") if t.strip()]
    if not names:
        raise ValueError("--attributes is empty")
    return names


# -- transfer and detail --------------------------------------------------------

def _add_pair_arguments(p: argparse.ArgumentParser) -> None:
    from ..matching.correspondence import MATCHES

    p.add_argument("source", help="source mesh file (.ply, .obj, .off)")
    p.add_argument("target", help="target mesh file (.ply, .obj, .off)")
    p.add_argument("-o", "--output", required=True, help="output .ply")
    p.add_argument("--match", choices=MATCHES, default="auto",
                   help="how to find corresponding points (default auto: by measured overlap)")
    p.add_argument("--landmarks", metavar="PAIRS.json",
                   help="JSON list of [source_vertex, target_vertex] pairs known to correspond")
    p.add_argument("--report", metavar="REPORT.json", help="write the run's report here")
    p.add_argument("--cache", metavar="FOLDER", help="reuse and store bases and correspondences here")


def add_transfer(p: argparse.ArgumentParser) -> None:
    from ..carrying.transfer import BASES as TRANSFER_BASES

    _add_pair_arguments(p)
    p.add_argument("--attributes", help="comma-separated source vertex properties (default: all but "
                   "coordinates and normals)")
    p.add_argument("--basis", choices=TRANSFER_BASES, default=None,
                   help="how continuous signals travel (default: the engine's default)")
    p.add_argument("--k", type=_positive_int, help="eigenfunctions of the 'laplacian' basis")
    p.add_argument("--order", type=_order, help="product order of the product bases (1-5)")


def run_transfer(args: argparse.Namespace) -> int:
    from .file_jobs import JobOptions, run_transfer_job

    options = JobOptions(attributes=_split_names(args.attributes), basis=args.basis, match=args.match,
                         k=args.k, order=args.order)
    with showing(sys.stdout, job_stages("transfer")):
        report = run_transfer_job(_job_files(args), options)
    _print_pair_report(report)
    basis = report["settings"]["basis"]
    for name, info in report.get("signals", {}).items():
        if info["kind"] in ("label", "mask"):
            print(f"  {name} ({info['kind']}): majority of the source triangle's corners, never blended")
        elif basis == "pointwise":
            print(f"  {name} ({info['kind']}): interpolated on source triangles, unfiltered")
        else:
            print(f"  {name} ({info['kind']}): the {basis} basis carries it on the source with relative "
                  f"error {info['source_error']:.4f}")
    print(f"-> {args.output}")
    return 0


def add_detail(p: argparse.ArgumentParser) -> None:
    _add_pair_arguments(p)
    p.add_argument("--strength", type=_strength, default=None,
                   help="scale of the carried detail, -100 to 100 (default 1)")
    p.add_argument("--size", type=_size, default=None,
                   help="features shorter than this fraction of the shape's size are detail (default 0.05)")


def run_detail(args: argparse.Namespace) -> int:
    from .file_jobs import JobOptions, run_detail_job

    options = JobOptions(match=args.match, strength=args.strength, size=args.size)
    with showing(sys.stdout, job_stages("detail")):
        report = run_detail_job(_job_files(args), options)
    _print_pair_report(report)
    d = report["detail"]
    print(f"  detail: strength {d['strength']:g}, size {d['size']:g}; target vertices moved by "
          f"{_number(d['mean_offset'])} on average, {_number(d['max_offset'])} at most")
    print(f"-> {args.output}")
    return 0


def _job_files(args: argparse.Namespace) -> JobFiles:
    from .file_jobs import JobFiles

    return JobFiles(args.source, args.target, args.output, report=args.report, landmarks=args.landmarks,
                    cache=args.cache)


def _print_pair_report(report: dict[str, Any]) -> None:
    print(f"match: {report['mode']} ({report['reason']})")
    cov = report.get("coverage_of_source_area")
    cons = report.get("consistency") or {}
    line = f"  mean confidence {report['mean_confidence']:.3f}"
    if cov is not None:
        line += f", covers {cov:.1%} of the source area"
    if cons.get("within_2_edges") is not None:
        line += f", {cons['within_2_edges']:.1%} of round trips within 2 edges"
    print(line + f"; {report['timings'].get('total', 0):.1f} s")


def _number(x: float | None) -> str:
    return "beyond the floating-point range" if x is None else f"{x:.3g}"


# -- demo ----------------------------------------------------------------------

def add_demo(p: argparse.ArgumentParser) -> None:
    p.add_argument("--output", default="demo_output", help="folder for the demo's files (default demo_output)")


def run_demo(args: argparse.Namespace) -> int:
    from .demo import creature, creature_signals
    from ..intake.files import write_ply
    from ..carrying.preview import approximate_properties
    from ..spectra.shape import Shape

    out = Path(args.output)
    out.mkdir(parents=True, exist_ok=True)
    c = creature(120, 48)
    signals = creature_signals(c.uv)
    from ..carrying.color import encode_bytes
    props = {"color": encode_bytes(signals["tint"]), "dirt": signals["dirt"].astype(np.float32),
             "head": signals["head"].astype(np.float32), "stripe_id": signals["stripe_id"].astype(np.int32)}
    path = out / "creature.ply"
    write_ply(path, c.vertices, faces=c.faces, properties=props)
    print(f"demo creature: {len(c.vertices)} vertices, {len(c.faces)} triangles -> {path}")
    shape = Shape(c.vertices, c.faces)  # type: ignore[no-untyped-call, unused-ignore]
    rows = []
    runs = [("orthoproducts", None), ("products", None), ("laplacian", 100)]
    for basis, k in runs:
        started = time.perf_counter()
        result = approximate_properties(shape, props, basis=basis, k=k, order=3)
        rows.append((basis, result.description, result.errors, time.perf_counter() - started))
        merged = dict(props)
        merged.update(result.properties)
        write_ply(out / f"creature_{basis}.ply", c.vertices, faces=c.faces, properties=merged)
        if basis == "orthoproducts":  # the eigenbasis at the same size, for a fair comparison
            runs.append(("laplacian", result.size))
    names = list(props)
    print("\nrelative mass-weighted L2 error of each signal, reconstructed through each basis:")
    print(f"{'basis':<15}{'size':<58}" + "".join(f"{n:>11}" for n in names) + f"{'time':>8}")
    for basis, desc, errors, secs in rows:
        print(f"{basis:<15}{desc:<58}" + "".join(f"{errors[n]:>11.4f}" for n in names) + f"{secs:>7.1f}s")
    print("(labels such as stripe_id are never filtered: 0 by construction)")
    summary = [{"basis": basis, "size": desc, "errors": errors} for basis, desc, errors, _ in rows]
    with atomic_write(out / "approximation.json", text=True) as fh:
        fh.write(json.dumps(summary, indent=2, allow_nan=False))
    print(f"\nwrote {out}/creature_<basis>.ply and {out}/approximation.json")
    return 0


COMMANDS = {
    "basis": (add_basis, run_basis, "eigenbasis (and product basis) of a mesh, written to .npz"),
    "approximate": (add_approximate, run_approximate,
                    "reconstruct a mesh's vertex properties through a basis, written to .ply"),
    "transfer": (add_transfer, run_transfer,
                 "carry a source mesh's vertex properties to a target mesh, written to .ply"),
    "detail": (add_detail, run_detail, "carry a source mesh's surface detail to a target mesh, written to .ply"),
    "demo": (add_demo, run_demo, "run the engine on the built-in demo creature"),
}
