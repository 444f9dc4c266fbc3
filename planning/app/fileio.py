"""Atomic file writes: a temporary file in the same folder, flushed, then renamed over the target.

An interrupted write leaves the old file or none, never half a file.
"""

from __future__ import annotations

import contextlib
from datetime import datetime, timezone
import os
import tempfile
from pathlib import Path

__all__ = ["atomic_output", "write_text_atomic", "write_bytes_atomic", "output_dir", "child_folder"]


def child_folder(out, name: str) -> Path:
    """``out/<name>`` for a per-photo folder, never outside ``out``: only the last part of ``name`` is
    used, and a name that is empty, ``.`` or ``..`` gets a leading underscore."""
    base = Path(str(name).replace("\\", "/")).name.replace("\x00", "")
    if base in ("", ".", ".."):
        base = "_" + base.replace(".", "_")
    out = Path(out)
    path = out / base
    if path.resolve().parent != out.resolve():
        raise ValueError(f"{name!r} would leave the output folder {out}")
    return path


def output_dir(path) -> Path:
    """Create an output folder (and parents); a clear error if a file stands in the way."""
    from gripsight.app.errors import GripsightError

    p = Path(path)
    if p.exists() and not p.is_dir():
        raise GripsightError(f"{p}: is a file, not a folder; give --out a folder")
    try:
        p.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise GripsightError(f"{p}: cannot create the output folder ({exc.strerror or exc})") from None
    return p


@contextlib.contextmanager
def atomic_output(path: str | os.PathLike):
    """Yield a temporary path beside ``path``; on success it replaces ``path``, on error it is removed.

    The temporary name keeps the target's suffix so writers that look at it (matplotlib) still work.
    """
    target = Path(path)
    target.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{target.stem}.", suffix=f".tmp{target.suffix}", dir=target.parent)
    os.close(fd)
    try:
        yield Path(tmp)
        with open(tmp, "rb+") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp, target)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise


def write_bytes_atomic(path: str | os.PathLike, data: bytes) -> None:
    """Write bytes to ``path`` atomically."""
    with atomic_output(path) as tmp:
        Path(tmp).write_bytes(data)


def write_text_atomic(path: str | os.PathLike, text: str) -> None:
    """Write UTF-8 text to ``path`` atomically."""
    write_bytes_atomic(path, text.encode("utf-8"))


def utc_now() -> str:
    """The time now in UTC, ISO 8601 to the second (``2026-12-02T15:30:00Z``): the one stamp of every output."""
    return datetime.now(timezone.utc).replace(microsecond=0).isoformat().replace("+00:00", "Z")
