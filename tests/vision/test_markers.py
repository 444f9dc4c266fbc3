"""Marker detection on sheets of many markers, on ChArUco-like boards and on small blurred markers,
against the exact corners of test photos made outside the product's renderer (tests/vision/markersheet.py)
and against OpenCV's own ArUco detector with sub-pixel corners (the outside reference)."""

from __future__ import annotations

import cv2
import numpy as np
import pytest

from gripsight.vision.markerdict import DICTIONARY_NAMES, MarkerDictionaryError, aruco_dictionary, dictionary_size
from gripsight.vision.markeredges import sample_image
from gripsight.vision.markers import detect_markers
from tests.vision.markersheet import sheet_photo


def _opencv_subpixel(image_bgr, dictionary=cv2.aruco.DICT_4X4_50) -> dict:
    """OpenCV's ArucoDetector, default parameters plus its CORNER_REFINE_SUBPIX (the outside reference)."""
    params = cv2.aruco.DetectorParameters()
    params.cornerRefinementMethod = cv2.aruco.CORNER_REFINE_SUBPIX
    det = cv2.aruco.ArucoDetector(cv2.aruco.getPredefinedDictionary(dictionary), params)
    corners, ids, _ = det.detectMarkers(cv2.cvtColor(image_bgr, cv2.COLOR_BGR2GRAY))
    return {} if ids is None else {int(i): c.reshape(4, 2) for i, c in zip(ids.ravel(), corners)}


def test_sample_image_takes_more_points_than_one_remap_row():
    """cv2.remap refuses maps 32767 or more wide; 100 000 points are read in rows. Bilinear values of a
    linear ramp are exact (OpenCV's INTER_LINEAR: the ramp's own value at the point)."""
    ramp = np.tile(np.arange(200, dtype=np.float32), (100, 1))
    rng = np.random.default_rng(0)
    x, y = rng.uniform(0, 199, 100_000), rng.uniform(0, 99, 100_000)
    assert np.abs(sample_image(ramp, x, y) - x).max() < 0.01


def test_fifty_markers_on_one_sheet_all_found_and_refined():
    """Issue 19 target: 50 markers in one photo, all found and refined (before: OpenCV's remap assertion
    on a map wider than 32 767). Corners within 0.25 px RMS of the truth."""
    sheet = sheet_photo(np.random.default_rng(1), range(50), 60, tilt=0.03)
    found = {d.id: d for d in detect_markers(sheet.image_bgr, "aruco_4x4_50")}
    assert sorted(found) == list(range(50))
    assert all(d.refined for d in found.values())
    err = np.concatenate([found[i].corners_px - c for i, c in sheet.corners_px.items()])
    assert np.sqrt((err ** 2).sum(axis=1).mean()) < 0.25


def test_charuco_like_board_of_twenty_markers():
    """A ChArUco-like board (markers in the white squares, the black squares touching their quiet zones
    at the corners): 20 markers, every one OpenCV finds is found by us too, refined, and closer to the
    truth than OpenCV's sub-pixel corners."""
    sheet = sheet_photo(np.random.default_rng(2), range(20), 40, board=True, quiet_cells=1.0, blur_px=0.6)
    ours = {d.id: d for d in detect_markers(sheet.image_bgr, "aruco_4x4_50")}
    reference = _opencv_subpixel(sheet.image_bgr)
    assert len(reference) >= 17 and set(reference) <= set(ours)
    assert all(ours[i].refined for i in reference)
    e_ours = np.concatenate([ours[i].corners_px - sheet.corners_px[i] for i in reference])
    e_ref = np.concatenate([reference[i] - sheet.corners_px[i] for i in reference])
    rms = lambda e: float(np.sqrt((e ** 2).sum(axis=1).mean()))    # noqa: E731
    assert rms(e_ours) < 0.2 < rms(e_ref)


