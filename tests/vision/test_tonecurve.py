"""The grey-to-light curve chosen at calibration (:mod:`gripsight.vision.tonecurve`).

A camera that writes codes linear in light is made from our sRGB calibration render by re-encoding every
code through the sRGB decoding (IEC 61966-2-1: the published curve; the photo is then what a camera with
a linear output would have written of the same scene). Its markers' truth corners are the render's."""

from __future__ import annotations

import cv2
import numpy as np
import pytest

from gripsight.app.calfile import read_calibration, write_calibration
from gripsight.app.cellfile import parse_cell
from gripsight.app.photoset import read_truth
from gripsight.vision.colour import linear_from_srgb
from gripsight.vision.markers import detect_markers
from gripsight.vision.tonecurve import calibrate_photo
from tests.conftest import ROOT, sample_cell_data

PHOTO = ROOT / "sample_images" / "calibration.jpg"


def _outward_px(found, truth) -> float:
    """Mean push of the corners away from each marker's centre against the truth (px)."""
    pushes = []
    for d in found:
        t = truth[d.id]
        away = (t - t.mean(axis=0)) / np.linalg.norm(t - t.mean(axis=0), axis=1, keepdims=True)
        pushes.append(((d.corners_px - t) * away).sum(axis=1).mean())
    return float(np.mean(pushes))


@pytest.fixture(scope="module")
def photos():
    srgb = cv2.imread(str(PHOTO))
    linear = np.round(255.0 * linear_from_srgb(srgb / 255.0)).astype(np.uint8)
    truth = {m["id"]: np.array(m["corners_px"], float) for m in read_truth(PHOTO)["markers"]}
    return srgb, linear, truth


def test_a_camera_writing_linear_codes_is_found_and_its_corners_are_not_pushed(photos):
    srgb, linear, truth = photos
    cell = parse_cell(sample_cell_data())
    plain = calibrate_photo(srgb, cell, "srgb")[0]
    cal, found = calibrate_photo(linear, cell, "linear")
    assert plain.tone_power is None                         # our renders are sRGB: the curve cameras write
    assert 0.9 <= cal.tone_power <= 1.12                     # codes linear in light: power 1 (found: 1.0)
    assert any("not by the sRGB curve" in n for n in cal.notes)
    # read through the sRGB curve, the linear photo's squares look larger than printed; with the found
    # curve they are where the render put them, and the calibration is as good as the sRGB photo's
    pushed = detect_markers(linear, cell.markers.dictionary, layout_ids=list(cell.markers.layout))
    assert _outward_px(pushed, truth) > 0.2                 # 0.31 px
    assert abs(_outward_px(found, truth)) < 0.05            # -0.010 px (the sRGB photo's: -0.011)
    assert cal.rms_mm < 1.1 * plain.rms_mm                   # 0.048 and 0.050 mm
    assert np.linalg.norm(cal.camera_centre_mm - plain.camera_centre_mm) < 0.5     # 0.15 mm apart


def test_the_curve_is_stored_with_the_calibration_and_old_files_read_as_srgb(photos, tmp_path):
    _, linear, _ = photos
    cell = parse_cell(sample_cell_data())
    cal, _ = calibrate_photo(linear, cell, "linear")
    path = tmp_path / "calibration.yaml"
    cv2.imwrite(str(tmp_path / "linear.png"), linear)
    write_calibration(path, cal, cell, tmp_path / "linear.png")
    assert read_calibration(path).tone_power == pytest.approx(cal.tone_power)
    text = path.read_text()
    old = "\n".join(line for line in text.splitlines() if not line.startswith("tone_power:")) + "\n"
    path.write_text(old)
    assert read_calibration(path).tone_power is None         # written before the key existed: sRGB
