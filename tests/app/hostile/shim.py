"""Child entry point of the corpus runner: optional fault injection, then the ``gripsight`` command line.

``GRIPSIGHT_HOSTILE_READONLY=/some/folder`` makes every write under that folder fail with EROFS, as on a
read-only mount (the corpus runs as any user, root included, so ``chmod`` alone cannot make a folder
read-only). Disk-full is simulated by the runner with ``RLIMIT_FSIZE`` (a real kernel error, EFBIG).
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


def main() -> None:
    folder = os.environ.get("GRIPSIGHT_HOSTILE_READONLY")
    if folder:
        _install_readonly(folder)
    from gripsight.app.cli import main as cli_main

    sys.exit(cli_main(sys.argv[1:]))


if __name__ == "__main__":
    main()