@pytest.mark.parametrize("marker_px, blur_px", [(16, 0.4), (16, 0.8), (20, 0.8), (25, 0.8), (30, 0.6)])
def test_small_markers_refined_to_a_third_of_a_pixel(marker_px, blur_px):
    """Issue 19 target: markers 16-30 px across refined to <= 0.3 px RMS from the truth; the comparison
    is OpenCV's sub-pixel corners on the same photos (measured about 0.65-1.0 px there, inward: cornerSubPix
    is made for chessboard saddles). Of the markers OpenCV finds we keep at least 85 % (at 16 px and blur
    0.8 px OpenCV's own quadrilateral is sometimes 2 px off and the cells do not read back there) and
    refine all but one of those."""
    rng = np.random.default_rng(marker_px * 10 + int(blur_px * 10))
    sheet = sheet_photo(rng, range(30), marker_px, blur_px=blur_px, noise=2.0, tilt=0.02)
    ours = {d.id: d for d in detect_markers(sheet.image_bgr, "aruco_4x4_50")}
    reference = _opencv_subpixel(sheet.image_bgr)
    both = [i for i in reference if i in ours]
    assert len(reference) >= 8 and len(both) >= 0.85 * len(reference) and set(ours) <= set(sheet.corners_px)
    refined = [i for i in both if ours[i].refined]
    assert len(refined) >= len(both) - 1
    e_ours = np.concatenate([ours[i].corners_px - sheet.corners_px[i] for i in refined])
    e_ref = np.concatenate([reference[i] - sheet.corners_px[i] for i in refined])
    rms_ours = float(np.sqrt((e_ours ** 2).sum(axis=1).mean()))
    rms_ref = float(np.sqrt((e_ref ** 2).sum(axis=1).mean()))
    assert rms_ours <= 0.3
    assert rms_ours < 0.5 * rms_ref


def test_every_opencv_dictionary_by_name():
    """Every predefined dictionary of OpenCV (cv2.aruco.DICT_*, the outside reference) has a name, and
    the written-out sizes are OpenCV's."""
    opencv = {int(getattr(cv2.aruco, n)) for n in dir(cv2.aruco) if n.startswith("DICT_")}
    ours = set()
    for name in DICTIONARY_NAMES:
        d = aruco_dictionary(name)
        assert dictionary_size(name) == d.bytesList.shape[0]
        ours.add(next(int(getattr(cv2.aruco, n)) for n in dir(cv2.aruco) if n.startswith("DICT_")
                      and cv2.aruco.getPredefinedDictionary(getattr(cv2.aruco, n)).bytesList.tobytes() == d.bytesList.tobytes()))
    assert ours == opencv
    assert "aruco_mip_36h12" in DICTIONARY_NAMES and "aruco_7x7_1000" in DICTIONARY_NAMES


def test_unknown_dictionary_is_a_one_line_error_listing_the_names():
    with pytest.raises(MarkerDictionaryError) as err:
        aruco_dictionary("aruco_4x4_60")
    message = str(err.value)
    assert "\n" not in message and "'aruco_4x4_60'" in message and "apriltag_36h11" in message


@pytest.mark.parametrize("name, opencv_name", [("aruco_mip_36h12", cv2.aruco.DICT_ARUCO_MIP_36h12),
                                               ("aruco_7x7_50", cv2.aruco.DICT_7X7_50)])
def test_markers_of_other_dictionaries_found(name, opencv_name):
    """The dictionaries the cell schema lacked before (issue 19: aruco_mip_36h12 raised AttributeError)."""
    sheet = sheet_photo(np.random.default_rng(3), [0, 5, 17], 90, dictionary=opencv_name)
    found = {d.id: d for d in detect_markers(sheet.image_bgr, name)}
    assert sorted(found) == [0, 5, 17] and all(d.refined for d in found.values())


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_busy_surfaces_give_no_false_markers_and_lose_no_true_ones(sample_cell, seed):
    """Issue 19: random renders on a cutting mat, printed text and a chequered cloth (one each), with
    noise and blur: no false marker, every marker whose paper is wholly in the photo found at its true
    place (the render's truth, from cv2.projectPoints). The 100-render run is tests/bench/bench_busy_markers.py."""
    from tests.vision.busy import score

    result = score(sample_cell, seed)
    assert result.false_found == 0
    assert result.true_found == result.true_expected == 9


def test_false_candidate_refused_by_its_quiet_zone():
    """A marker pattern printed on a dark cell of a grid (a cutting-mat cell ringed by a thin pale line,
    then the next dark cell) decodes in OpenCV (the outside reference, default parameters) but has no
    paper quiet zone: refused. The same marker on paper is kept."""
    rng = np.random.default_rng(7)
    mat = np.full((960, 1280), 0.05, np.float32)
    mat[::30, :] = mat[:, ::30] = 0.7                      # pale grid lines every 30 px of the mat
    on_mat = sheet_photo(rng, [17], 80, quiet_cells=0.15, background=mat)
    on_paper = sheet_photo(rng, [17], 80)
    assert 17 in _opencv_subpixel(on_mat.image_bgr)
    assert detect_markers(on_mat.image_bgr, "aruco_4x4_50") == []
    assert [d.id for d in detect_markers(on_paper.image_bgr, "aruco_4x4_50")] == [17]


