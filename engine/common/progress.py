"""Stages of a long job, shown while it runs.

The engine calls :func:`stage` at each step of a job (reading, matching,
carrying, writing); nothing is shown unless a caller has opened a
:func:`showing` block around the job. The command line does: on a terminal
one line redrawn in place, a bar of the stages done and the current stage's
name; otherwise one plain line per stage (``stage 2/4: matching``). The
add-on can follow the same stages by opening the block with its own writer.
"""

from __future__ import annotations

import contextlib
import time
from collections.abc import Iterator
from typing import TextIO

__all__ = ["stage", "showing", "BAR_WIDTH"]

BAR_WIDTH = 20


class _Shown:
    """Where stages go and how many are expected."""

    def __init__(self, stream: TextIO, total: int, terminal: bool) -> None:
        self.stream, self.total, self.terminal = stream, total, terminal
        self.done = 0
        self.started = time.perf_counter()

    def write(self, name: str) -> None:
        self.done = min(self.done + 1, self.total)
        seconds = time.perf_counter() - self.started
        if self.terminal:
            filled = BAR_WIDTH * (self.done - 1) // max(self.total, 1)
            bar = "#" * filled + "-" * (BAR_WIDTH - filled)
            self.stream.write(f"\r[{bar}] {self.done}/{self.total} {name} ({seconds:.0f} s)\x1b[K")
        else:
            self.stream.write(f"stage {self.done}/{self.total}: {name} ({seconds:.1f} s)\n")
        self.stream.flush()

    def close(self) -> None:
        if self.terminal:
            self.stream.write("\r\x1b[K")
            self.stream.flush()


_current: list[_Shown] = []


def stage(name: str) -> None:
    """Announce the next stage of the running job (shown only inside :func:`showing`)."""
    if _current:
        _current[-1].write(name)


@contextlib.contextmanager
def showing(stream: TextIO, total: int) -> Iterator[None]:
    """Show the stages announced inside this block on ``stream``: a redrawn bar
    on a terminal, plain lines otherwise. ``total``: the stages expected."""
    try:
        terminal = bool(stream.isatty())
    except (AttributeError, ValueError):
        terminal = False
    shown = _Shown(stream, total, terminal)
    _current.append(shown)
    try:
        yield
    finally:
        _current.remove(shown)
        shown.close()
