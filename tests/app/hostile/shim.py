"""Child entry point of the corpus runner: optional fault injection, then the ``gripsight`` command line.

``GRIPSIGHT_HOSTILE_READONLY=/some/folder`` makes every write under that folder fail with EROFS, as on a
read-only mount (the corpus runs as any user, root included, so ``chmod`` alone cannot make a folder
read-only); ``GRIPSIGHT_HOSTILE_UNREADABLE=path`` makes opening or listing that path fail with EACCES, as
a mode of 000 does for anyone but root. Disk-full is simulated by the runner with ``RLIMIT_FSIZE`` (a real
kernel error, EFBIG).
"""

from __future__ import annotations

import builtins
import errno
import io
import os
import sys


def _install_readonly(folder: str) -> None:
    root = os.path.realpath(folder)

    def inside(path) -> bool:
        try:
            p = os.path.realpath(os.fsdecode(path))
        except (TypeError, ValueError):
            return False
        return p == root or p.startswith(root + os.sep)

    def refuse(path):
        raise OSError(errno.EROFS, os.strerror(errno.EROFS), os.fsdecode(path))

    real_open, real_os_open, real_mkdir = builtins.open, os.open, os.mkdir
    real_replace = os.replace

    def open_(file, mode="r", *args, **kwargs):
        if isinstance(file, (str, bytes, os.PathLike)) and any(c in mode for c in "wax+") and inside(file):
            refuse(file)
        return real_open(file, mode, *args, **kwargs)

    def os_open(path, flags, *args, **kwargs):
        if flags & (os.O_WRONLY | os.O_RDWR | os.O_CREAT) and inside(path):
            refuse(path)
        return real_os_open(path, flags, *args, **kwargs)

    def mkdir(path, *args, **kwargs):
        if inside(path) and not os.path.isdir(path):
            refuse(path)
        return real_mkdir(path, *args, **kwargs)

    def replace(src, dst, *args, **kwargs):
        if inside(dst):
            refuse(dst)
        return real_replace(src, dst, *args, **kwargs)

    builtins.open = io.open = open_
    os.open, os.mkdir, os.replace, os.rename = os_open, mkdir, replace, replace
    try:
        import cv2

        real_imwrite = cv2.imwrite

        def imwrite(path, *args, **kwargs):
            if inside(path):
                return False
            return real_imwrite(path, *args, **kwargs)

        cv2.imwrite = imwrite
    except ImportError:
        pass


def _install_unreadable(paths: str) -> None:
    """``GRIPSIGHT_HOSTILE_UNREADABLE=a:b`` (os.pathsep between): opening or listing these paths fails with
    EACCES, as for a file or folder of mode 000 (the corpus may run as root, whom ``chmod 000`` does not stop)."""
    roots = {os.path.abspath(p) for p in paths.split(os.pathsep) if p}

    def hit(path) -> bool:
        try:
            return isinstance(path, (str, bytes, os.PathLike)) and os.path.abspath(os.fsdecode(path)) in roots
        except (TypeError, ValueError):
            return False

    def refuse(path):
        raise PermissionError(errno.EACCES, os.strerror(errno.EACCES), os.fsdecode(path))

    real_open, real_os_open = builtins.open, os.open
    real_listdir, real_scandir = os.listdir, os.scandir

    def open_(file, *args, **kwargs):
        if hit(file):
            refuse(file)
        return real_open(file, *args, **kwargs)

    def os_open(path, *args, **kwargs):
        if hit(path):
            refuse(path)
        return real_os_open(path, *args, **kwargs)

    def listdir(path="."):
        if hit(path):
            refuse(path)
        return real_listdir(path)

    def scandir(path="."):
        if hit(path):
            refuse(path)
        return real_scandir(path)

    builtins.open = io.open = open_
    os.open, os.listdir, os.scandir = os_open, listdir, scandir


def install_faults(readonly: str = "") -> None:
    """The faults a case asks for: a read-only folder, unreadable paths (from the environment)."""
    if readonly:
        _install_readonly(readonly)
    if os.environ.get("GRIPSIGHT_HOSTILE_UNREADABLE"):
        _install_unreadable(os.environ["GRIPSIGHT_HOSTILE_UNREADABLE"])


def main() -> None:
    install_faults(os.environ.get("GRIPSIGHT_HOSTILE_READONLY", ""))
    from gripsight.app.cli import main as cli_main

    sys.exit(cli_main(sys.argv[1:]))


if __name__ == "__main__":
    main()
