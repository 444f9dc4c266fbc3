"""Benchmark: calibrate and check per photo (marker detection included), on the sample photos.

Run:  python -m tests.bench.bench_calibration
"""

from __future__ import annotations

import time

import cv2
import numpy as np

from gripsight.app.cellfile import load_cell
from tests.conftest import ROOT, SAMPLE_CELL
from gripsight.app.calfile import read_calibration, write_calibration
from gripsight.vision.calibration import calibrate
from gripsight.vision.drift import check_drift
from gripsight.vision.markers import detect_markers


def _best(fn, repeats=7):
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return np.median(times) * 1e3


def main() -> None:
    import tempfile
    from pathlib import Path

    cell = load_cell(SAMPLE_CELL)
    photo = ROOT / "sample_images" / "calibration.jpg"
    image = cv2.imread(str(photo))
    decode = _best(lambda: cv2.imread(str(photo)))
    detect = _best(lambda: detect_markers(image, cell.markers.dictionary))
    dets = detect_markers(image, cell.markers.dictionary)
    fit = _best(lambda: calibrate(dets, cell, (1280, 960)))
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "calibration.yaml"
        write_calibration(path, calibrate(dets, cell, (1280, 960)), cell, photo)
        stored = read_calibration(path)
        demo = cv2.imread(str(ROOT / "sample_images" / "demo" / "demo_01.jpg"))
        check = _best(lambda: check_drift(stored, detect_markers(demo, cell.markers.dictionary), cell, (1280, 960)))
    print(f"JPEG decode {decode:.1f} ms; marker detection {detect:.1f} ms; calibration fit {fit:.1f} ms "
          f"(calibrate = {detect + fit:.1f} ms per photo); check (detection + drift) {check:.1f} ms per photo")


if __name__ == "__main__":
    main()
