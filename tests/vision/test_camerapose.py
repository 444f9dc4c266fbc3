"""The camera centre of a pinhole from marker corners (vision/camerapose.py).

Scenes are projected by our `Camera` (itself checked against ``cv2.projectPoints`` in test_render); our own
projection is checked against OpenCV here. The method: Zhang 2000 (one plane fixes two of f, cx, cy).
"""

import cv2
import numpy as np
import pytest

from gripsight.vision.camera import Camera
from gripsight.vision.camerapose import _project, fit_pinhole, principal_point
from gripsight.vision.homography import TableMapping, fit_homography_dlt

# eight 40 mm markers around a 320 x 440 mm bench, one raised 60 mm on a box (our own layout)
_CENTRES = [(40, 220), (360, 220), (360, -220), (40, -220), (200, 220), (360, 0), (200, -220), (40, 0)]
_SQUARE = np.array([(20, -20), (20, 20), (-20, 20), (-20, -20)], float)


def _corners_mm(centres, z=0.0) -> np.ndarray:
    pts = np.concatenate([np.asarray(c, float) + _SQUARE for c in centres])
    return np.column_stack([pts, np.full(len(pts), z)])


def _scene(rng, tilt_deg, offset_px, height_mm=700.0, noise_px=0.05):
    cam = Camera.create([200.0 + rng.uniform(-20, 20), rng.uniform(-20, 20), height_mm], 1300.0,
                        tilt_deg=tilt_deg, tilt_azimuth_deg=rng.uniform(0, 360), principal_offset_px=offset_px)
    floor_mm, raised_mm = _corners_mm(_CENTRES), _corners_mm([(120, -150)], z=60.0)
    floor_px = cam.project_ideal(floor_mm) + rng.normal(0, noise_px, (len(floor_mm), 2))
    raised_px = cam.project_ideal(raised_mm) + rng.normal(0, noise_px, (len(raised_mm), 2))
    H = fit_homography_dlt(floor_px, floor_mm[:, :2])
    return cam, TableMapping(H), floor_px, floor_mm, raised_px, raised_mm


def test_projection_agrees_with_opencv():
    # reference: cv2.projectPoints of the same pinhole (no distortion)
    rng = np.random.default_rng(1)
    cam = Camera.create([180.0, -30.0, 720.0], 1250.0, tilt_deg=4.0, tilt_azimuth_deg=70.0,
                        principal_offset_px=(7.0, -4.0))
    xyz = np.column_stack([rng.uniform(0, 400, 50), rng.uniform(-250, 250, 50), rng.uniform(0, 80, 50)])
    p = np.concatenate([[cam.K[0, 0]], cam.K[:2, 2], np.ravel(cam.rvec), cam.centre_mm])
    ref, _ = cv2.projectPoints(xyz, cam.rvec, cam.tvec, cam.K, None)
    np.testing.assert_allclose(_project(p, xyz), ref.reshape(-1, 2), atol=1e-8)


@pytest.mark.parametrize("seed", [0, 1, 2, 3])
def test_a_tilted_camera_shows_its_principal_point(seed):
    """4 degrees of tilt and a principal point 9 / -6 px off the image centre: the nadir lands within
    1 mm and the principal point within 3 px; assuming it at the image centre puts the nadir ~5 mm off."""
    rng = np.random.default_rng(seed)
    cam, mapping, fpx, fmm, rpx, rmm = _scene(rng, 4.0, (9.0, -6.0))
    centre, pp, f = fit_pinhole(mapping, (1280, 960), fpx, fmm, rpx, rmm, height_mm=740.0, height_sd_mm=74.0,
                                pp_sd_px=8.0, noise_px=0.05)
    assert np.linalg.norm(centre[:2] - cam.centre_mm[:2]) <= 1.0
    assert abs(centre[2] - cam.centre_mm[2]) <= 0.01 * cam.centre_mm[2]
    assert np.linalg.norm(pp - cam.K[:2, 2]) <= 3.0
    assert abs(f - 1300.0) <= 13.0
    # the same data with the principal point held at the image centre (the old assumption)
    held, _, _ = fit_pinhole(mapping, (1280, 960), fpx, fmm, rpx, rmm, height_mm=740.0, height_sd_mm=74.0,
                             pp_sd_px=1e-3, noise_px=0.05)
    assert np.linalg.norm(held[:2] - cam.centre_mm[:2]) >= 3.0


def test_a_camera_looking_straight_down_keeps_the_prior_principal_point():
    """No tilt: the table cannot show the principal point, so it stays at the image centre, and with a
    true tape height and no raised marker the nadir is under it."""
    rng = np.random.default_rng(5)
    cam, mapping, fpx, fmm, _, _ = _scene(rng, 0.0, (0.0, 0.0), height_mm=700.0)
    centre, pp, _ = fit_pinhole(mapping, (1280, 960), fpx, fmm, height_mm=700.0, height_sd_mm=70.0,
                                pp_sd_px=8.0, noise_px=0.05)
    np.testing.assert_allclose(pp, principal_point(mapping, (1280, 960)), atol=1.0)
    assert np.linalg.norm(centre[:2] - cam.centre_mm[:2]) <= 0.6
    assert abs(centre[2] - 700.0) <= 5.0


def test_the_raised_marker_overrules_a_wrong_tape_height():
    """The tape says 800 mm (10 % sd), the camera is 700 mm up: the raised marker's parallax wins."""
    rng = np.random.default_rng(6)
    cam, mapping, fpx, fmm, rpx, rmm = _scene(rng, 1.0, (3.0, 2.0), height_mm=700.0)
    centre, _, _ = fit_pinhole(mapping, (1280, 960), fpx, fmm, rpx, rmm, height_mm=800.0, height_sd_mm=80.0,
                               pp_sd_px=8.0, noise_px=0.05)
    assert abs(centre[2] - 700.0) <= 7.0
