"""Benchmark: part detection per 1280x960 photo against decoding the same JPEG, in one run.

Run:  python -m tests.bench.bench_detect
"""

from __future__ import annotations

import time

import cv2
import numpy as np

from gripsight.app.cellfile import load_cell
from tests.conftest import ROOT, SAMPLE_CELL
from gripsight.vision.calibration import calibrate
from gripsight.vision.markers import detect_markers
from gripsight.vision.parts import detect_parts


def main(repeats: int = 15) -> None:
    cell = load_cell(SAMPLE_CELL)
    cal_image = cv2.imread(str(ROOT / "sample_images" / "calibration.jpg"))
    cal = calibrate(detect_markers(cal_image, cell.markers.dictionary), cell, (1280, 960))
    photos = sorted((ROOT / "sample_images" / "demo").glob("*.jpg"))
    data = [p.read_bytes() for p in photos]
    images = [cv2.imdecode(np.frombuffer(d, np.uint8), cv2.IMREAD_COLOR) for d in data]
    markers = [detect_markers(im, cell.markers.dictionary) for im in images]
    detect_parts(images[0], cal.mapping, cal.camera_centre_mm, cell, markers[0])   # warm up
    decode, detect = [], []
    for _ in range(repeats):              # decode and detection interleaved: both see the same machine
        for d, im, mk in zip(data, images, markers):
            t0 = time.perf_counter()
            cv2.imdecode(np.frombuffer(d, np.uint8), cv2.IMREAD_COLOR)
            t1 = time.perf_counter()
            detect_parts(im, cal.mapping, cal.camera_centre_mm, cell, mk)
            t2 = time.perf_counter()
            decode.append(t1 - t0)
            detect.append(t2 - t1)
    decode = np.array(decode).reshape(repeats, -1)
    detect = np.array(detect).reshape(repeats, -1)
    dec, det = np.median(decode) * 1e3, np.median(detect) * 1e3
    best = detect.min(axis=0).mean() / decode.min(axis=0).mean()
    print(f"JPEG decode {dec:.2f} ms; part detection {det:.2f} ms (white balance, colour classes, blobs, "
          f"top-face fits; markers found beforehand); ratio {det / dec:.2f}x (medians), {best:.2f}x "
          f"(best of {repeats} per photo) over {len(photos)} demo photos")


if __name__ == "__main__":
    main()
