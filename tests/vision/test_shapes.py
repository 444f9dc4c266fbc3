"""Classes by colour and shape: colour groups, and blobs of one colour told apart by their outline."""

from __future__ import annotations

import copy
from types import SimpleNamespace

import cv2
import numpy as np
import pytest

from gripsight.app.cellfile import parse_cell
from gripsight.app.pipeline import targets_from_detection
from gripsight.planning.picks import Planner
from gripsight.vision.colour import delta_e_2000
from gripsight.vision.shapes import colour_groups
from gripsight.vision.synth.render import encode_photo, render_scene
from gripsight.vision.synth.scene import CameraSpec, LightingSpec, Scene, ScenePart, SensorSpec, random_scene
from tests.conftest import sample_cell_data
from tests.vision.evaluation import Score, detect_with_own_calibration, score


def _two_shape_cell(extra: dict | None = None):
    """The demo cell with a second red class: a 30 mm disc 14 mm high of the red cube's colour."""
    data = copy.deepcopy(sample_cell_data())
    red = data["parts"]["red"]
    data["parts"]["red_disc"] = {"lab": list(red["lab"]), "tolerance": red["tolerance"], "height_mm": 14,
                                 "shape": "cylinder", "footprint_mm": [30]}
    data["bins"]["red_disc"] = {"x": 150, "y": 240}
    data["parts"].update(extra or {})
    return parse_cell(data)


def test_colour_groups_join_classes_of_one_colour_only():
    demo = parse_cell(sample_cell_data())
    assert [g.members for g in colour_groups(demo.parts).values()] == [("red",), ("blue",), ("green",), ("yellow",)]
    # CIEDE2000 from red: 5.98 (under half its tolerance of 20: one colour) and 21.72 (another colour; 15.61
    # from the near one), as colour-science computes them (colour.delta_E, method 'CIE 2000')
    near, far = [52, 60, 42], [70, 60, 42]
    assert float(delta_e_2000(np.array([46.0, 60, 42]), np.array(near, float))) == pytest.approx(5.98042, abs=1e-4)
    assert float(delta_e_2000(np.array([46.0, 60, 42]), np.array(far, float))) == pytest.approx(21.72448, abs=1e-4)
    classes = dict(_two_shape_cell().parts)
    classes["red_near"] = SimpleNamespace(lab=near, tolerance=20.0)
    classes["red_far"] = SimpleNamespace(lab=far, tolerance=20.0)
    groups = colour_groups(classes)
    assert groups["red+red_disc+red_near"].members == ("red", "red_disc", "red_near")
    assert groups["red_far"].members == ("red_far",)


def _photo(cell, scene):
    r = render_scene(cell, scene)
    image = cv2.imdecode(np.frombuffer(encode_photo(r.image_bgr, ".jpg", scene.sensor.jpeg_quality), np.uint8), 1)
    return image, r.truth


def test_cube_and_disc_of_one_colour_go_to_their_own_classes():
    cell = _two_shape_cell()
    rng = np.random.default_rng(1501)
    total = Score()
    for i in range(5):
        cam = CameraSpec(tilt_deg=float(rng.uniform(0, 2.5)), tilt_azimuth_deg=float(rng.uniform(0, 360)),
                         centre_mm=[float(rng.uniform(185, 220)), float(rng.uniform(-15, 15)), float(rng.uniform(700, 800))])
        light = LightingSpec(light_azimuth_deg=float(rng.uniform(0, 360)), light_elevation_deg=float(rng.uniform(45, 80)))
        scene = random_scene(cell, rng, n_parts=(6, 9), touching=i % 2 == 1, camera=cam, lighting=light,
                             sensor=SensorSpec(noise=1.5, jpeg_quality=90))
        image, truth = _photo(cell, scene)
        detection, _ = detect_with_own_calibration(image, cell)
        total = total.add(score(detection.parts, truth, cell.work_area))
    reds = sum(p.class_name in ("red", "red_disc") for p in scene.parts)
    assert reds >= 1
    # a part counts only with its right class (tests.vision.evaluation): a disc taken for a cube is a miss
    assert total.recall >= 0.98 and total.false_parts == 0
    assert total.rms_mm <= 0.5


def test_a_part_of_a_class_colour_and_no_class_shape_is_rejected():
    cell = _two_shape_cell()
    red = list(cell.parts["red"].lab)
    parts = [ScenePart.model_validate(p) for p in (
        {"id": "cube", "class": "red", "x_mm": 150, "y_mm": -60, "yaw_deg": 20},
        {"id": "disc", "class": "red_disc", "x_mm": 250, "y_mm": -60},
        {"id": "odd", "class": "odd", "lab": red, "shape": "box", "size_mm": [36, 12], "height_mm": 14,
         "x_mm": 200, "y_mm": 70, "yaw_deg": 30})]
    image, _ = _photo(cell, Scene(camera=CameraSpec(centre_mm=[200, 0, 760]), parts=parts))
    detection, _ = detect_with_own_calibration(image, cell)
    by_place = {(round(p.xy_mm[0] / 10), round(p.xy_mm[1] / 10)): p for p in detection.parts}
    assert by_place[(15, -6)].class_name == "red" and by_place[(15, -6)].status == "ok"
    assert by_place[(25, -6)].class_name == "red_disc" and by_place[(25, -6)].status == "ok"
    odd = by_place[(20, 7)]
    assert (odd.class_name, odd.status) == ("unknown", "unknown_shape")
    assert "red, red_disc" in odd.reason
    target = next(t for t in targets_from_detection(detection, cell) if t.id == odd.id)
    assert Planner(cell).bin_for(target) == "reject"


