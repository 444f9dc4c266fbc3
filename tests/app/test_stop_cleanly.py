"""Stop cleanly (issue 14, item 7): Ctrl-C stops a batch with no trace and no orphan process, keeps the
finished rows and prints the resume command; the workers end when the batch process is killed (-9).

Many trials each (marked slow; about 4 s a trial on an idle 2-core machine). The waits below are hang
guards, not speed checks; the stop times are measured and reported in DEVELOPERS.md."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time

import pytest

from gripsight.app.cli import main
from tests.conftest import ROOT, calibrated_photos

SAMPLES = ROOT / "sample_images"
CLI = [sys.executable, "-c", "from gripsight.app.cli import entry; entry()"]
CTRL_C_TRIALS = 8
KILL_TRIALS = 8
HANG_GUARD_S = 20.0


@pytest.fixture(scope="module")
def photos(tmp_path_factory):
    # every batch photo: a batch of ten finished in about half a second once the pipeline got fast, and a
    # Ctrl-C sent after its second row could arrive after its last
    folder, _ = calibrated_photos(tmp_path_factory.mktemp("stop"), sorted((SAMPLES / "batch").glob("*.jpg")))
    return folder


def _session(sid: int) -> list[int]:
    """Live (not zombie) processes of a session: the batch, its fork server and workers."""
    pids = []
    for entry in os.listdir("/proc"):
        if not entry.isdigit():
            continue
        try:
            with open(f"/proc/{entry}/stat", "rb") as fh:
                fields = fh.read().rsplit(b")", 1)[1].split()
        except OSError:
            continue
        if int(fields[3]) == sid and fields[0] != b"Z":     # stat fields: state, ppid, pgrp, session (proc(5))
            pids.append(int(entry))
    return pids


def _wait_gone(sid: int) -> list[int]:
    end = time.time() + HANG_GUARD_S
    while _session(sid) and time.time() < end:
        time.sleep(0.02)
    return _session(sid)


def _start(folder, out, stderr):
    return subprocess.Popen(CLI + ["batch", str(folder), "--workers", "2", "--out", str(out)], cwd=ROOT,
                            start_new_session=True, stdout=subprocess.DEVNULL, stderr=stderr)


def _rows(out) -> int:
    return len(list(out.glob("*/row.json")))


def _wait_rows(proc, out, n) -> bool:
    """Wait until the batch holds its folder (n = 0) or has finished n rows; True if it still runs."""
    end = time.time() + 180
    while (_rows(out) < n or not (out / ".gripsight.lock").exists()) and proc.poll() is None and time.time() < end:
        time.sleep(0.02)
    return proc.poll() is None


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc for the session's processes")
@pytest.mark.slow
def test_ctrl_c_stops_the_batch_cleanly_every_time(tmp_path, photos, capsys):
    stops = []
    for trial in range(CTRL_C_TRIALS):
        out = tmp_path / f"out{trial}"
        err_path = tmp_path / f"err{trial}.txt"
        with open(err_path, "w") as err:
            proc = _start(photos, out, err)
            assert _wait_rows(proc, out, trial % 3), "the batch finished before it could be interrupted"
            seen = _rows(out)
            os.killpg(proc.pid, signal.SIGINT)             # a terminal's Ctrl-C goes to the whole group
            t0 = time.time()
            if trial % 4 == 3:                             # an impatient second Ctrl-C
                time.sleep(0.05)
                os.killpg(proc.pid, signal.SIGINT)
            code = proc.wait(timeout=HANG_GUARD_S)
            stops.append(time.time() - t0)
        text = err_path.read_text()
        assert code == 130, text
        assert "Traceback" not in text and "leaked" not in text, text
        assert f"resume with: gripsight batch {photos} --out {out} --resume" in text
        assert _wait_gone(proc.pid) == [], "orphan processes after Ctrl-C"
        assert _rows(out) >= seen                          # finished rows kept
        for row in out.glob("*/row.json"):
            assert json.loads(row.read_text())["photo"] == row.parent.name
    with capsys.disabled():
        print(f"Ctrl-C trials {CTRL_C_TRIALS}: stop times {', '.join(f'{s:.2f}' for s in stops)} s")
    # the last trial's batch resumes to a whole batch
    assert main(["batch", str(photos), "--workers", "2", "--out", str(out), "--resume"]) == 0
    capsys.readouterr()
    assert len((out / "batch.csv").read_text().splitlines()) == 1 + len(list(photos.glob("*.jpg")))
    assert not list(out.glob("**/.*.tmp*"))                # a write cut by the stop is cleaned by --resume


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc for the session's processes")
@pytest.mark.slow
def test_workers_end_when_the_batch_is_killed_with_sigkill(tmp_path, photos):
    gone_after = []
    for trial in range(KILL_TRIALS):
        out = tmp_path / f"out{trial}"
        proc = _start(photos, out, subprocess.DEVNULL)
        assert _wait_rows(proc, out, 1 + trial % 2), "the batch finished before it could be killed"
        workers = [pid for pid in _session(proc.pid) if pid != proc.pid]
        assert len(workers) >= 2                            # the fork server and the workers
        os.kill(proc.pid, signal.SIGKILL)                   # the batch only, not its group
        t0 = time.time()
        proc.wait()
        # before the fix: the workers lived on (and kept working)
        assert _wait_gone(proc.pid) == [], "workers outlived the killed batch"
        gone_after.append(time.time() - t0)
    print(f"kill -9 trials {KILL_TRIALS}: workers gone after {', '.join(f'{s:.2f}' for s in gone_after)} s")
