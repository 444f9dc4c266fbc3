"""Benchmarks of the whole job: batch throughput with 1 and 2 workers, memory over a long batch, and
the per-photo pipeline (detection, drift check, planning) against JPEG decode of the same photos.

Run:  python -m tests.bench.bench_batch [--long 400]
"""

from __future__ import annotations

import argparse
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import cv2
import numpy as np

from tests.conftest import ROOT, SAMPLE_CELL

SAMPLES = ROOT / "sample_images"


def _batch(folder: Path, out: Path, workers: int) -> float:
    t0 = time.perf_counter()
    subprocess.run([sys.executable, "-c", "from gripsight.app.cli import entry; entry()", "batch", str(folder),
                    "--cell", str(SAMPLE_CELL), "--workers", str(workers), "--out", str(out)],
                   check=False, capture_output=True)
    return time.perf_counter() - t0


def _peak_rss_mb(folder: Path, out: Path) -> float:
    """Peak resident memory (MB) of the batch's processes, from a child that runs the batch."""
    code = ("import resource, subprocess, sys;"
            f"subprocess.run([sys.executable, '-c', 'from gripsight.app.cli import entry; entry()', 'batch', '{folder}',"
            f" '--cell', '{SAMPLE_CELL}', '--workers', '2', '--out', '{out}'], capture_output=True);"
            "print(resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss)")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    return int(done.stdout.strip().splitlines()[-1]) / 1024.0


def _pipeline_vs_decode() -> tuple[float, float, float]:
    """Median decode and pipeline times (ms) over 10 interleaved rounds of the demo photos, and the ratio
    of their best-of-rounds times per photo (the machine's drift slows whole rounds)."""
    from gripsight.app.pipeline import load_or_make_calibration, plan_photo
    from gripsight.app.cellfile import load_cell
    from gripsight.planning.picks import Planner

    cell = load_cell(SAMPLE_CELL)
    stored = load_or_make_calibration(cell, None)
    planner = Planner(cell)
    photos = sorted((SAMPLES / "demo").glob("*.jpg"))
    data = [p.read_bytes() for p in photos]
    plan_photo(photos[0], cell, stored, planner)        # warm up
    decode, pipeline = [], []
    for _ in range(10):                   # interleaved: both see the same machine
        for photo, raw in zip(photos, data):
            t0 = time.perf_counter()
            image = cv2.imdecode(np.frombuffer(raw, np.uint8), cv2.IMREAD_COLOR)
            t1 = time.perf_counter()
            plan_photo(photo, cell, stored, planner, image=image)
            t2 = time.perf_counter()
            decode.append(t1 - t0)
            pipeline.append(t2 - t1)
    decode, pipeline = np.array(decode).reshape(10, -1), np.array(pipeline).reshape(10, -1)
    best = pipeline.min(axis=0).mean() / decode.min(axis=0).mean()
    return float(np.median(decode) * 1e3), float(np.median(pipeline) * 1e3), float(best)


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--long", type=int, default=400, help="photos in the memory run")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        folder = SAMPLES / "batch"
        n = len(list(folder.glob("*.jpg")))
        _batch(folder, tmp / "warm", 1)
        t1 = _batch(folder, tmp / "one", 1)
        t2 = _batch(folder, tmp / "two", 2)
        print(f"batch of {n} photos: 1 worker {n / t1:.2f} photos/s, 2 workers {n / t2:.2f} photos/s, "
              f"speed-up {t1 / t2:.2f}x (wall time including start-up)")
        long_folder = tmp / "long"
        long_folder.mkdir()
        photos = sorted(folder.glob("*.jpg"))
        for i in range(args.long):
            src = photos[i % len(photos)]
            (long_folder / f"p{i:04d}.jpg").symlink_to(src)
        short_folder = tmp / "short"
        short_folder.mkdir()
        for i in range(len(photos)):
            (short_folder / f"p{i:04d}.jpg").symlink_to(photos[i])
        short = _peak_rss_mb(short_folder, tmp / "short_out")
        long = _peak_rss_mb(long_folder, tmp / "long_out")
        print(f"peak memory of one process: {short:.0f} MB over {len(photos)} photos, {long:.0f} MB over {args.long}")
    dec, pipe, best = _pipeline_vs_decode()
    print(f"per photo: JPEG decode {dec:.2f} ms; markers + drift check + detection + planning {pipe:.2f} ms "
          f"({pipe / dec:.2f}x decode (medians), {best:.2f}x (best of 10 per photo))")



if __name__ == "__main__":
    main()