def test_class_colours_weigh_lightness_half():
    # CIEDE2000 with kL = 2: colour-science's delta_E(method="CIE 2000", textiles=True) gives 6.99528 for
    # this pair (13.76636 with kL = 1): a part in shade, 16 darker, stays within a tolerance of 12
    from gripsight.vision.pixelclass import class_distance

    lab, ref = np.array([30.0, 55, 40]), np.array([46.0, 60, 42])
    assert float(class_distance(lab, ref)) == pytest.approx(6.99528, abs=1e-4)
    assert float(delta_e_2000(lab, ref)) == pytest.approx(13.76636, abs=1e-4)


def _odd_red(cell, size_mm, shape="cylinder", height_mm=14, at=(200, 40)):
    """A red part of no class's shape at ``at`` (our renderer), and what detection makes of it."""
    parts = [ScenePart.model_validate({"id": "odd", "class": "odd", "lab": list(cell.parts["red"].lab), "shape": shape,
                                       "size_mm": size_mm, "height_mm": height_mm, "x_mm": at[0], "y_mm": at[1],
                                       "yaw_deg": 20})]
    image, _ = _photo(cell, Scene(camera=CameraSpec(centre_mm=[200, 0, 760]), parts=parts))
    detection, _ = detect_with_own_calibration(image, cell)
    return detection


@pytest.mark.parametrize("two_classes", [True, False], ids=["red_cube+red_disc", "red_cube_only"])
@pytest.mark.parametrize("size_mm, shape", [([44], "cylinder"), ([40, 30], "box")], ids=["disc44", "box40x30"])
def test_a_large_blob_of_a_class_colour_is_split_only_when_its_outline_is_parts_of_the_class(two_classes, size_mm, shape):
    # before: split by area alone, a 44 mm disc became 3 red cubes (or 2 red discs), a 40 x 30 box 2 red cubes
    cell = _two_shape_cell() if two_classes else parse_cell(sample_cell_data())
    detection = _odd_red(cell, size_mm, shape)
    assert len(detection.parts) == 1
    (odd,) = detection.parts
    assert (odd.class_name, odd.status) == ("unknown", "unknown_shape")
    assert ("red, red_disc" if two_classes else "colour of red but") in odd.reason
    assert "nor of touching parts" in odd.reason
    length, width = sorted(size_mm * (2 if len(size_mm) == 1 else 1), reverse=True)
    assert odd.length_mm == pytest.approx(length, abs=1.5) and odd.width_mm == pytest.approx(width, abs=1.5)
    assert f"its outline measures {odd.length_mm:.0f} x {odd.width_mm:.0f} mm" in odd.reason
    assert np.hypot(odd.xy_mm[0] - 200, odd.xy_mm[1] - 40) < 1.5
    target = next(iter(targets_from_detection(detection, cell)))
    assert Planner(cell).bin_for(target) == "reject"


def test_a_60_mm_disc_of_a_class_colour_is_too_large_and_stays():
    detection = _odd_red(parse_cell(sample_cell_data()), [60])
    (odd,) = detection.parts
    # its area (2785 mm² as top face, pi 30² = 2827 mm² true) is over 3 typical parts (3 x 595 mm²): not a part
    assert (odd.class_name, odd.status) == ("unknown", "too_large")
    assert odd.reason.startswith("a coloured region of 27") and odd.reason.endswith("mm², not a part")


@pytest.mark.parametrize("placed", [
    # an L of three touching cubes, and two touching discs with a cube beside one of them
    [("red", 150, -60), ("red", 172.1, -60), ("red", 150, -37.9),
     ("red_disc", 230, 50), ("red_disc", 260.1, 50), ("red", 256.1, 76.1)],
    # a disc, a cube and a disc in a row: as long as four cubes (82 mm), which the row rule alone took it for
    [("red_disc", 230, 50), ("red", 256.1, 50), ("red_disc", 282.2, 50), ("red", 150, -60), ("red", 150, -37.9)],
], ids=["L_and_discs", "disc_cube_disc_row"])
def test_touching_parts_of_one_colour_are_still_split_into_their_classes(placed):
    cell = _two_shape_cell()
    parts = [ScenePart.model_validate({"id": f"t{i}", "class": c, "x_mm": x, "y_mm": y})
             for i, (c, x, y) in enumerate(placed)]
    image, truth = _photo(cell, Scene(camera=CameraSpec(centre_mm=[200, 0, 760]), parts=parts))
    detection, _ = detect_with_own_calibration(image, cell)
    found = sorted((p.class_name, round(p.xy_mm[0]), round(p.xy_mm[1])) for p in detection.parts if p.status == "ok")
    assert [f[0] for f in found] == sorted(c for c, _, _ in placed)
    s = score(detection.parts, truth, cell.work_area)
    assert s.recall == 1.0 and s.false_parts == 0 and s.rms_mm <= 0.6


