"""Writing files all at once: a temporary file beside each, then ``os.replace``.

Readers of a target see either the old file or the complete new one, never a
half-written one: the data goes to a temporary file in the target's own folder
(so the final rename stays on one file system), is flushed and ``fsync``-ed,
and is moved onto the target only when the writing finished without an
exception. On any exception (``KeyboardInterrupt`` included) the temporary
file is removed and the target is left as it was; while :func:`end_on_signals`
is in force, SIGINT and SIGTERM remove every temporary file of the process and
end it at once. :func:`atomic_writes` stages several files
and renames them together at the end, so a failure leaves none of them.

Temporary files are named ``.<target name>.<pid>-<random>.overtone-tmp``. A
process killed outright (SIGKILL, power loss) cannot remove its own;
:func:`remove_leftovers` removes those whose process no longer runs, and the
cache and the file jobs call it on their folders before they write.

New files get the permission bits ``0o666`` less the umask, as ``open(path,
"w")`` gives.

Source: ``os.replace`` is ``rename(2)`` on POSIX, which replaces an existing
target atomically (POSIX.1-2008, rename()), and ``MoveFileEx`` with
``MOVEFILE_REPLACE_EXISTING`` on Windows (Python documentation of
``os.replace``, from memory). ``fsync`` of the folder after the rename makes
the new name durable (POSIX.1-2008, fsync(), common practice).
"""

from __future__ import annotations

import errno
import os
import re
import secrets
import signal
import sys
import time
from collections.abc import Iterator
from contextlib import contextmanager
from types import FrameType
from typing import IO, Any

__all__ = ["atomic_write", "atomic_writes", "Staging", "remove_leftovers", "end_on_signals", "signals_held",
           "TEMP_SUFFIX", "is_temporary", "quiet_interrupts_while_starting", "remove_own_temporaries"]

TEMP_SUFFIX = ".overtone-tmp"
_TEMP_NAME = re.compile(r"^\..*\.(\d+)-[0-9a-f]{8}" + re.escape(TEMP_SUFFIX) + "$")
# The flags tempfile.mkstemp opens its files with (CPython 3.11
# Lib/tempfile.py, _bin_openflags): create exclusively, never through a
# symbolic link, binary on Windows.
_FLAGS = os.O_RDWR | os.O_CREAT | os.O_EXCL | getattr(os, "O_NOFOLLOW", 0) | getattr(os, "O_BINARY", 0)
_ATTEMPTS = getattr(os, "TMP_MAX", 10000)  # as tempfile.TMP_MAX
_STALE_SECONDS = 24 * 3600  # where a process cannot be asked whether it runs
# Temporary files of this process not yet renamed or removed. A name is listed
# before its file is created and leaves the list after the rename or removal,
# so an interrupt between any two steps leaves nothing unlisted.
_PENDING: set[str] = set()


def is_temporary(name: str) -> bool:
    """Whether a file name is one of this module's temporary files."""
    return _TEMP_NAME.match(os.path.basename(name)) is not None


class Staging:
    """Files written to temporary names, renamed onto their targets by :meth:`commit`."""

    def __init__(self) -> None:
        self.staged: list[tuple[str, str]] = []

    @contextmanager
    def open(self, path: str | os.PathLike[str], *, text: bool = False) -> Iterator[IO[Any]]:
        """A new temporary file beside ``path``, flushed and fsync-ed when the block ends.

        The file is removed if the block raises; otherwise it waits for
        :meth:`commit` (or :meth:`discard`).
        """
        target = os.fspath(path)
        fd, tmp = _create(target)
        try:
            with os.fdopen(fd, "w" if text else "wb") as fh:
                yield fh
                fh.flush()
                os.fsync(fh.fileno())
        except BaseException:
            _remove(tmp)
            raise
        self.staged.append((tmp, target))

    def commit(self) -> None:
        """Rename every staged file onto its target, in the order written."""
        try:
            with signals_held():
                while self.staged:
                    tmp, target = self.staged[0]
                    os.replace(tmp, target)
                    _PENDING.discard(tmp)
                    self.staged.pop(0)
                    _sync_folder(target)
        finally:
            self.discard()

    def discard(self) -> None:
        """Remove the staged files that were not renamed."""
        for tmp, _ in self.staged:
            _remove(tmp)
        self.staged = []


@contextmanager
def atomic_writes() -> Iterator[Staging]:
    """Stage several files; all are renamed at the end, or on an exception none."""
    staging = Staging()
    try:
        yield staging
    except BaseException:
        staging.discard()
        raise
    staging.commit()


@contextmanager
def atomic_write(path: str | os.PathLike[str], *, text: bool = False) -> Iterator[IO[Any]]:
    """Open a temporary file beside ``path``; on a clean exit move it onto ``path``.

    Parameters
    ----------
    path : str or os.PathLike
        The final file. Its folder must exist.
    text : bool
        Yield a text file (the locale's encoding and newlines, as
        ``open(path, "w")``) instead of a binary one.

    Raises
    ------
    OSError
        When the temporary file cannot be created (for example a missing
        folder), written or renamed; the target is then unchanged.
    """
    with atomic_writes() as staging:
        with staging.open(path, text=text) as fh:
            yield fh


