"""Random renders on busy table surfaces (cutting mat, printed text, chequered cloth) with noise and
blur, and how marker detection does on them against the renders' truth: shared by the test suite (a
small seeded sample) and tests/bench/bench_busy_markers.py (100 renders)."""

from __future__ import annotations

from dataclasses import dataclass

import cv2
import numpy as np

from gripsight.vision.markergeom import marker_paper_corners_mm
from gripsight.vision.markers import detect_markers
from gripsight.vision.synth.render import render_scene
from gripsight.vision.synth.scene import LightingSpec, SensorSpec, random_scene
from gripsight.vision.synth.surfaces import BUSY_SURFACES


@dataclass
class BusyResult:
    surface: str
    true_expected: int          # markers whose whole paper is in the photo
    true_found: int             # of those, found by id within 3 px of the truth
    false_found: int            # returned markers that are not a true marker at its place
    opencv_false: int           # the same count for OpenCV's detector with default parameters


def busy_render(cell, seed: int):
    """One random busy scene: a surface of the three, noise 1-4 levels, blur 0-1.2 px, random light."""
    rng = np.random.default_rng(seed)
    surface = BUSY_SURFACES[seed % len(BUSY_SURFACES)]
    lighting = LightingSpec(brightness=float(rng.uniform(0.6, 1.2)), gradient=float(rng.uniform(0, 0.4)),
                            gradient_azimuth_deg=float(rng.uniform(0, 360)))
    sensor = SensorSpec(noise=float(rng.uniform(1.0, 4.0)), blur_px=float(rng.uniform(0.0, 1.2)),
                        jpeg_quality=int(rng.integers(70, 95)))
    scene = random_scene(cell, rng, lighting=lighting, sensor=sensor, surface=surface)
    rendered = render_scene(cell, scene)
    ok, buf = cv2.imencode(".jpg", rendered.image_bgr, [cv2.IMWRITE_JPEG_QUALITY, sensor.jpeg_quality])
    return surface.value, cv2.imdecode(buf, cv2.IMREAD_COLOR), rendered


def score(cell, seed: int) -> BusyResult:
    surface, image, rendered = busy_render(cell, seed)
    truth = {m["id"]: np.array(m["corners_px"]) for m in rendered.truth["markers"]}
    whole = {i for i in truth if rendered.camera.in_view(
        marker_paper_corners_mm(cell.markers.layout[i], cell.markers.size_mm, cell.markers.margin_mm)).all()}

    def is_true(marker_id, corners):
        return marker_id in truth and np.abs(np.asarray(corners).reshape(4, 2) - truth[marker_id]).max() < 3.0

    found = detect_markers(image, cell.markers.dictionary, search_ids=cell.markers.layout)     # as calibrate does
    good = {d.id for d in found if is_true(d.id, d.corners_px)}
    false = sum(not is_true(d.id, d.corners_px) for d in found)
    det = cv2.aruco.ArucoDetector(cv2.aruco.getPredefinedDictionary(cv2.aruco.DICT_4X4_50), cv2.aruco.DetectorParameters())
    corners, ids, _ = det.detectMarkers(cv2.cvtColor(image, cv2.COLOR_BGR2GRAY))
    cv_false = 0 if ids is None else sum(not is_true(int(i), c) for i, c in zip(ids.ravel(), corners))
    return BusyResult(surface, len(whole), len(good & whole), false, cv_false)