def test_unknown_shape_and_its_reason_reach_detect_json_and_plan_json():
    from gripsight.app.export import plan_to_dict

    cell = _two_shape_cell()
    detection = _odd_red(cell, [44])
    (odd,) = [p.as_dict() for p in detection.parts]
    assert (odd["class"], odd["status"]) == ("unknown", "unknown_shape")
    assert odd["reason"].startswith("colour of red, red_disc but the shape or size of none, nor of touching parts")
    assert 42.5 <= odd["length_mm"] <= 45.5
    plan = plan_to_dict(Planner(cell).plan(targets_from_detection(detection, cell)), cell)
    (part,) = plan["parts"]
    assert (part["class"], part["known_class"], part["photo_status"]) == ("unknown", False, "unknown_shape")
    assert part["photo_detail"] == odd["reason"]
    # bound for the reject bin, then refused for grip fit: the demo gripper opens 40 mm less a 2 mm margin, and a part
    # measured 44 x 43 mm (taken as a box, its yaw the outline's rectangle's: any for a disc) is between its width
    # and its diagonal (62 mm) across the jaws
    assert (part["bin"], part["status"], part["rejection"]["check"]) == ("reject", "rejected", "grip_fit")
    assert 42.5 <= part["rejection"]["value"] <= 63.0 and part["rejection"]["limit"] == 38.0


def test_report_shows_why_a_part_went_to_the_reject_bin(tmp_path):
    from gripsight.app.report import write_report

    cell = _two_shape_cell()
    reason = "colour of red, red_disc but the shape or size of none, nor of touching parts of them (its outline measures 44 x 43 mm)"
    row = {"photo": "a.jpg", "status": "ok", "error": "", "found": {"red": 1, "unknown": 1}, "planned": 1,
           "rejected": {}, "cycle_s": 4.0, "truth": None, "thumbnail": "", "warnings": [],
           "unknown": [f"p2 unknown_shape: {reason}"]}
    totals = {"photos": 1, "planned": 1, "parts": 2, "rejected": {}, "refused": 0, "errors": 0, "cycle_s": 4.0}
    write_report(tmp_path / "report.html", [row], totals, cell)
    page = (tmp_path / "report.html").read_text()
    assert f'<td class="num">1<br><span class="muted">p2 unknown_shape: {reason}</span></td>' in page
    old = dict(row)
    del old["unknown"]                          # a row written before (batch --resume): the count alone
    write_report(tmp_path / "report.html", [old], totals, cell)
    # red_disc 0, unknown 1, planned 1
    assert '<td class="num">0</td><td class="num">1</td><td class="num">1</td>' in (tmp_path / "report.html").read_text()


def test_silhouette_and_overlap_of_fitted_top_faces():
    from gripsight.vision.topface import beyond_silhouette_mm, top_faces_overlap

    cube = SimpleNamespace(shape="box", length_width_mm=(20.0, 20.0))
    disc = SimpleNamespace(shape="cylinder", length_width_mm=(30.0, 30.0))
    # a 20 mm box's top face at (100, 0), scale k = 1.1, seen from a nadir at the origin: the footprint is the
    # 20 mm box at (100 / 1.1, 0) = (90.909, 0); the silhouette is the hull of both (homothetic squares)
    fit = (np.array([100.0, 0.0]), np.array([1.0, 0.0]), 1.1)
    pts = np.array([[111.0, 0.0], [112.0, 0.0], [100.0, 13.0], [80.909, 0.0], [79.0, 0.0], [95.0, 10.5]])
    # 111: on the top face's edge (100 + 11); 112: 1 mm out; (100, 13): 2 mm past the top face's side (11);
    # 80.909: the footprint's far edge (90.909 - 10); 79: 1.909 mm past it; (95, 10.5): inside the hull
    assert beyond_silhouette_mm(pts, fit, np.zeros(2), 1.1, cube) == pytest.approx([0, 1, 2, 0, 1.909, 0], abs=1e-3)
    # two 20 mm faces 20 mm apart meet along an edge: no overlap; 10 mm apart: the 9 x 9 inner grid (-8 .. 8 mm)
    # has the columns at 2, 4, 6, 8 mm (from the near edge: x > 0 in the other's) inside: 4 of 9 columns
    a = (np.array([0.0, 0.0]), np.array([1.0, 0.0]), 1.0)
    assert top_faces_overlap([(a, cube), ((np.array([20.0, 0.0]), a[1], 1.0), cube)]) == 0.0
    assert top_faces_overlap([(a, cube), ((np.array([10.0, 0.0]), a[1], 1.0), cube)]) == pytest.approx(4 / 9)
    # a disc of radius 15 touching a cube's face: none of either inside the other
    assert top_faces_overlap([(a, cube), ((np.array([25.0, 0.0]), a[1], 1.0), disc)]) == 0.0
