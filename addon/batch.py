"""``overtone_batch``: carry signals between many object pairs of one .blend file.

    blender -b scene.blend -c overtone_batch JOB.json [--report R.json] [--save | --save-as OUT.blend]
    blender -b scene.blend -P scripts/overtone_batch.py -- JOB.json [...]

JOB.json (version 1)::

    {
      "version": 1,
      "settings": {"match_mode": "auto", "eigenfunctions": 80},      # optional, for every pair
      "pairs": [
        {"source": "Scan", "target": "LOD1", "signals": ["AO", "Dirt"]},
        {"source": "Scan", "target": "LOD2", "signals": "all", "detail": true,
         "settings": {"basis": "laplacian"}}
      ],
      "report": "report.json",                                        # optional
      "save": "none" | "overwrite" | {"as": "out.blend"}              # optional, default "none"
    }

``"signals": "all"`` (the default) carries what the UI carries when nothing is
ticked: every colour attribute and vertex group (:func:`.runs.default_signals`).
``settings`` keys are the panel's names (:data:`.runs.ENGINE_NAMES` plus the
flags ``as_shown``, ``replace_existing``, ``local_space``, ``keep_earlier``,
``write_anyway``). Re-runs follow the operators' rule (:mod:`.records`).
Relative paths are relative to the job file. Everything is checked (objects exist,
are meshes, carry the named signals) before the first pair runs. Exit codes: 0 every
pair done; 1 some pair failed (the report says which and why; the others are kept);
2 the job could not start or the file could not be saved. A named report is
written whatever the exit code (``exit_code`` in it; ``error`` when nothing ran),
as long as its path can be read from ``--report`` or from the job file.
"""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import bpy

from .properties import BASES, MATCH_MODES
from .runs import PairRequest, check_pair, default_signals, engine_settings, transfer_pair

__all__ = ["COMMAND", "JobError", "Job", "PairJob", "load_job", "main", "register", "unregister"]

COMMAND = "overtone_batch"
JOB_VERSION = 1


class JobError(ValueError):
    """The job cannot start: bad file, bad schema, or objects that do not fit."""


@dataclass(frozen=True)
class PairJob:
    source: str
    target: str
    request: PairRequest


@dataclass(frozen=True)
class Job:
    pairs: tuple[PairJob, ...]
    report: Path | None = None
    save: str = "none"              # "none" | "overwrite" | "as"
    save_as: Path | None = None
    notes: list[str] = field(default_factory=list)


_CHOICES = {"match_mode": [m[0] for m in MATCH_MODES], "basis": [b[0] for b in BASES]}
_SETTING_TYPES: dict[str, type | tuple[type, ...]] = {
    "match_mode": str, "basis": str, "eigenfunctions": int, "product_order": int,
    "detail_strength": (int, float), "detail_size": (int, float), "as_shown": bool,
    "replace_existing": bool, "max_influences": int, "weight_threshold": (int, float),
    "keep_weight_totals": bool, "local_space": bool, "keep_earlier": bool, "write_anyway": bool,
}
_FLAGS = ("as_shown", "replace_existing", "local_space", "keep_earlier", "write_anyway")
_PAIR_KEYS = {"source", "target", "signals", "detail", "settings"}
_JOB_KEYS = {"version", "settings", "pairs", "report", "save"}


def _apply_settings(request: PairRequest, settings: Any, where: str) -> PairRequest:
    if not isinstance(settings, dict):
        raise JobError(f"{where}: 'settings' must be an object, got {type(settings).__name__}")
    changes: dict[str, Any] = {}
    value: Any
    for key, value in settings.items():
        expected = _SETTING_TYPES.get(key)
        if expected is None:
            raise JobError(f"{where}: unknown setting {key!r} "
                           f"(known: {', '.join(sorted(_SETTING_TYPES))})")
        fits = isinstance(value, expected)  # kept apart: no narrowing of value to object
        if isinstance(value, bool) and expected is not bool or not fits:
            raise JobError(f"{where}: setting {key!r} has the wrong type: {value!r}")
        if key in _CHOICES:
            value = value.upper()
            if value not in _CHOICES[key]:
                raise JobError(f"{where}: unknown {key} {value.lower()!r} "
                               f"(choose from {', '.join(c.lower() for c in _CHOICES[key])})")
        elif key in ("eigenfunctions", "product_order") and value < 1:
            raise JobError(f"{where}: setting {key!r} must be at least 1, got {value}")
        elif key == "detail_size" and not 0 < value <= 1:
            raise JobError(f"{where}: setting 'detail_size' must be in (0, 1], got {value}")
        changes[key] = value
    flags = {key: changes.pop(key) for key in _FLAGS if key in changes}
    try:
        settings = engine_settings(changes, request.settings)
    except ValueError as error:
        raise JobError(f"{where}: {error}") from None
    return replace(request, settings=settings, **flags)


