"""Atomic file writes: a temporary file in the same folder, flushed, then renamed over the target.

An interrupted write leaves the old file or none, never half a file. Each file is flushed to the disk
(fsync) before the rename, so a power cut leaves it whole too; inside :func:`without_fsync` (a batch's
per-photo files, which ``--resume`` re-makes from the photo) the rename alone keeps it whole against a
crash of the program, and the 4 ms a file that fsync costs on this machine's disk is saved.
"""

from __future__ import annotations

import contextlib
import contextvars
import errno
from datetime import datetime, timezone
import os
import re
import tempfile
from pathlib import Path

__all__ = ["atomic_output", "cannot_write", "strict_json", "utf8", "write_text_atomic", "write_bytes_atomic", "output_dir",
           "child_folder", "remove_leftover_temps", "write_files_atomic", "without_fsync"]

# the temporary names of atomic_output: ".<stem>.<8 random chars from mkstemp>.tmp<suffix>"
_TEMP_NAME = re.compile(r"^\..*\.[A-Za-z0-9_]{8}\.tmp(\.[^./]*)?$")


def remove_leftover_temps(folder) -> list[Path]:
    """Remove the temporary files an interrupted writer left in ``folder`` and its direct subfolders
    (the caller holds the folder's output lock, so no writer of ours is using them); return them."""
    removed = []
    folder = Path(folder)
    if not folder.is_dir():
        return removed
    places = [folder] + [p for p in folder.iterdir() if p.is_dir() and not p.is_symlink()]
    for place in places:
        for path in place.iterdir():
            if _TEMP_NAME.match(path.name) and path.is_file() and not path.is_symlink():
                with contextlib.suppress(OSError):
                    path.unlink()
                    removed.append(path)
    return removed

_FSYNC = contextvars.ContextVar("gripsight_fsync", default=True)


@contextlib.contextmanager
def without_fsync():
    """Atomic writes inside this block skip the fsync before the rename (see the module)."""
    token = _FSYNC.set(False)
    try:
        yield
    finally:
        _FSYNC.reset(token)


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
        raise cannot_write(p, exc) from None
    return p


def _umask() -> int:
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def cannot_write(path, exc: OSError):
    """The one-line error for a file that cannot be written (read-only, full disk, a folder in the way)."""
    from gripsight.app.errors import GripsightError

    hint = {errno.ENOSPC: "the disk is full; free some space or give another --out",
            errno.EFBIG: "the disk or quota is full; free some space or give another --out",
            errno.EDQUOT: "the disk quota is full; free some space or give another --out",
            errno.EROFS: "read-only; give an --out folder you can write to",
            errno.EACCES: "no permission; give an --out folder you can write to",
            errno.EPERM: "no permission; give an --out folder you can write to",
            errno.EISDIR: "is a folder; give a file name",
            errno.ENOTDIR: "part of the path is a file, not a folder; give another path",
            errno.EEXIST: "a file stands where a folder is needed; give another path"}.get(exc.errno, "")
    what = exc.strerror or str(exc)
    if hint.startswith("read-only") and "read-only" not in what.lower():
        what = f"{what}, read-only"
    return GripsightError(f"{path}: cannot write ({what}){'; ' + hint.split('; ')[-1] if hint else ''}")


def _refuse_special(target: Path) -> None:
    """A device, FIFO or socket where a file is to be written is refused: the rename would replace the
    node itself (as root, ``--overlay /dev/full`` replaced the device with a PNG)."""
    if (target.exists() or target.is_symlink()) and not target.is_file():
        from gripsight.app.errors import GripsightError

        raise GripsightError(f"{target}: cannot write (not a regular file: a device, pipe or socket stands "
                             "there); give another name")


