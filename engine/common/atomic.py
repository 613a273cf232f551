"""Writing a file all at once: a temporary file beside it, then ``os.replace``.

Readers of the target see either the old file or the complete new one, never
a half-written one: the data goes to a temporary file in the target's own
folder (so the final rename stays on one file system) and is moved onto the
target only when the writing finished without an exception. On any exception
(``KeyboardInterrupt`` included) the temporary file is removed and the target
is left as it was.

Source: ``os.replace`` is ``rename(2)`` on POSIX, which replaces an existing
target atomically (POSIX.1-2008, rename()), and ``MoveFileEx`` with
``MOVEFILE_REPLACE_EXISTING`` on Windows (Python documentation of
``os.replace``, from memory).
"""

from __future__ import annotations

import errno
import os
import secrets
import tempfile
from contextlib import contextmanager

__all__ = ["atomic_write"]

# The flags tempfile.mkstemp opens its files with (CPython 3.11
# Lib/tempfile.py, _bin_openflags): create exclusively, never through a
# symbolic link, binary on Windows.
_FLAGS = os.O_RDWR | os.O_CREAT | os.O_EXCL | getattr(os, "O_NOFOLLOW", 0) | getattr(os, "O_BINARY", 0)
_ATTEMPTS = getattr(os, "TMP_MAX", 10000)  # as tempfile.TMP_MAX


@contextmanager
def atomic_write(path, *, text: bool = False, fsync: bool = False, prefix: str | None = None,
                 suffix: str = ".tmp", permissions: int | None = None):
    """Open a temporary file beside ``path``; on a clean exit move it onto ``path``.

    Parameters
    ----------
    path : str or os.PathLike
        The final file. Its folder must exist.
    text : bool
        Yield a text file (the locale's encoding and newlines, as
        ``open(path, "w")``) instead of a binary one.
    fsync : bool
        Flush and ``os.fsync`` the temporary file before the rename, so the
        new content is on disk before it replaces the old.
    prefix, suffix : str
        Name of the temporary file: ``prefix + random + suffix`` in the
        target's folder; the default prefix is ``"." + name + "."``.
    permissions : int, optional
        None creates the temporary file with ``tempfile.mkstemp`` (readable
        and writable by the owner only, 0o600); a number creates it with
        those permission bits less the umask, as ``open`` does for a new file
        (0o666 gives what ``open(path, "w")`` would). The target ends up with
        the temporary file's permissions.

    Yields
    ------
    file object
        Open for writing; closed before the rename.

    Raises
    ------
    OSError
        When the temporary file cannot be created (for example a missing
        folder), written or renamed; the target is then unchanged.
    """
    path = os.fspath(path)
    folder = os.path.dirname(path) or "."
    if prefix is None:
        prefix = f".{os.path.basename(path)}."
    fd, tmp = _create(folder, prefix, suffix, permissions)
    try:
        with os.fdopen(fd, "w" if text else "wb") as fh:
            yield fh
            if fsync:
                fh.flush()
                os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        try:
            os.remove(tmp)
        except OSError:
            pass
        raise


def _create(folder: str, prefix: str, suffix: str, permissions: int | None) -> tuple[int, str]:
    if permissions is None:
        return tempfile.mkstemp(prefix=prefix, suffix=suffix, dir=folder)
    folder = os.path.abspath(folder)  # as mkstemp, so a later chdir cannot move it
    for _ in range(_ATTEMPTS):
        tmp = os.path.join(folder, f"{prefix}{secrets.token_hex(4)}{suffix}")
        try:
            return os.open(tmp, _FLAGS, permissions), tmp
        except FileExistsError:
            continue
    raise FileExistsError(errno.EEXIST, f"no free temporary file name in {folder!r}")