def _path(value: Any, base: Path, where: str) -> Path:
    if not isinstance(value, str) or not value:
        raise JobError(f"{where} must be a non-empty path string, got {value!r}")
    path = Path(value)
    return path if path.is_absolute() else base / path


def load_job(path: Path) -> Job:
    """Read and check a JOB.json file (schema only; objects are checked by :func:`check_job`).

    Raises
    ------
    JobError
    """
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except OSError as error:
        raise JobError(f"cannot read job file {str(path)!r}: {error.strerror}") from None
    except json.JSONDecodeError as error:
        raise JobError(f"job file {str(path)!r} is not valid JSON: {error.msg} "
                       f"at line {error.lineno} column {error.colno}") from None
    if not isinstance(data, dict):
        raise JobError(f"job file must hold a JSON object, got {type(data).__name__}")
    unknown = set(data) - _JOB_KEYS
    if unknown:
        raise JobError(f"unknown job key(s) {', '.join(map(repr, sorted(unknown)))}")
    if data.get("version", JOB_VERSION) != JOB_VERSION:
        raise JobError(f"job version {data.get('version')!r} not supported (this reads {JOB_VERSION})")
    base = path.resolve().parent
    defaults = _apply_settings(PairRequest(), data.get("settings", {}), "job")
    pairs = data.get("pairs")
    if not isinstance(pairs, list) or not pairs:
        raise JobError("job needs a non-empty list 'pairs'")
    jobs = []
    for i, pair in enumerate(pairs):
        where = f"pair {i}"
        if not isinstance(pair, dict):
            raise JobError(f"{where} must be an object, got {type(pair).__name__}")
        unknown = set(pair) - _PAIR_KEYS
        if unknown:
            raise JobError(f"{where}: unknown key(s) {', '.join(map(repr, sorted(unknown)))}")
        for key in ("source", "target"):
            if not isinstance(pair.get(key), str) or not pair[key]:
                raise JobError(f"{where}: {key!r} must be an object name, got {pair.get(key)!r}")
        signals = pair.get("signals", "all")
        if signals != "all" and not (isinstance(signals, list)
                                     and all(isinstance(s, str) for s in signals)):
            raise JobError(f"{where}: 'signals' must be \"all\" or a list of names, got {signals!r}")
        detail = pair.get("detail", False)
        if not isinstance(detail, bool):
            raise JobError(f"{where}: 'detail' must be true or false, got {detail!r}")
        request = _apply_settings(defaults, pair.get("settings", {}), where)
        names = ("*",) if signals == "all" else tuple(signals)
        jobs.append(PairJob(pair["source"], pair["target"],
                            replace(request, signals=names, detail=detail)))
    report = _path(data["report"], base, "'report'") if "report" in data else None
    save = data.get("save", "none")
    save_as = None
    if isinstance(save, dict) and set(save) == {"as"}:
        save_as, save = _path(save["as"], base, "'save.as'"), "as"
    elif save not in ("none", "overwrite"):
        raise JobError(f"'save' must be \"none\", \"overwrite\" or {{\"as\": PATH}}, got {save!r}")
    return Job(tuple(jobs), report, save, save_as)


def check_job(job: Job) -> Job:
    """Look up every object and signal; resolve ``"all"``. Raises JobError."""
    checked = []
    for i, pair in enumerate(job.pairs):
        objs: list[bpy.types.Object] = []
        for role in ("source", "target"):
            name = getattr(pair, role)
            obj = bpy.data.objects.get(name)
            if obj is None:
                raise JobError(f"pair {i}: {role} object {name!r} not found in "
                               f"{bpy.data.filepath or 'the open file'}")
            objs.append(obj)
        request = pair.request
        if request.signals == ("*",):
            if objs[0].type == 'MESH' and objs[1].type == 'MESH':
                listed = list(default_signals(objs[0], objs[1], evaluated=request.as_shown,
                                              replace_existing=request.replace_existing))
            else:
                listed = []
            if not listed and request.detail:
                request = replace(request, signals=())
            else:
                request = replace(request, signals=tuple(listed))
        try:
            check_pair(objs[0], objs[1], request)
        except ValueError as error:
            raise JobError(f"pair {i}: {error}") from None
        checked.append(replace(pair, request=request))
    return replace(job, pairs=tuple(checked))


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog=COMMAND, description="Carry signals between object pairs of the open .blend file.",
        epilog="Exit codes: 0 all pairs done, 1 some pair failed, 2 the job could not start "
               "or the file could not be saved.")
    parser.add_argument("job", help="JOB.json listing the pairs (see the add-on's batch.py)")
    parser.add_argument("--report", metavar="PATH", help="write the JSON report here "
                        "(overrides the job's 'report')")
    group = parser.add_mutually_exclusive_group()
    group.add_argument("--save", action="store_true", help="save the open file in place")
    group.add_argument("--save-as", metavar="PATH", help="save the result as a new file")
    return parser


