"""Command line: ``python -m engine COMMAND ...``.

Commands
    basis        eigenbasis (and product basis) of a mesh, to .npz
    approximate  reconstruct a mesh's vertex properties through a basis, to .ply
    demo         run the engine on the built-in demo creature

Bad input ends with exit code 2 and one line on stderr saying what is wrong;
never a traceback.
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Sequence

EXIT_BAD_INPUT = 2

class _Parser(argparse.ArgumentParser):
    """An argument parser whose errors are one line, exit code 2."""

    def error(self, message: str) -> None:  # type: ignore[override]
        raise _UsageError(f"{self.prog}: {message}")


class _UsageError(Exception):
    pass


def build_parser() -> argparse.ArgumentParser:
    from .commands import COMMANDS

    parser = _Parser(prog="python -m engine", description="Overtone's spectral engine.")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for name, (add_arguments, _, help_text) in COMMANDS.items():
        add_arguments(sub.add_parser(name, help=help_text, description=help_text))
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    try:
        parser = build_parser()
        args = parser.parse_args(list(sys.argv[1:] if argv is None else argv))
        if not args.command:
            parser.print_help()
            return EXIT_BAD_INPUT
        from .commands import COMMANDS
        return COMMANDS[args.command][1](args)
    except _UsageError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except (ValueError, OSError, KeyError) as exc:
        if isinstance(exc, OSError) and exc.filename is not None:
            message = f"{exc.filename}: {exc.strerror or exc}"
        else:
            message = str(exc) if not isinstance(exc, KeyError) else f"missing {exc}"
        print(f"error: {message}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except MemoryError:
        print("error: out of memory; try a smaller --k or --order", file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        print("error: interrupted", file=sys.stderr)
        return 130
