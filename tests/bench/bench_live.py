"""The live cell's latency: from a photo's file being closed to its joints.csv on disk.

`gripsight run --watch` runs as its own process on a fresh folder; this process writes the demo photos
into it one by one (each in two halves with a pause between, as a camera that takes its time; the
watcher must not take it before the close), and times from the close to the moment joints.csv appears
(checked every 0.5 ms). Photos come ``--gap`` seconds apart (a camera's pace; the pictures of the
previous photo are drawn in the background meanwhile). The floor beside it is the JPEG decode of the
same photo, timed in this process between the photos.

Run:  python -m tests.bench.bench_live [--rounds 2] [--gap 1.0]
"""

from __future__ import annotations

import argparse
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import cv2
import numpy as np

from tests.conftest import ROOT

SAMPLES = ROOT / "sample_images"


def _decode_s(raw: bytes, repeat: int = 5) -> float:
    """Best of ``repeat`` JPEG decodes (s)."""
    best = 1e9
    for _ in range(repeat):
        t0 = time.perf_counter()
        cv2.imdecode(np.frombuffer(raw, np.uint8), cv2.IMREAD_COLOR)
        best = min(best, time.perf_counter() - t0)
    return best


def _wait_for(path: Path, timeout_s: float) -> float | None:
    end = time.perf_counter() + timeout_s
    while time.perf_counter() < end:
        if path.exists():
            return time.perf_counter()
        time.sleep(0.0005)
    return None


def live_latency(rounds: int = 2, gap_s: float = 1.0, pause_s: float = 0.2) -> dict:
    """Latencies (s) from close to joints.csv, decode times (s) of the same photos, per photo and round."""
    photos = sorted((SAMPLES / "demo").glob("*.jpg"))
    latencies, decodes, errors = [], [], []
    for r in range(rounds):
        with tempfile.TemporaryDirectory() as tmp:
            tmp = Path(tmp)
            cam, out = tmp / "cam", tmp / "out"
            cam.mkdir()
            for name in ("cell.yaml", "calibration.yaml", "calibration.jpg"):
                if (SAMPLES / name).exists():
                    shutil.copy(SAMPLES / name, tmp / name)
            proc = subprocess.Popen([sys.executable, "-c", "from gripsight.app.cli import entry; entry()", "run",
                                     str(cam), "--out", str(out), "--watch", "--idle-stop", "20"],
                                    stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
            try:
                time.sleep(3.0 if r == 0 else 2.0)             # start-up (imports, cell, calibration)
                for photo in photos:
                    raw = photo.read_bytes()
                    target = cam / photo.name
                    with open(target, "wb") as fh:
                        fh.write(raw[: len(raw) // 2])
                        fh.flush()
                        time.sleep(pause_s)                     # half a photo on disk: must not be taken
                        fh.write(raw[len(raw) // 2:])
                    t_closed = time.perf_counter()
                    t_csv = _wait_for(out / photo.name / "joints.csv", 10.0)
                    if t_csv is None:
                        errors.append(photo.name)
                        continue
                    latencies.append(t_csv - t_closed)
                    decodes.append(_decode_s(raw))
                    time.sleep(gap_s)
            finally:
                proc.terminate()                               # SIGTERM: a camera cell being shut down
                try:
                    proc.wait(timeout=20)
                except subprocess.TimeoutExpired:
                    proc.kill()
    return {"latency_s": np.array(latencies), "decode_s": np.array(decodes), "missed": errors}


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--rounds", type=int, default=2)
    parser.add_argument("--gap", type=float, default=1.0, help="seconds between photos")
    args = parser.parse_args()
    res = live_latency(args.rounds, args.gap)
    lat, dec = res["latency_s"] * 1e3, res["decode_s"] * 1e3
    print(f"live: close -> joints.csv {np.median(lat):.1f} ms median (min {lat.min():.1f}, max {lat.max():.1f}) over "
          f"{len(lat)} photos; JPEG decode {np.median(dec):.2f} ms; ratio {np.median(lat) / np.median(dec):.1f}x; "
          f"target <= 150 ms" + (f"; missed {res['missed']}" if res["missed"] else ""))


if __name__ == "__main__":
    main()