def _fail(message: str) -> int:
    print(f"{COMMAND}: error: {message}", file=sys.stderr)
    return 2


def _save(job: Job) -> str | None:
    if job.save == "none":
        return None
    if job.save == "overwrite":
        if not bpy.data.filepath:
            raise JobError("the open file has never been saved: use --save-as PATH")
        bpy.ops.wm.save_mainfile()
        return bpy.data.filepath
    assert job.save_as is not None
    job.save_as.parent.mkdir(parents=True, exist_ok=True)
    bpy.ops.wm.save_as_mainfile(filepath=str(job.save_as))
    return str(job.save_as)


def run_job(job: Job) -> tuple[int, dict[str, Any]]:
    """Run every pair of a checked job; returns (exit code, report).

    Each pair is announced on standard output, then the engine's stages as the
    command line shows them (``engine/common/progress.py``): a redrawn bar on a
    terminal, one plain line per stage otherwise."""
    results = []
    for number, pair in enumerate(job.pairs, start=1):
        entry: dict[str, Any] = {"source": pair.source, "target": pair.target,
                                 "signals": list(pair.request.signals),
                                 "detail": pair.request.detail}
        print(f"{COMMAND}: pair {number} of {len(job.pairs)}: {pair.source} -> {pair.target}", flush=True)
        try:
            entry["result"] = transfer_pair(bpy.data.objects[pair.source],
                                            bpy.data.objects[pair.target], pair.request, show=sys.stdout)
            entry["status"] = "done"
        except (ValueError, RuntimeError) as error:
            entry["status"] = "failed"
            entry["error"] = str(error)
            print(f"{COMMAND}: {pair.source} -> {pair.target}: {error}", file=sys.stderr)
        results.append(entry)
    failed = sum(r["status"] != "done" for r in results)
    report = {"file": bpy.data.filepath, "pairs": results, "failed": failed, "saved": None}
    return (1 if failed else 0), report


def _report_path(args: argparse.Namespace) -> Path | None:
    """Where the report goes even when the job does not load: ``--report``, else
    the job file's own ``report`` if the file can be read that far."""
    if args.report:
        return Path(args.report)
    job_path = Path(args.job)
    try:
        data = json.loads(job_path.read_text(encoding="utf-8"))
        return _path(data["report"], job_path.resolve().parent, "'report'")
    except (OSError, ValueError, KeyError, TypeError):  # JobError is a ValueError
        return None


def _write_report(path: Path | None, report: dict[str, Any], code: int) -> int:
    """Write ``report`` (with ``exit_code``) whole or not at all; return the exit code."""
    if path is None:
        return code
    report["exit_code"] = code
    partial = path.with_name(f".{path.name}.part")
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        partial.write_text(json.dumps(report, indent=2) + "\n", encoding="utf-8")
        partial.replace(path)
    except OSError as error:
        partial.unlink(missing_ok=True)
        return _fail(f"cannot write report {str(path)!r}: {error.strerror}")
    return code


def main(argv: Sequence[str]) -> int:
    """The command-line handler: parse ``argv``, run the job, return the exit code."""
    parser = _parser()
    try:
        args = parser.parse_args(list(argv))
    except SystemExit as stop:  # --help (0) or a usage error (2), already printed
        return int(stop.code or 0)
    try:
        job = load_job(Path(args.job))
        if args.report:
            job = replace(job, report=Path(args.report))
        if args.save:
            job = replace(job, save="overwrite", save_as=None)
        elif args.save_as:
            job = replace(job, save="as", save_as=Path(args.save_as))
        job = check_job(job)
    except JobError as error:  # nothing ran; the report, if one is named, says why
        nothing: dict[str, Any] = {"file": bpy.data.filepath, "pairs": [], "failed": 0,
                                   "saved": None, "error": str(error)}
        return _write_report(_report_path(args), nothing, _fail(str(error)))
    code, report = run_job(job)
    try:
        if code == 0 or any(r["status"] == "done" for r in report["pairs"]):
            report["saved"] = _save(job)
    except (JobError, RuntimeError, OSError) as error:
        report["save_error"] = str(error)
        code = _fail(f"could not save: {error}")
    return _write_report(job.report, report, code)


_handle: Any = None


def register() -> None:
    global _handle
    _handle = bpy.utils.register_cli_command(COMMAND, main)  # type: ignore[func-returns-value]


def unregister() -> None:
    global _handle
    if _handle is not None:
        bpy.utils.unregister_cli_command(_handle)
        _handle = None