def _create(target: str) -> tuple[int, str]:
    folder = os.path.abspath(os.path.dirname(target) or ".")  # as mkstemp: a later chdir cannot move it
    stem = f".{os.path.basename(target)}.{os.getpid()}-"
    for _ in range(_ATTEMPTS):
        tmp = os.path.join(folder, f"{stem}{secrets.token_hex(4)}{TEMP_SUFFIX}")
        _PENDING.add(tmp)
        try:
            return os.open(tmp, _FLAGS, 0o666), tmp
        except FileExistsError:
            _PENDING.discard(tmp)
            continue
        except BaseException:
            _PENDING.discard(tmp)
            raise
    raise FileExistsError(errno.EEXIST, f"no free temporary file name in {folder!r}")


def _remove(path: str) -> None:
    try:
        os.remove(path)
    except OSError:
        pass
    _PENDING.discard(path)


def remove_own_temporaries() -> int:
    """Remove every temporary file this process created and has not renamed; returns how many.

    For the end of an interrupted run: whatever step the interrupt hit (even
    between creating a file and handing it to the code that cleans up), no
    temporary file of this process outlives it.
    """
    removed = 0
    for tmp in sorted(_PENDING):
        removed += os.path.lexists(tmp)
        _remove(tmp)
    return removed


def _sync_folder(target: str) -> None:
    if sys.platform == "win32":
        return
    try:
        fd = os.open(os.path.dirname(os.path.abspath(target)), os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def _running(pid: int) -> bool:
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)  # signal 0: only asks whether the process exists (POSIX.1-2008, kill())
    except ProcessLookupError:
        return False
    except OSError:
        return True  # exists, owned by someone else
    return True


def remove_leftovers(folder: str | os.PathLike[str]) -> int:
    """Remove temporary files of writers that no longer run; returns how many.

    On POSIX a file's writer is the process id in its name; elsewhere (where
    asking would terminate the process) a file counts as left over after a day.
    """
    try:
        names = os.listdir(folder)
    except OSError:
        return 0
    removed = 0
    for name in names:
        m = _TEMP_NAME.match(name)
        if m is None:
            continue
        path = os.path.join(folder, name)
        if sys.platform == "win32":
            try:
                stale = time.time() - os.stat(path).st_mtime > _STALE_SECONDS
            except OSError:
                continue
        else:
            stale = not _running(int(m.group(1)))
        if stale:
            try:
                os.remove(path)
                removed += 1
            except OSError:
                pass
    return removed


def _exit_quietly(signum: int, frame: FrameType | None) -> None:
    os._exit(128 + signum)


def quiet_interrupts_while_starting() -> None:
    """SIGINT and SIGTERM end the process at once, without a traceback.

    For a command line while it imports its modules: nothing is written yet,
    so there is nothing to clean up; :func:`end_on_signals` takes over
    when the work starts.
    """
    for sig in (signal.SIGINT, signal.SIGTERM):
        try:
            signal.signal(sig, _exit_quietly)
        except ValueError:  # not the main thread
            return


_SIGNAL_EXITS = {signal.SIGINT: (130, "error: interrupted\n"), signal.SIGTERM: (143, "error: terminated\n")}
_HOLDING = [0]           # depth of signals_held blocks in force
_DEFERRED: list[int] = []  # signals that arrived while held


def _end_now(signum: int, frame: FrameType | None) -> None:
    """Remove this process's temporary files, say so in one line and end at once.

    Ending here, instead of raising through whatever the main thread runs,
    never tears down a native computation half done, and skips the
    interpreter's final clean-up (an interrupted run once crashed there).
    """
    if _HOLDING[0]:
        _DEFERRED.append(signum)
        return
    code, line = _SIGNAL_EXITS[signal.Signals(signum)]
    remove_own_temporaries()
    try:
        sys.stdout.flush()
    except Exception:  # noqa: BLE001  (a print the signal interrupted; nothing more to save)
        pass
    try:
        os.write(2, line.encode())
    except OSError:
        pass
    os._exit(code)


@contextmanager
def end_on_signals() -> Iterator[None]:
    """While in force, SIGINT ends the process with exit code 130 and SIGTERM with 143,
    after removing its temporary files (:func:`_end_now`); renames in progress
    finish first (:meth:`Staging.commit` holds the signals)."""
    try:
        previous = {sig: signal.signal(sig, _end_now) for sig in _SIGNAL_EXITS}
    except ValueError:  # not the main thread: leave signals alone
        yield
        return
    try:
        yield
    finally:
        for sig, handler in previous.items():
            signal.signal(sig, signal.SIG_DFL if handler is None else handler)


@contextmanager
def signals_held() -> Iterator[None]:
    """A signal that :func:`end_on_signals` handles waits until the block ends, so
    a set of renames is never cut in half. (Python runs signal handlers in the
    main thread between two steps of its own code; a flag, not the process's
    signal mask, which other threads such as BLAS workers do not share.)"""
    _HOLDING[0] += 1
    try:
        yield
    finally:
        _HOLDING[0] -= 1
        if not _HOLDING[0] and _DEFERRED:
            _end_now(_DEFERRED[0], None)
