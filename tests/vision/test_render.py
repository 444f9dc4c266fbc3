"""Synthetic photos against outside references: OpenCV's ArUco detector and cv2.projectPoints, and
the truth files' own claims (where parts and markers are), on fresh random renders and on the
committed sample set."""

from __future__ import annotations

import cv2
import numpy as np
import pytest
import yaml

from gripsight.app.cli import main
from gripsight.vision.camera import Camera
from gripsight.vision.colour import lab_from_srgb
from gripsight.vision.markers import aruco_dictionary, detect_markers
from gripsight.app.photoset import UNKNOWN_LAB, read_truth
from gripsight.vision.synth.render import _lens_map, encode_photo, render_scene
from gripsight.vision.markergeom import marker_paper_corners_mm
from gripsight.vision.synth.scene import CameraSpec, LightingSpec, Scene, SensorSpec, random_scene
from tests.conftest import ROOT, SAMPLE_CELL

SAMPLES = ROOT / "sample_images"


def _decode(image_bgr, quality):
    return cv2.imdecode(np.frombuffer(encode_photo(image_bgr, ".jpg", quality), np.uint8), cv2.IMREAD_COLOR)


def _detectable(cell, cam: Camera, marker_id) -> bool:
    """The marker's whole paper (with its white margin, the quiet zone) projects inside the photo."""
    m = cell.markers.layout[marker_id]
    return bool(cam.in_view(marker_paper_corners_mm(m, cell.markers.size_mm, cell.markers.margin_mm)).all())


def _corner_errors(cell, image, truth, cam):
    found = {d.id: d.corners_px for d in detect_markers(image, cell.markers.dictionary)}
    errors, expected, seen = [], 0, 0
    for m in truth["markers"]:
        if not _detectable(cell, cam, m["id"]):
            continue
        expected += 1
        if m["id"] in found:
            seen += 1
            errors.append(found[m["id"]] - np.array(m["corners_px"]))
    return np.concatenate(errors), seen / expected


@pytest.mark.parametrize("k1, k2, bound_px", [(0.0, 0.0, 0.2), (-0.15, 0.03, 0.2)], ids=["no-distortion", "k1=-0.15"])
def test_detected_marker_corners_match_truth_on_fresh_renders(sample_cell, k1, k2, bound_px):
    """Issue bound: RMS < 0.3 px undistorted, < 0.5 px distorted; we hold both to 0.2 px (measured ~0.10
    and ~0.13). Detection: cv2.aruco.ArucoDetector (OpenCV, the outside reference), corners refined on
    the linearised image."""
    rng = np.random.default_rng(11 if k1 else 12)
    errors, rates = [], []
    for _ in range(6):
        cam = CameraSpec(k1=k1, k2=k2, tilt_deg=float(rng.uniform(0, 3)), tilt_azimuth_deg=float(rng.uniform(0, 360)),
                         centre_mm=[float(rng.uniform(190, 215)), float(rng.uniform(-10, 10)), float(rng.uniform(700, 800))])
        scene = random_scene(sample_cell, rng, camera=cam,
                             lighting=LightingSpec(brightness=float(rng.uniform(0.6, 1.2)),
                                                   white_balance=[float(rng.uniform(0.85, 1.15)), 1.0, float(rng.uniform(0.75, 1.1))]),
                             sensor=SensorSpec(noise=float(rng.uniform(0.5, 4)), jpeg_quality=int(rng.integers(80, 96))))
        r = render_scene(sample_cell, scene)
        e, rate = _corner_errors(sample_cell, _decode(r.image_bgr, scene.sensor.jpeg_quality), r.truth, r.camera)
        errors.append(e)
        rates.append(rate)
    e = np.concatenate(errors)
    rms = float(np.sqrt((e ** 2).sum(axis=1).mean()))
    assert rms < bound_px, rms
    assert abs(e.mean(axis=0)).max() < 0.05            # no systematic offset
    assert np.mean(rates) >= 0.95


