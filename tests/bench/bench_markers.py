"""Benchmark: marker detection time against OpenCV's ArUco detector with default parameters on the same
photos (the committed sample photos and a 50-marker sheet), run alternately so both see the same moments
of a shared machine (medians of 7 runs a photo, 42 on the one sheet). Issue 19 target: within 1.5x.

Run:  python -m tests.bench.bench_markers
"""

from __future__ import annotations

import time

import cv2
import numpy as np

from gripsight.vision.markers import detect_markers
from tests.conftest import ROOT
from tests.vision.markersheet import sheet_photo


def _paired_median_ms(ours, ref, image, repeats):
    """Median times (ms) of ``ours`` and ``ref`` on one image, the two run alternately so both see the
    same moments of a shared machine."""
    t_ours, t_ref = [], []
    for _ in range(repeats):
        for fn, times in ((ours, t_ours), (ref, t_ref)):
            t0 = time.perf_counter()
            fn(image)
            times.append(time.perf_counter() - t0)
    return float(np.median(t_ours)) * 1e3, float(np.median(t_ref)) * 1e3


def main(repeats: int = 7) -> None:
    photos = [cv2.imread(str(p)) for p in sorted((ROOT / "sample_images").rglob("*.jpg"))[:20]]
    sheet = sheet_photo(np.random.default_rng(1), range(50), 60, tilt=0.03).image_bgr
    sets = {"sample photos (9 markers, 1280x960)": (photos, repeats),
            "50-marker sheet (1280x960)": ([sheet], 6 * repeats)}      # one photo: more repeats
    reference = cv2.aruco.ArucoDetector(cv2.aruco.getPredefinedDictionary(cv2.aruco.DICT_4X4_50),
                                        cv2.aruco.DetectorParameters())
    for name, (images, count) in sets.items():
        ours, ref = [], []
        for image in images:
            o, r = _paired_median_ms(lambda im: detect_markers(im, "aruco_4x4_50"),
                                     lambda im: reference.detectMarkers(cv2.cvtColor(im, cv2.COLOR_BGR2GRAY)), image, count)
            ours.append(o)
            ref.append(r)
        print(f"{name}: ours {np.mean(ours):.1f} ms, OpenCV default {np.mean(ref):.1f} ms, "
              f"ratio {np.mean(ours) / np.mean(ref):.2f}x over {len(images)} photo(s)")


if __name__ == "__main__":
    main()
