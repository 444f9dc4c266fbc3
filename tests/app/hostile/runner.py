"""Run corpus cases as subprocesses under a memory limit (RLIMIT_AS) and a time limit each.

The outcome of a run is one of ``error`` (non-zero exit), ``warning`` (exit 0 with a ``warning:`` line),
``result`` (exit 0), or a failure: ``internal`` (an ``internal error`` line), ``traceback``, ``hang``
(killed at the time limit) or ``killed`` (ended by a signal, e.g. out of memory).
"""

from __future__ import annotations

import os
import resource
import signal
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

from tests.app.hostile.corpus import Case

__all__ = ["Outcome", "run_case", "run_all", "MEMORY_LIMIT_BYTES"]

#: address-space limit of every case (virtual memory; the libraries map ~1 GB before doing anything)
MEMORY_LIMIT_BYTES = 3 * 1024**3
ROOT = Path(__file__).resolve().parents[3]


@dataclass
class Outcome:
    case: Case
    kind: str               # error | warning | result | internal | traceback | hang | killed
    exit_code: int | None
    output: str             # stderr then stdout
    seconds: float
    max_rss_mb: float

    @property
    def as_expected(self) -> bool:
        e = self.case
        if self.kind != e.kind or (e.exit_code is not None and self.exit_code != e.exit_code):
            return False
        if e.fragment and e.fragment.lower() not in self.output.lower():
            return False
        if e.check is not None:
            return e.check(self) is None
        return True

    def why_not(self) -> str:
        e = self.case
        if self.kind != e.kind or (e.exit_code is not None and self.exit_code != e.exit_code):
            return f"expected {e.kind} (exit {e.exit_code}), got {self.kind} (exit {self.exit_code})"
        if e.fragment and e.fragment.lower() not in self.output.lower():
            return f"output lacks {e.fragment!r}"
        if e.check is not None:
            return e.check(self) or ""
        return ""


def _limits(case: Case):
    def apply():
        resource.setrlimit(resource.RLIMIT_AS, (case.memory_bytes or MEMORY_LIMIT_BYTES,) * 2)
        resource.setrlimit(resource.RLIMIT_CORE, (0, 0))
        if case.file_size_bytes is not None:
            signal.signal(signal.SIGXFSZ, signal.SIG_IGN)       # a write past the limit fails (EFBIG), as on a full disk
            resource.setrlimit(resource.RLIMIT_FSIZE, (case.file_size_bytes,) * 2)
        os.setsid()
    return apply


def _env(case: Case) -> dict:
    env = dict(os.environ)
    env.update({"PYTHONPATH": str(ROOT) + os.pathsep + env.get("PYTHONPATH", ""), "OMP_NUM_THREADS": "1",
                "OPENBLAS_NUM_THREADS": "1", "MKL_NUM_THREADS": "1", "OPENCV_FOR_THREADS_NUM": "1",
                "MPLBACKEND": "Agg", "COLUMNS": "200", "PYTHONWARNINGS": "ignore"})
    env.pop("GRIPSIGHT_HOSTILE_READONLY", None)
    env.pop("GRIPSIGHT_HOSTILE_UNREADABLE", None)
    env.pop("GRIPSIGHT_MAX_PIXELS", None)
    if case.readonly is not None:
        env["GRIPSIGHT_HOSTILE_READONLY"] = str(case.readonly)
    env.update(case.env)
    return env


def _classify(case: Case, status: int, hung: bool, seconds: float, max_rss_kb: float, text: str) -> Outcome:
    max_rss_mb = max_rss_kb / 1024.0
    if hung:
        return Outcome(case, "hang", None, text, seconds, max_rss_mb)
    if os.WIFSIGNALED(status):
        return Outcome(case, "killed", -os.WTERMSIG(status), text, seconds, max_rss_mb)
    code = os.WEXITSTATUS(status)
    if "internal error" in text:
        kind = "internal"
    elif "Traceback (most recent call last)" in text or "MemoryError" in text:
        kind = "traceback"
    elif code != 0:
        kind = "error"
    elif any(line.lstrip().lower().startswith("warning") for line in text.splitlines()):
        kind = "warning"
    else:
        kind = "result"
    return Outcome(case, kind, code, text, seconds, max_rss_mb)