@contextlib.contextmanager
def atomic_output(path: str | os.PathLike):
    """Yield a temporary path beside ``path``; on success it replaces ``path``, on error it is removed.

    The temporary name keeps the target's suffix so writers that look at it (matplotlib) still work.
    The file gets the permissions of any new file (0666 less the umask), not mkstemp's 0600, so a
    controller running as another user can read it. A failure to write (read-only folder, full disk, a
    folder where the file should go) is a :class:`GripsightError` naming ``path``.
    """
    target = Path(path)
    if target.is_dir():
        raise cannot_write(target, IsADirectoryError(errno.EISDIR, os.strerror(errno.EISDIR)))
    _refuse_special(target)
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".{target.stem}.", suffix=f".tmp{target.suffix}", dir=target.parent)
        os.close(fd)
    except OSError as exc:
        raise cannot_write(target, exc) from None
    try:
        yield Path(tmp)
        if _FSYNC.get():
            with open(tmp, "rb+") as fh:
                os.fsync(fh.fileno())
        os.chmod(tmp, 0o666 & ~_umask())
        os.replace(tmp, target)
    except OSError as exc:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise cannot_write(target, exc) from None
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise


def write_bytes_atomic(path: str | os.PathLike, data: bytes) -> None:
    """Write bytes to ``path`` atomically."""
    with atomic_output(path) as tmp:
        Path(tmp).write_bytes(data)


def utf8(text: str) -> bytes:
    """The bytes of every text file written. A file name that is not UTF-8 (Python keeps its bytes as lone
    surrogates, U+DC80-U+DCFF) is written as an escape (``\\udcff``): the file stays UTF-8 and the name
    recognisable (a photo named with a Latin-1 byte was an internal error in batch.csv and joints.csv)."""
    return text.encode("utf-8", "backslashreplace")


def write_text_atomic(path: str | os.PathLike, text: str) -> None:
    """Write UTF-8 text to ``path`` atomically (see :func:`utf8`)."""
    write_bytes_atomic(path, utf8(text))


def strict_json(data, indent: int | None = 2) -> str:
    """JSON that strict parsers read (RFC 8259 has no NaN or Infinity): every non-finite float is null."""
    import json
    import math

    def clean(value):
        if isinstance(value, float):
            return value if math.isfinite(value) else None
        if isinstance(value, dict):
            return {k: clean(v) for k, v in value.items()}
        if isinstance(value, (list, tuple)):
            return [clean(v) for v in value]
        if hasattr(value, "item") and hasattr(value, "dtype"):        # numpy scalars
            return clean(value.item())
        return value

    try:        # plain data with finite floats (a plan, a row): written as it is, without the copy
        return json.dumps(data, indent=indent, allow_nan=False)
    except (TypeError, ValueError):
        return json.dumps(clean(data), indent=indent, allow_nan=False)


def write_files_atomic(items: list[tuple[os.PathLike, bytes]]) -> None:
    """Write several files as one step: every new file is written and flushed under a temporary name
    first, and only when all are on disk do they take their names (renames, which need no space). A
    failure before that (a full disk) removes the temporaries and leaves every old file as it was.
    Inside :func:`without_fsync` the files are written whole but not flushed to the disk (see the module)."""
    temps: list[tuple[str, Path]] = []
    try:
        for path, data in items:
            target = Path(path)
            _refuse_special(target)
            fd, tmp = tempfile.mkstemp(prefix=f".{target.stem}.", suffix=f".tmp{target.suffix}", dir=target.parent)
            temps.append((tmp, target))
            with os.fdopen(fd, "wb") as fh:
                fh.write(data)
                fh.flush()
                if _FSYNC.get():
                    os.fsync(fh.fileno())
            os.chmod(tmp, 0o666 & ~_umask())             # as any new file, not mkstemp's 0600
        for tmp, target in temps:
            os.replace(tmp, target)
    except OSError as exc:
        for tmp, _ in temps:
            with contextlib.suppress(OSError):
                os.unlink(tmp)
        raise cannot_write(temps[-1][1] if temps else Path(items[0][0]), exc) from None
    except BaseException:
        for tmp, _ in temps:
            with contextlib.suppress(OSError):
                os.unlink(tmp)
        raise


def utc_now() -> str:
    """The time now in UTC, ISO 8601 to the second (``2026-12-02T15:30:00Z``): the one stamp of every output."""
    return datetime.now(timezone.utc).replace(microsecond=0).isoformat().replace("+00:00", "Z")
