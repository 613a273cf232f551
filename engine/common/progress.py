"""Stages of a long job, shown while it runs: one list for the command line and the add-on.

Every job passes through some of :data:`STAGES`, in that order; :func:`job_stages`
gives the plan of each kind of job. The engine calls :func:`stage` as it enters
a stage (reading, matching, carrying, writing; inside matching, for meshes
matched through simplified copies, also simplifying and refining the match at
full resolution); nothing is shown unless a caller opened a :func:`showing`
block around the job. A run that will not pass some planned stages says so
with :func:`skip` (a small mesh needs no simplified copy; a match kept from an
earlier run needs no matching), so the count shrinks instead of jumping.

Each stage reaches the block's writer as a :class:`Step` (its name, its number
and the plan's length, the seconds since the block opened), and the block's
end as a step named :data:`DONE` (or :data:`STOPPED` when the job failed). The
command line writes to a stream (:func:`stream_writer`): on a terminal one
line redrawn in place, a bar of the stages done and the current stage's name;
otherwise one plain line per stage (``stage 2/4: matching the surfaces (0.3 s)``).
The add-on passes its own writer (the worker's progress file, the window's
progress), so both show the same stages in the same order.
"""

from __future__ import annotations

import contextlib
import time
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from typing import TextIO

__all__ = ["stage", "skip", "showing", "Step", "Writer", "stream_writer", "job_stages", "STAGES",
           "READING", "SIMPLIFYING", "MATCHING", "REFINING", "CARRYING", "DETAIL", "SMOOTHING", "WRITING",
           "DONE", "STOPPED", "STANDIN_STAGES", "MATCHING_STAGES", "BAR_WIDTH"]

BAR_WIDTH = 20

READING = "reading the meshes"
SIMPLIFYING = "simplifying the meshes"
MATCHING = "matching the surfaces"
REFINING = "refining the match at full resolution"
CARRYING = "carrying the values"
DETAIL = "carrying the detail"
SMOOTHING = "smoothing the values"
WRITING = "writing the result"
STAGES = (READING, SIMPLIFYING, MATCHING, REFINING, CARRYING, DETAIL, SMOOTHING, WRITING)
"""Every stage, in the order a job passes them (names in words an artist reads)."""

DONE = "done"
STOPPED = "stopped"

STANDIN_STAGES = (SIMPLIFYING, REFINING)
"""The stages only a match through simplified copies passes (large meshes)."""
MATCHING_STAGES = (SIMPLIFYING, MATCHING, REFINING)
"""Every stage of matching (all skipped when the match is kept from an earlier run)."""

_PLANS = {
    "transfer": (READING, *MATCHING_STAGES, CARRYING, WRITING),
    "detail": (READING, *MATCHING_STAGES, DETAIL, WRITING),
    "preview": (READING, SMOOTHING, WRITING),
}


def job_stages(*kinds: str) -> tuple[str, ...]:
    """The stages of a job of these kinds ("transfer", "detail", "preview"; several when one
    run does them together), in the order of :data:`STAGES`."""
    unknown = [kind for kind in kinds if kind not in _PLANS]
    if unknown or not kinds:
        raise ValueError(f"unknown job kind {unknown[0] if unknown else ''!r}; expected one of {', '.join(_PLANS)}")
    wanted = {name for kind in kinds for name in _PLANS[kind]}
    return tuple(name for name in STAGES if name in wanted)


@dataclass(frozen=True)
class Step:
    """One stage as shown: ``name`` (one of :data:`STAGES`, or :data:`DONE` / :data:`STOPPED`),
    its number ``done`` in a plan of ``total`` stages (1-based; ``total`` at the end), and the
    ``seconds`` since the job's block opened."""

    name: str
    done: int
    total: int
    seconds: float

    @property
    def fraction(self) -> float:
        """The share of the plan behind: the stages before this one (1.0 once done)."""
        if self.name == DONE:
            return 1.0
        return min(max(self.done - 1, 0) / max(self.total, 1), 1.0)


Writer = Callable[[Step], None]
"""Where a :func:`showing` block sends each :class:`Step`."""


class _Shown:
    """The plan of one block and how far the job has come in it."""

    def __init__(self, write: Writer, stages: Sequence[str]) -> None:
        self.write, self.plan, self.at = write, list(stages), 0
        self.started = time.perf_counter()

    def step(self, name: str) -> Step:
        return Step(name, self.at if name in (DONE, STOPPED) else self.plan.index(name) + 1, len(self.plan),
                    time.perf_counter() - self.started)

    def enter(self, name: str) -> None:
        """Show ``name`` if it lies ahead in the plan; a stage of another kind of job, one skipped,
        or one already passed (pieces of a mesh are matched one after another) is not shown."""
        if name in self.plan and self.plan.index(name) + 1 > self.at:
            self.at = self.plan.index(name) + 1
            self.write(self.step(name))

    def skip(self, names: Sequence[str]) -> None:
        self.plan = [name for i, name in enumerate(self.plan) if i < self.at or name not in names]

    def end(self, name: str) -> None:
        self.at = len(self.plan) if name == DONE else self.at
        self.write(self.step(name))


_current: list[_Shown] = []


def stage(name: str) -> None:
    """Announce that the running job enters stage ``name`` (shown only inside :func:`showing`)."""
    if _current:
        _current[-1].enter(name)


def skip(*names: str) -> None:
    """Announce that the running job will not pass these planned stages (the count shrinks)."""
    if _current:
        _current[-1].skip(names)


def stream_writer(stream: TextIO) -> Writer:
    """The command line's writer: a redrawn bar on a terminal, plain lines otherwise."""
    try:
        terminal = bool(stream.isatty())
    except (AttributeError, ValueError):
        terminal = False

    def write(step: Step) -> None:
        if step.name in (DONE, STOPPED):
            if terminal:
                stream.write("\r\x1b[K")
        elif terminal:
            filled = BAR_WIDTH * (step.done - 1) // max(step.total, 1)
            bar = "#" * filled + "-" * (BAR_WIDTH - filled)
            stream.write(f"\r[{bar}] {step.done}/{step.total} {step.name} ({step.seconds:.0f} s)\x1b[K")
        else:
            stream.write(f"stage {step.done}/{step.total}: {step.name} ({step.seconds:.1f} s)\n")
        stream.flush()

    return write


@contextlib.contextmanager
def showing(where: TextIO | Writer, stages: Sequence[str]) -> Iterator[None]:
    """Show the stages announced inside this block.

    Parameters
    ----------
    where : text stream or :data:`Writer`
        A stream gets :func:`stream_writer`'s bar or lines; a writer gets each :class:`Step`.
    stages : sequence of str
        The plan (:func:`job_stages`): stages announced outside it are not shown.
    """
    write = where if callable(where) else stream_writer(where)
    shown = _Shown(write, stages)
    _current.append(shown)
    ended = STOPPED
    try:
        yield
        ended = DONE
    finally:
        _current.remove(shown)
        shown.end(ended)
