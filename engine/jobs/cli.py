"""Command line: ``python -m engine COMMAND ...``.

Commands
    basis        eigenbasis (and product basis) of a mesh, to .npz
    approximate  reconstruct a mesh's vertex properties through a basis, to .ply
    transfer     carry vertex properties from a source mesh to a target mesh
    detail       carry surface detail from a source mesh to a target mesh
    demo         run the engine on the built-in demo creature

Every run ends in one of four ways, and prints at most one line on stderr:

    0    done
    2    bad input or options: ``error: ...`` saying what is wrong
    3    an internal error: ``error: internal error ...`` naming the log file
         that holds the details (the traceback)
    130  interrupted (SIGINT), 143 terminated (SIGTERM); no partial files left

Warnings raised while running (numpy's ``RuntimeWarning`` on bad input, for
example) are collected, never printed; an internal error's log holds them.
"""

from __future__ import annotations

import argparse
import importlib
import os
import sys
import tempfile
import time
import traceback
import warnings
from collections.abc import Sequence
from typing import NoReturn

from ..common.allocator import keep_freed_memory
from ..common.atomic import end_on_signals, is_temporary, remove_own_temporaries

EXIT_BAD_INPUT = 2
EXIT_INTERNAL = 3
EXIT_INTERRUPTED = 130
EXIT_TERMINATED = 143  # 128 + SIGTERM (15), as shells report it (common practice)


class _Parser(argparse.ArgumentParser):
    """An argument parser whose errors are one line, exit code 2."""

    def error(self, message: str) -> NoReturn:
        raise UsageError(f"{self.prog}: {message}")


class UsageError(Exception):
    """Bad command-line arguments."""


def build_parser() -> argparse.ArgumentParser:
    from .commands import COMMANDS

    parser = _Parser(prog="python -m engine", description="Overtone's spectral engine.")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for name, (add_arguments, _, help_text) in COMMANDS.items():
        add_arguments(sub.add_parser(name, help=help_text, description=help_text))
    return parser


def _run(argv: list[str]) -> int:
    from .commands import COMMANDS

    parser = build_parser()
    args = parser.parse_args(argv)
    if not args.command:
        raise UsageError(f"python -m engine: a command is needed ({', '.join(COMMANDS)}); "
                         "see python -m engine --help")
    code: int = COMMANDS[args.command][1](args)
    return code


def bad_input_message(exc: BaseException) -> str | None:
    """The one line for a user's mistake, or None for an internal error."""
    if isinstance(exc, UsageError):
        return str(exc)
    if isinstance(exc, MemoryError):
        return "out of memory; try a smaller mesh, --k or --order"
    if isinstance(exc, OSError):
        name = exc.filename
        if name is not None and is_temporary(os.fspath(name)):
            name = os.path.dirname(os.fspath(name)) or "."
            return f"cannot write in {name}: {exc.strerror or exc}"
        return f"{name}: {exc.strerror or exc}" if name is not None else str(exc)
    if isinstance(exc, ValueError):
        return " ".join(str(exc).split()) or type(exc).__name__
    return None


def _save_details(exc: BaseException, args: list[str], caught: list[warnings.WarningMessage]) -> str:
    fd, path = tempfile.mkstemp(prefix="overtone-error-", suffix=".log")
    with os.fdopen(fd, "w", encoding="utf-8", errors="replace") as fh:
        fh.write(f"python -m engine {' '.join(args)}\n{time.strftime('%Y-%m-%dT%H:%M:%S%z')}\n\n")
        fh.write("".join(traceback.format_exception(exc)))
        for w in caught:
            fh.write(f"\nwarning: {w.category.__name__}: {w.message} ({w.filename}:{w.lineno})")
    return path


# Imported before SIGINT/SIGTERM start raising: an exception inside a module's
# import would leave it half made; while the package starts, those signals end
# the process quietly instead (engine/__init__.py).
_IMPORTED_FIRST = ("scipy.sparse.linalg", "scipy.spatial", "engine.jobs.commands", "engine.jobs.file_jobs",
                   "engine.carrying.preview", "engine.carrying.signals", "engine.carrying.corners")


def main(argv: Sequence[str] | None = None) -> int:
    """Run one command; returns the exit code (see the module docstring)."""
    args = list(sys.argv[1:] if argv is None else argv)
    for name in _IMPORTED_FIRST:
        importlib.import_module(name)
    keep_freed_memory()
    with warnings.catch_warnings(record=True) as caught, end_on_signals():
        warnings.simplefilter("always")
        try:
            return _run(args)
        except KeyboardInterrupt:  # raised by code of its own, not by a signal (end_on_signals)
            remove_own_temporaries()
            print("error: interrupted", file=sys.stderr)
            return EXIT_INTERRUPTED
        except Exception as exc:  # every other failure ends in one line, never a traceback
            message = bad_input_message(exc)
            if message is not None:
                print(f"error: {message}", file=sys.stderr)
                return EXIT_BAD_INPUT
            try:
                where = f"details saved to {_save_details(exc, args, caught)}"
            except OSError as log_error:
                where = f"the details could not be saved ({log_error.strerror or log_error})"
            print(f"error: internal error ({type(exc).__name__}); {where}", file=sys.stderr)
            return EXIT_INTERNAL