def run_case(case: Case, time_limit_s: float = 60.0) -> Outcome:
    """Run one case in a fresh interpreter (cold: imports included in its time); never raises for what
    the child does."""
    argv = [sys.executable, "-m", "tests.app.hostile.shim", *case.argv]
    with tempfile.TemporaryFile() as out, tempfile.TemporaryFile() as err:
        start = time.monotonic()
        proc = subprocess.Popen(argv, cwd=case.cwd, env=_env(case), stdin=subprocess.DEVNULL, stdout=out, stderr=err,
                                preexec_fn=_limits(case))
        status, rusage, hung = None, None, False
        while True:
            pid, status, rusage = os.wait4(proc.pid, os.WNOHANG)
            if pid:
                break
            if time.monotonic() - start > (case.time_limit_s or time_limit_s):
                hung = True
                os.killpg(proc.pid, signal.SIGKILL)
                _, status, rusage = os.wait4(proc.pid, 0)
                break
            time.sleep(0.02)
        proc.returncode = 0          # reaped above: keep Popen from waiting again
        seconds = time.monotonic() - start
        out.seek(0)
        err.seek(0)
        text = err.read().decode("utf-8", "replace") + "\n" + out.read().decode("utf-8", "replace")
    return _classify(case, status, hung, seconds, rusage.ru_maxrss, text)


class _Zygote:
    """A warm parent process (``zygote.py``) that forks one child per case."""

    def __init__(self):
        env = _env(Case("zygote", [], "result", 0))
        self.proc = subprocess.Popen([sys.executable, "-m", "tests.app.hostile.zygote"], cwd=str(ROOT), env=env,
                                     stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)
        self.folder = tempfile.mkdtemp(prefix="hostile-io-")

    def run(self, case: Case, time_limit_s: float) -> Outcome:
        import json

        out, err = os.path.join(self.folder, "out"), os.path.join(self.folder, "err")
        req = {"argv": case.argv, "cwd": case.cwd, "env": _env(case), "readonly": str(case.readonly or ""),
               "memory_bytes": case.memory_bytes or MEMORY_LIMIT_BYTES, "file_size_bytes": case.file_size_bytes,
               "time_limit_s": case.time_limit_s or time_limit_s, "stdout": out, "stderr": err}
        self.proc.stdin.write(json.dumps(req) + "\n")
        self.proc.stdin.flush()
        reply = json.loads(self.proc.stdout.readline())
        with open(err, "rb") as e, open(out, "rb") as o:
            text = e.read().decode("utf-8", "replace") + "\n" + o.read().decode("utf-8", "replace")
        return _classify(case, reply["status"], reply["hung"], reply["seconds"], reply["max_rss_kb"], text)

    def close(self):
        import shutil

        self.proc.stdin.close()
        self.proc.wait(timeout=30)
        self.proc.stdout.close()
        shutil.rmtree(self.folder, ignore_errors=True)


def run_all(cases: list[Case], workers: int = 2, time_limit_s: float = 60.0, warm: bool = True) -> list[Outcome]:
    """Run every case, ``workers`` at a time (slowest first, so the pool ends together). ``warm`` forks
    each case from a parent that has the command line imported (each case still its own process with
    its own limits); cold starts a fresh interpreter per case."""
    import queue
    import threading

    order = sorted(range(len(cases)), key=lambda i: -cases[i].cost)
    results: list[Outcome | None] = [None] * len(cases)
    todo: queue.Queue = queue.Queue()
    for i in order:
        todo.put(i)

    def worker():
        zygote = _Zygote() if warm else None
        try:
            while True:
                try:
                    i = todo.get_nowait()
                except queue.Empty:
                    return
                results[i] = zygote.run(cases[i], time_limit_s) if warm else run_case(cases[i], time_limit_s)
        finally:
            if zygote is not None:
                zygote.close()

    threads = [threading.Thread(target=worker) for _ in range(workers)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    return results  # type: ignore[return-value]


def summary(outcomes: list[Outcome]) -> str:
    """Counts by outcome, mismatches, and the worst case's memory and time."""
    from collections import Counter

    counts = Counter(o.kind for o in outcomes)
    wrong = [o for o in outcomes if not o.as_expected]
    slow = max(outcomes, key=lambda o: o.seconds)
    big = max(outcomes, key=lambda o: o.max_rss_mb)
    lines = [f"{len(outcomes)} cases: " + ", ".join(f"{k} {counts[k]}" for k in
                                                   ("error", "warning", "result", "internal", "traceback", "hang", "killed")),
             f"not as expected: {len(wrong)}",
             f"slowest: {slow.case.name} {slow.seconds:.1f} s; largest: {big.case.name} {big.max_rss_mb:.0f} MB peak RSS"]
    for o in wrong:
        first = next((ln for ln in o.output.splitlines() if ln.strip()), "")
        lines.append(f"  {o.case.name}: {o.why_not()} | {first[:160]}")
    return "\n".join(lines)
