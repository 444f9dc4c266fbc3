"""One writer per output folder: a lock file made with O_CREAT | O_EXCL, holding the owner's pid.

A second ``batch`` or ``run`` into the same folder refuses with a clear message instead of interleaving
its outputs. A lock left by a process that no longer exists (killed) is taken over.
"""

from __future__ import annotations

import contextlib
import os
from pathlib import Path

from gripsight.app.errors import GripsightError

__all__ = ["output_lock", "LOCK_NAME"]

LOCK_NAME = ".gripsight.lock"


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


@contextlib.contextmanager
def output_lock(folder, command: str):
    path = Path(folder) / LOCK_NAME
    for _ in range(2):
        try:
            fd = os.open(path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
        except FileExistsError:
            try:
                owner = int(path.read_text().split()[0])
            except (OSError, ValueError, IndexError):
                owner = -1
            if owner > 0 and _alive(owner) and owner != os.getpid():
                raise GripsightError(f"{folder}: another gripsight command (pid {owner}) is writing here; wait for "
                                     "it to finish or give another --out") from None
            path.unlink(missing_ok=True)          # a stale lock from a process that is gone
            continue
        with os.fdopen(fd, "w") as fh:
            fh.write(f"{os.getpid()} {command}\n")
        break
    else:
        raise GripsightError(f"{folder}: cannot take the output lock {path}")
    try:
        yield path
    finally:
        path.unlink(missing_ok=True)