def test_marker_grouped_with_its_paper_outline_is_found(sample_cell):
    """Busy render 18: marker 9's paper outline is within OpenCV's minMarkerDistanceRate 0.125 of its
    black square (a 1.5-cell quiet zone on a darker mat); OpenCV (the outside reference, default
    parameters) groups the two and loses the marker. Ours keeps the outline apart (rate 0.05) and finds
    it within 0.5 px of the render's truth."""
    from tests.vision.busy import busy_render

    _, image, rendered = busy_render(sample_cell, 18)
    truth = {m["id"]: np.array(m["corners_px"]) for m in rendered.truth["markers"]}
    assert 9 not in _opencv_subpixel(image)
    found = {d.id: d for d in detect_markers(image, "aruco_4x4_50")}
    assert sorted(found) == sorted(truth) and np.abs(found[9].corners_px - truth[9]).max() < 0.5


def test_second_look_finds_layout_markers_the_first_search_missed(sample_cell, monkeypatch):
    """With a first search that loses marker 9 of busy render 18 (the settings before this fix: outline
    accuracy 0.05, OpenCV's grouping rate 0.125), the layout's ids asked for bring it back within 0.5 px
    of the truth: searched again over the whole photo, and in a window around its calibrated place when
    the markers cannot all be tracked (marker 3 covered). Without the ids nothing is searched again."""
    from gripsight.vision import markers
    from tests.vision.busy import busy_render

    params = cv2.aruco.DetectorParameters()
    params.polygonalApproxAccuracyRate = 0.05
    old = cv2.aruco.ArucoDetector(cv2.aruco.getPredefinedDictionary(cv2.aruco.DICT_4X4_50), params)
    monkeypatch.setattr(markers, "_detector", lambda name: old)
    _, image, rendered = busy_render(sample_cell, 18)
    truth = {m["id"]: np.array(m["corners_px"]) for m in rendered.truth["markers"]}
    layout = sample_cell.markers.layout
    assert 9 not in {d.id for d in detect_markers(image, "aruco_4x4_50")}
    found = {d.id: d for d in detect_markers(image, "aruco_4x4_50", search_ids=layout)}
    assert sorted(found) == sorted(truth) and np.abs(found[9].corners_px - truth[9]).max() < 0.5
    covered = image.copy()
    x0, y0 = (truth[3].min(axis=0) - 25).astype(int)
    x1, y1 = (truth[3].max(axis=0) + 25).astype(int)
    covered[y0:y1, x0:x1] = (90, 120, 60)
    tracked = {d.id: d for d in detect_markers(covered, "aruco_4x4_50", expected=truth, search_ids=layout)}
    assert sorted(tracked) == sorted(set(truth) - {3}) and np.abs(tracked[9].corners_px - truth[9]).max() < 0.5


def test_cell_sample_points_agree_with_opencv_perspective_transform():
    """The evidence reads each candidate's cells through the projective map of its corners, computed for
    all candidates at once in closed form; OpenCV's getPerspectiveTransform + perspectiveTransform on the
    same quadrilaterals is the reference (agree to 1e-3 px)."""
    from gripsight.vision.markercheck import _square_to_quads

    rng = np.random.default_rng(3)
    square = np.array([[0, 0], [1, 0], [1, 1], [0, 1]], float)
    quads = 40 + 200 * square[None] + rng.uniform(-30, 30, (20, 4, 2))
    uv = rng.uniform(-0.2, 1.2, (50, 2))
    ours = _square_to_quads(uv, quads)
    for q, o in zip(quads, ours):
        H = cv2.getPerspectiveTransform(np.float32(square), np.float32(q))
        ref = cv2.perspectiveTransform(uv[None].astype(np.float64), H)[0]
        assert np.abs(o - ref).max() < 1e-3


def test_marker_half_in_a_hard_shadow_is_found(sample_cell):
    """The raised marker's box throws a hard shadow (light 25 degrees up, 0.8 dark, 0.3 mm blur) over
    half of marker 2's paper: its quiet zone there is paper in a fifth of the light, under the whole
    marker's ink-to-white halfway, so 0.75 of its ring read as paper and it was refused. In the light of
    the ink beside each ring sample it is paper. Corners against the render truth (cv2.projectPoints)."""
    from gripsight.vision.synth.render import render_scene
    from gripsight.vision.synth.scene import LightingSpec, Scene

    lighting = LightingSpec(light_elevation_deg=25.0, shadow=0.8, shadow_blur_mm=0.3, ambient=0.15)
    r = render_scene(sample_cell, Scene(lighting=lighting))
    truth = {m["id"]: np.array(m["corners_px"]) for m in r.truth["markers"]}
    found = {d.id: d.corners_px for d in detect_markers(r.image_bgr, sample_cell.markers.dictionary)}
    assert 2 in _opencv_subpixel(r.image_bgr)              # OpenCV decodes it (the outside reference)
    assert sorted(found) == sorted(truth)
    assert np.abs(found[2] - truth[2]).max() < 0.3
