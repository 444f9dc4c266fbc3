"""Reading the YAML inputs (cell, parts and calibration files): regular files of a bounded size, UTF-8,
then the strict YAML of :mod:`gripsight.vision.yamltext` (duplicate keys refused, YAML 1.2 numbers, alias
limit); every error one line with its YAML line.
"""

from __future__ import annotations

import os
from pathlib import Path

from gripsight.app.errors import CellFileError, Problem
from gripsight.vision.yamltext import MAX_YAML_VALUES, YamlTextError, load_yaml_text

__all__ = ["MAX_YAML_BYTES", "MAX_YAML_VALUES", "read_yaml"]

#: the largest YAML input read (a cell file with every comment is a few kB; parts files of 10,000 parts ~1 MB)
MAX_YAML_BYTES = 4 * 1024 * 1024


def read_yaml(path: str | os.PathLike, what: str = "file", max_bytes: int = MAX_YAML_BYTES):
    """Read a YAML file with safe loading; return (data, raw bytes).

    Raises
    ------
    CellFileError
        For a missing file, a directory, an unreadable or non-UTF-8 file, or a YAML error (with its line).
    """
    path = Path(path)
    name = str(path)
    if not path.exists():
        missing = f"a link that leads nowhere or to itself, not a {what}" if path.is_symlink() else f"no such {what}"
        raise CellFileError(name, [Problem("", missing)])
    if path.is_dir():
        raise CellFileError(name, [Problem("", f"is a directory, not a {what}")])
    if not path.is_file():
        raise CellFileError(name, [Problem("", f"not a regular file (a pipe, device or socket); give a {what}")])
    try:
        size = path.stat().st_size
        if size > max_bytes:
            raise CellFileError(name, [Problem("", f"{size:,} bytes is too large for a {what} "
                                                   f"(at most {max_bytes:,}); is it the right file?")])
        raw = path.read_bytes()
    except OSError as exc:
        raise CellFileError(name, [Problem("", f"cannot be read ({exc.strerror})")]) from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError:
        raise CellFileError(name, [Problem("", "is not UTF-8 text (is it a YAML file?)")]) from None
    try:
        data = load_yaml_text(text)
    except YamlTextError as exc:
        raise CellFileError(name, [Problem(exc.where, exc.problem)]) from None
    return data, raw
