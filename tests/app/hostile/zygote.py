"""A warm parent for the corpus cases: imports the command line once, then forks one child per case.

Each case still runs in its own process with its own limits (RLIMIT_AS, RLIMIT_FSIZE), its own session,
working folder, environment and output files; only the ~1 s of imports is shared, which keeps the
corpus within a couple of minutes on two cores.

Protocol: one JSON request per line on stdin ({argv, cwd, env, readonly, memory_bytes, file_size_bytes,
time_limit_s, stdout, stderr}); one JSON reply per line on stdout ({status, hung, seconds, max_rss_kb}).
"""

from __future__ import annotations

import json
import os
import resource
import signal
import sys
import time


def _child(req: dict) -> None:
    os.setsid()
    resource.setrlimit(resource.RLIMIT_AS, (req["memory_bytes"],) * 2)
    resource.setrlimit(resource.RLIMIT_CORE, (0, 0))
    if req.get("file_size_bytes") is not None:
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)       # a write past the limit fails (EFBIG): a full disk
        resource.setrlimit(resource.RLIMIT_FSIZE, (req["file_size_bytes"],) * 2)
    out = os.open(req["stdout"], os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o644)
    err = os.open(req["stderr"], os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o644)
    null = os.open(os.devnull, os.O_RDONLY)
    os.dup2(null, 0)
    os.dup2(out, 1)
    os.dup2(err, 2)
    sys.stdin = open(0, closefd=False)  # noqa: SIM115
    sys.stdout = open(1, "w", closefd=False, encoding="utf-8")  # noqa: SIM115
    sys.stderr = open(2, "w", closefd=False, encoding="utf-8")  # noqa: SIM115
    os.chdir(req["cwd"] or os.getcwd())
    os.environ.clear()
    os.environ.update(req["env"])
    code = 1
    try:
        from tests.app.hostile.shim import install_faults

        install_faults(req.get("readonly", ""))
        from gripsight.app.cli import main

        code = main(req["argv"])
    except SystemExit as exc:
        code = exc.code if isinstance(exc.code, int) else 1
    except BaseException:  # noqa: BLE001 - what escapes the command line is printed, as the interpreter would
        import traceback

        traceback.print_exc()
        code = 1
    finally:
        try:
            sys.stdout.flush()
            sys.stderr.flush()
        except OSError:
            pass
    os._exit(code if isinstance(code, int) else 1)


def main() -> None:
    # what every command imports, loaded once here (no threads are started by these imports)
    import cv2  # noqa: F401 - pyflakes: imported for its side effect, the warm start
    import numpy  # noqa: F401
    import pydantic  # noqa: F401
    import scipy.optimize  # noqa: F401
    import yaml  # noqa: F401

    import gripsight.app.cellfile  # noqa: F401
    import gripsight.app.cli  # noqa: F401
    import gripsight.app.pipeline  # noqa: F401
    import gripsight.planning.picks  # noqa: F401
    import gripsight.vision.parts  # noqa: F401

    replies = sys.stdout
    for line in sys.stdin:
        req = json.loads(line)
        start = time.monotonic()
        pid = os.fork()
        if pid == 0:
            _child(req)
        hung = False
        while True:
            done, status, rusage = os.wait4(pid, os.WNOHANG)
            if done:
                break
            if time.monotonic() - start > req["time_limit_s"]:
                hung = True
                os.killpg(pid, signal.SIGKILL)
                _, status, rusage = os.wait4(pid, 0)
                break
            time.sleep(0.01)
        replies.write(json.dumps({"status": status, "hung": hung, "seconds": time.monotonic() - start,
                                  "max_rss_kb": rusage.ru_maxrss}) + "\n")
        replies.flush()


if __name__ == "__main__":
    main()
