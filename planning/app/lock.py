"""One writer per output folder: the operating system's lock on ``OUT/.gripsight.lock``.

A ``run`` or ``batch`` takes an exclusive, non-blocking lock (``flock`` on POSIX, ``msvcrt.locking`` on
Windows) on the lock file and holds it while it writes; a second command into the same folder finds it
taken and refuses with a clear message instead of interleaving its outputs. The kernel releases the lock
when the holding process ends, however it ends (``kill -9`` included), so there is no stale lock and no
guess about one. The file itself stays (removing it would let a third process lock a new file while the
second still holds the old one); it holds the owner's pid and command, for the message only.
"""

from __future__ import annotations

import contextlib
import os
from pathlib import Path

from gripsight.app.errors import GripsightError

__all__ = ["output_lock", "LOCK_NAME"]

LOCK_NAME = ".gripsight.lock"

try:
    import fcntl

    def _try_lock(fd: int) -> bool:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            return False
        return True

    def _unlock(fd: int) -> None:
        fcntl.flock(fd, fcntl.LOCK_UN)
except ImportError:          # Windows
    import msvcrt

    def _try_lock(fd: int) -> bool:
        os.lseek(fd, 0, os.SEEK_SET)
        try:
            msvcrt.locking(fd, msvcrt.LK_NBLCK, 1)
        except OSError:
            return False
        return True

    def _unlock(fd: int) -> None:
        os.lseek(fd, 0, os.SEEK_SET)
        msvcrt.locking(fd, msvcrt.LK_UNLCK, 1)


def _owner(fd: int) -> str:
    try:
        os.lseek(fd, 0, os.SEEK_SET)
        words = os.read(fd, 200).decode("ascii", "replace").split()
    except OSError:
        return ""
    return f" (pid {words[0]})" if words and words[0].isdigit() else ""


@contextlib.contextmanager
def output_lock(folder, command: str):
    """Hold the output folder's lock for the block; raise :class:`GripsightError` if another process
    holds it."""
    path = Path(folder) / LOCK_NAME
    try:
        fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
    except OSError as exc:
        raise GripsightError(f"{folder}: cannot make the output lock {path} ({exc.strerror or exc})") from None
    try:
        if not _try_lock(fd):
            raise GripsightError(f"{folder}: another gripsight command{_owner(fd)} is writing here; wait for "
                                 "it to finish or give another --out")
        try:
            with contextlib.suppress(OSError):
                os.ftruncate(fd, 0)
                os.lseek(fd, 0, os.SEEK_SET)
                os.write(fd, f"{os.getpid()} {command}\n".encode("ascii", "replace"))
            yield path
        finally:
            _unlock(fd)
    finally:
        os.close(fd)
