"""Output paths that cannot destroy what is there (issue 14, item 6).

Before a command writes anything it checks its output paths together: a path meant for a file must not
be an existing folder (and the reverse), and no output may be one of the command's inputs or another of
its outputs (the same file reached by two names counts: paths are compared resolved).
"""

from __future__ import annotations

import os
from pathlib import Path

from gripsight.app.errors import GripsightError

__all__ = ["check_output_paths", "check_picture_name"]

#: the picture formats the matplotlib drawings are written in (chosen by the file name's suffix)
PICTURE_SUFFIXES = (".png", ".jpg", ".jpeg", ".pdf", ".svg", ".tif", ".tiff", ".webp")


def check_picture_name(option: str, path) -> None:
    """A drawing's file name must say its format (matplotlib picks it from the suffix; without one it
    read the temporary file's ``.tmp`` and failed)."""
    from gripsight.app.errors import UsageError

    if path is not None and Path(path).suffix.lower() not in PICTURE_SUFFIXES:
        raise UsageError(f"{option}: give a picture file name ending in {', '.join(PICTURE_SUFFIXES)}, got '{path}'")


def _same(a: Path, b: Path) -> bool:
    try:
        if a.exists() and b.exists():
            return a.samefile(b)
    except OSError:
        pass
    # os.path.realpath, not Path.resolve: a link loop (a -> a) is a path like any other, not a RuntimeError
    return os.path.realpath(a) == os.path.realpath(b)


def check_output_paths(files: dict | None = None, folders: dict | None = None, inputs: dict | None = None) -> None:
    """Refuse output paths that would overwrite or displace something else.

    Parameters
    ----------
    files, folders : dict of str to Path or None
        Option name (``--out``, ``--overlay``) to the path it names, for file and folder outputs.
    inputs : dict of str to Path or None
        Name (``the photo``, ``--cell``) to each input path.

    Raises
    ------
    GripsightError
        Naming the path, the option and what to give instead.
    """
    files = {k: Path(v) for k, v in (files or {}).items() if v is not None}
    folders = {k: Path(v) for k, v in (folders or {}).items() if v is not None}
    inputs = {k: Path(v) for k, v in (inputs or {}).items() if v is not None}
    for option, path in files.items():
        if path.is_dir():
            raise GripsightError(f"{path}: is a folder; {option} needs a file name inside or beside it")
        if (path.exists() or path.is_symlink()) and not path.is_file():       # before the work, not after it
            raise GripsightError(f"{path}: not a regular file (a device, pipe, socket or a link to nowhere); "
                                 f"{option} needs a file name")
    for option, path in folders.items():
        if path.exists() and not path.is_dir():
            raise GripsightError(f"{path}: is a file, not a folder; give {option} a folder")
    outputs = list(files.items()) + list(folders.items())
    for i, (option, path) in enumerate(outputs):
        for name, source in inputs.items():
            if _same(path, source):
                raise GripsightError(f"{path}: {option} is {name}; give {option} another name so the input is kept")
        for other, path2 in outputs[i + 1:]:
            if _same(path, path2):
                raise GripsightError(f"{path}: {option} and {other} name the same path; give them different names")