@pytest.mark.parametrize("photo", ["calibration.jpg", "bumped/calibration.jpg", "demo/demo_01.jpg"])
def test_sample_photos_marker_corners_match_truth(sample_cell, photo):
    image = cv2.imread(str(SAMPLES / photo))
    truth = read_truth(SAMPLES / photo)
    cam = Camera.from_dict(truth["camera"])
    e, rate = _corner_errors(sample_cell, image, truth, cam)
    assert rate == 1.0
    assert np.sqrt((e ** 2).sum(axis=1).mean()) < 0.2


def _nearest_reference(lab_pixel, references: dict) -> str:
    names = list(references)
    d = [np.linalg.norm(np.asarray(references[n]) - lab_pixel) for n in names]
    return names[int(np.argmin(d))]


def test_truth_top_centre_lies_on_the_part_colour(sample_cell):
    refs = {name: c.lab for name, c in sample_cell.parts.items()}
    refs["unknown"] = UNKNOWN_LAB
    checked = 0
    photos = sorted((SAMPLES / "demo").glob("*.jpg"))
    for photo in photos:
        image = cv2.imread(str(photo))
        for p in read_truth(photo)["parts"]:
            if not p["in_view"]:
                continue
            u, v = np.round(p["top_centre_px"]).astype(int)
            patch = image[v - 1:v + 2, u - 1:u + 2, ::-1].reshape(-1, 3).mean(axis=0) / 255.0
            assert _nearest_reference(lab_from_srgb(patch), refs) == p["class"], (photo.name, p["id"])
            checked += 1
    assert checked >= 30


def test_lens_map_inverts_opencv_projection():
    """The renderer looks up, for each output pixel, where the ideal pinhole image has that ray. At the
    pixel where cv2.projectPoints (outside reference) puts a table point, the map must give the ideal
    pinhole position of the same point."""
    cam = Camera.create([200, 0, 760], 1500.0, tilt_deg=2.0, tilt_azimuth_deg=30, k1=-0.15, k2=0.03)
    K_canvas, _, map_x, map_y = _lens_map(cam)
    rng = np.random.default_rng(5)
    pts = np.column_stack([rng.uniform(0, 400, 4000), rng.uniform(-280, 280, 4000), rng.uniform(0, 60, 4000)])
    uv = cam.project(pts)
    inside = (uv[:, 0] > 2) & (uv[:, 0] < cam.width_px - 3) & (uv[:, 1] > 2) & (uv[:, 1] < cam.height_px - 3)
    uv, pts = uv[inside], pts[inside]
    fine = 2 * uv + 0.5                      # output pixel u <-> fine sub-sample index 2u + 0.5
    look = np.column_stack([cv2.remap(m, fine[:, 0].astype(np.float32).reshape(1, -1),
                                      fine[:, 1].astype(np.float32).reshape(1, -1), cv2.INTER_LINEAR).ravel()
                            for m in (map_x, map_y)])
    ideal = cam.project_ideal(pts, K_canvas)
    assert np.abs(look - ideal).max() < 0.05        # canvas px (half an output px = 1 canvas px)


def test_undistorted_projection_equals_pinhole():
    cam = Camera.create([150, 20, 700], 1400.0, tilt_deg=3.0, tilt_azimuth_deg=100, roll_deg=5)
    pts = np.random.default_rng(0).uniform([0, -200, 0], [350, 200, 50], (100, 3))
    np.testing.assert_allclose(cam.project(pts), cam.project_ideal(pts), atol=1e-9)


def test_rendering_is_deterministic(sample_cell):
    scene = random_scene(sample_cell, np.random.default_rng(3), touching=True)
    a = render_scene(sample_cell, scene).image_bgr
    b = render_scene(sample_cell, scene).image_bgr
    assert np.array_equal(a, b)


