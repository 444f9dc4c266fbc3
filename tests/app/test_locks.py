"""One writer per output folder (issue 14, item 3): the operating system's lock, which dies with its
process. 50 pairs of concurrent `run` and `batch` into one folder: exactly one proceeds every time."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys

import pytest

from gripsight.app.errors import GripsightError
from gripsight.app.lock import LOCK_NAME, output_lock
from tests.conftest import ROOT, calibrated_photos

SAMPLES = ROOT / "sample_images"
PAIRS = 50

# Two long-lived drivers (the import is paid once); before trial k each touches its ready file and waits
# for the other's, so both commands reach the lock within a millisecond or so; the winner then works on
# four photos (a few hundred ms even since a photo takes tens of ms), far longer than that skew.
_DRIVER = r"""
import contextlib, io, json, sys, time
from pathlib import Path
from gripsight.app.cli import main
me, sync, folder, cal, outbase, plan = sys.argv[1], Path(sys.argv[2]), sys.argv[3], sys.argv[4], sys.argv[5], json.loads(sys.argv[6])
other = "b" if me == "a" else "a"
results = []
for k, pair in enumerate(plan):
    cmd = pair[0] if me == "a" else pair[1]
    (sync / f"{k}.{me}").touch()
    end = time.time() + 60
    while not (sync / f"{k}.{other}").exists() and time.time() < end:
        time.sleep(0.0002)
    err = io.StringIO()
    extra = ["--workers", "1"] if cmd == "batch" else []
    with contextlib.redirect_stderr(err), contextlib.redirect_stdout(io.StringIO()):
        code = main([cmd, folder, "--calibration", cal, "--out", f"{outbase}/{k}", *extra])
    results.append({"k": k, "cmd": cmd, "code": code, "refused": "is writing here" in err.getvalue(), "err": err.getvalue()[-300:]})
print(json.dumps(results))
"""


@pytest.fixture(scope="module")
def one_photo(tmp_path_factory):
    names = ("demo_01.jpg", "demo_02.jpg", "demo_03.jpg", "demo_04.jpg")      # work far longer than the skew
    return calibrated_photos(tmp_path_factory.mktemp("lock"), [SAMPLES / "demo" / n for n in names])


@pytest.mark.slow
def test_fifty_concurrent_pairs_of_run_and_batch_one_proceeds_each_time(tmp_path, one_photo, capsys):
    folder, cal = one_photo
    kinds = [("run", "batch"), ("batch", "run"), ("run", "run"), ("batch", "batch")]
    plan = [kinds[k % len(kinds)] for k in range(PAIRS)]
    sync = tmp_path / "sync"
    sync.mkdir()
    procs = [subprocess.Popen([sys.executable, "-c", _DRIVER, me, str(sync), str(folder), str(cal), str(tmp_path / "out"),
                               json.dumps(plan)], cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
             for me in ("a", "b")]
    outputs = [p.communicate(timeout=900) for p in procs]
    capsys.readouterr()
    a, b = (json.loads(out.strip().splitlines()[-1]) for out, _ in outputs)
    proceeded = 0
    for ra, rb in zip(a, b):
        outcome = sorted([(r["code"], r["refused"]) for r in (ra, rb)])
        # exactly one proceeds (exit 0), the other refuses with the lock's message (exit 1)
        assert outcome == [(0, False), (1, True)], (ra, rb)
        proceeded += 1
    assert proceeded == PAIRS
    # every winner's outputs are whole: run.csv or batch.csv in each trial's folder, never both
    for k, (first, second) in enumerate(plan):
        made = {(tmp_path / "out" / str(k) / name).exists() for name in ("run.csv", "batch.csv")}
        assert made == {True, False} or first == second


_HOLDER = r"""
import sys, time
from gripsight.app.lock import output_lock
with output_lock(sys.argv[1], "test"):
    print("held", flush=True)
    time.sleep(600)
"""


def test_the_lock_dies_with_its_process_even_by_kill_9(tmp_path):
    holder = subprocess.Popen([sys.executable, "-c", _HOLDER, str(tmp_path)], cwd=ROOT, stdout=subprocess.PIPE, text=True)
    assert holder.stdout.readline().strip() == "held"
    with pytest.raises(GripsightError, match=rf"another gripsight command \(pid {holder.pid}\) is writing here"):
        with output_lock(tmp_path, "second"):
            pass
    os.kill(holder.pid, signal.SIGKILL)
    holder.wait()
    holder.stdout.close()
    # the old lock took an empty or unreadable lock file as stale; here the file stays and means nothing
    with output_lock(tmp_path, "after"):
        assert (tmp_path / LOCK_NAME).read_text().split()[1] == "after"
    with output_lock(tmp_path, "again"):      # released at the end of the block
        pass


def test_an_empty_lock_file_held_by_a_live_process_is_not_taken(tmp_path):
    # the old heuristic read an empty lock file as stale and removed it: two writers in 4 of 22 trials
    holder = subprocess.Popen([sys.executable, "-c", _HOLDER.replace('"test"', '""'), str(tmp_path)], cwd=ROOT,
                              stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "held"
        (tmp_path / LOCK_NAME).write_text("")
        with pytest.raises(GripsightError, match="another gripsight command is writing here"):
            with output_lock(tmp_path, "second"):
                pass
    finally:
        holder.kill()
        holder.wait()
        holder.stdout.close()
