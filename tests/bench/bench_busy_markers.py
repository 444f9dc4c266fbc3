"""Benchmark: marker detection on 100 random renders on busy surfaces (cutting mat, printed text,
chequered cloth) with noise 1-4 levels and blur 0-1.2 px: false markers and true markers found, ours
against OpenCV's detector with default parameters, and detection time against OpenCV's on the same photos.

Run:  python -m tests.bench.bench_busy_markers [count]
"""

from __future__ import annotations

import sys
import time

import cv2

from gripsight.app.cellfile import load_cell
from gripsight.vision.markers import detect_markers
from tests.conftest import SAMPLE_CELL
from tests.vision.busy import busy_render, score


def main(count: int = 100) -> None:
    cell = load_cell(SAMPLE_CELL)
    totals = {"expected": 0, "found": 0, "false": 0, "opencv_false": 0}
    ours_s, opencv_s = [], []
    det = cv2.aruco.ArucoDetector(cv2.aruco.getPredefinedDictionary(cv2.aruco.DICT_4X4_50), cv2.aruco.DetectorParameters())
    for seed in range(count):
        r = score(cell, seed)
        totals["expected"] += r.true_expected
        totals["found"] += r.true_found
        totals["false"] += r.false_found
        totals["opencv_false"] += r.opencv_false
        if r.false_found or r.true_found < r.true_expected:
            print(f"seed {seed} ({r.surface}): {r.true_found}/{r.true_expected} found, {r.false_found} false")
        if seed < 20:
            _, image, _ = busy_render(cell, seed)
            gray = cv2.cvtColor(image, cv2.COLOR_BGR2GRAY)
            for _ in range(3):
                t0 = time.perf_counter()
                detect_markers(image, cell.markers.dictionary, search_ids=cell.markers.layout)
                t1 = time.perf_counter()
                det.detectMarkers(gray)
                t2 = time.perf_counter()
                ours_s.append(t1 - t0)
                opencv_s.append(t2 - t1)
    print(f"{count} busy renders: true markers found {totals['found']}/{totals['expected']}, false markers "
          f"{totals['false']} (OpenCV default parameters: {totals['opencv_false']} false)")
    ours, ref = sorted(ours_s)[len(ours_s) // 2] * 1e3, sorted(opencv_s)[len(opencv_s) // 2] * 1e3
    print(f"detection time (median over {len(ours_s)}): ours {ours:.1f} ms, OpenCV default {ref:.1f} ms, ratio {ours / ref:.2f}x")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 100)