@pytest.mark.parametrize("photo", ["calibration.jpg", "demo/demo_03.jpg", "batch/batch_05.jpg"])
def test_committed_sample_photos_reproduce_from_their_truth(sample_cell, photo):
    truth = read_truth(SAMPLES / photo)
    scene = Scene.model_validate(truth["scene"])
    again = _decode(render_scene(sample_cell, scene).image_bgr, scene.sensor.jpeg_quality)
    committed = cv2.imread(str(SAMPLES / photo))
    # the same photo up to JPEG rounding: OpenCV 5.1's codec moves a few dozen of 3.7 M values by 3-4
    # levels against the 5.0 that wrote the committed files (mean difference 1e-4 levels)
    diff = np.abs(again.astype(int) - committed.astype(int))
    assert (diff > 2).mean() < 1e-4
    assert diff.max() <= 8


def test_demo_set_has_what_the_demo_needs():
    classes = []
    for photo in sorted((SAMPLES / "demo").glob("*.jpg")):
        parts = read_truth(photo)["parts"]
        assert 4 <= len(parts) <= 8
        classes += [p["class"] for p in parts]
    assert "unknown" in classes
    far = [p for photo in (SAMPLES / "demo").glob("*.jpg") for p in read_truth(photo)["parts"]
           if np.hypot(*p["centre_mm"]) > 360]
    assert len(far) >= 2                     # tokens beyond the demo arm's 351 mm reach
    sizes = sum(f.stat().st_size for f in SAMPLES.rglob("*") if f.is_file())
    assert sizes < 25 * 2**20


def test_part_at_the_image_edge_is_not_fully_in_view(sample_cell):
    scene = Scene(parts=[{"class": "red", "x_mm": 200.0, "y_mm": 0.0},
                         {"class": "red", "x_mm": 200.0, "y_mm": -332.0}])
    truth = render_scene(sample_cell, scene).truth
    assert [p["in_view"] for p in truth["parts"]] == [True, False]


def test_render_command_with_a_scene_file_and_bad_input(tmp_path, capsys):
    scene = tmp_path / "one.yaml"
    scene.write_text(yaml.safe_dump({"sensor": {"noise": 0.0, "jpeg_quality": 95},
                                     "parts": [{"class": "green", "x_mm": 220, "y_mm": 40}]}))
    assert main(["render", str(SAMPLE_CELL), "--scene", str(scene), "--out", str(tmp_path / "out")]) == 0
    truth = yaml.safe_load((tmp_path / "out" / "one.truth.yaml").read_text())
    assert truth["parts"][0]["centre_mm"] == [220.0, 40.0]
    assert (tmp_path / "out" / "one.jpg").stat().st_size > 10_000
    scene.write_text("parts: [{class: red, x_mm: 1, y_mm: 2, colour: blue}]\n")
    assert main(["render", str(SAMPLE_CELL), "--scene", str(scene), "--out", str(tmp_path / "out")]) == 2
    assert "parts.0.colour: unknown key" in capsys.readouterr().err
    scene.write_text("parts: [{class: purple, x_mm: 1, y_mm: 2}]\n")
    assert main(["render", str(SAMPLE_CELL), "--scene", str(scene), "--out", str(tmp_path / "out")]) == 1
    assert "class 'purple' is not in the cell; give lab, size_mm and height_mm" in capsys.readouterr().err


def test_aruco_dictionary_names():
    assert aruco_dictionary("aruco_4x4_50").bytesList.shape[0] == 50
    assert aruco_dictionary("apriltag_36h11").bytesList.shape[0] == 587
    assert aruco_dictionary("aruco_original").bytesList.shape[0] == 1024


def test_table_texture_has_no_part_colours(sample_cell):
    """The bench texture must stay far from every class colour (no false parts on it)."""
    r = render_scene(sample_cell, Scene(sensor=SensorSpec(noise=2.0), lighting=LightingSpec(shadow=0.0)))
    image = r.image_bgr[300:700, 300:1000, ::-1].reshape(-1, 3) / 255.0
    lab = lab_from_srgb(image[::7])
    chroma = np.hypot(lab[:, 1], lab[:, 2])
    assert np.percentile(chroma, 99.9) < 20
    assert all(np.linalg.norm(lab - np.asarray(c.lab), axis=1).min() > 25 for c in sample_cell.parts.values())
