"""Marker geometry and plane polygons against outside references: OpenCV's convex hull and convex-polygon
intersection, and a pinhole camera projecting through OpenCV (cv2.projectPoints) for where a raised
marker's stand appears on the table."""

from __future__ import annotations

import cv2
import numpy as np
import pytest

from gripsight.app.cellfile import parse_cell
from gripsight.vision.camera import Camera
from gripsight.vision.homography import apply_homography, fit_homography_dlt
from gripsight.vision.markergeom import marker_paper_corners_mm, seen_on_table_mm, stand_outline_mm, stands_in_front
from gripsight.vision.polygon import convex_hull, convex_overlap, polygon_area
from gripsight.vision.synth.scene import CameraSpec, make_camera
from tests.conftest import sample_cell_data


@pytest.mark.parametrize("seed", [0, 1, 2, 3])
def test_hull_area_and_overlap_agree_with_opencv(seed):
    rng = np.random.default_rng(seed)
    a = rng.uniform(-50, 50, (9, 2))
    b = rng.uniform(-50, 50, (7, 2)) + rng.uniform(-30, 30, 2)
    hull = convex_hull(a)
    theirs = cv2.convexHull(a.astype(np.float32)).reshape(-1, 2)         # OpenCV's hull (Sklansky)
    assert len(hull) == len(theirs)
    assert polygon_area(hull) == pytest.approx(cv2.contourArea(theirs), rel=1e-5)
    area, _ = cv2.intersectConvexConvex(convex_hull(a).astype(np.float32), convex_hull(b).astype(np.float32))
    assert polygon_area(convex_overlap(a, b)) == pytest.approx(area, rel=1e-4, abs=1e-3)


def test_apart_polygons_do_not_overlap_and_a_square_in_a_square_is_itself():
    square = np.array([[0, 0], [10, 0], [10, 10], [0, 10]], float)
    assert convex_overlap(square, square + 20).shape == (0, 2)
    inner = 0.5 * square + 2.5
    assert polygon_area(convex_overlap(square, inner)) == pytest.approx(25.0)
    assert polygon_area(convex_overlap(square, square + [5.0, 0.0])) == pytest.approx(50.0)


def test_a_raised_point_is_seen_where_the_camera_puts_it_on_the_table():
    """seen_on_table_mm against a pinhole through cv2.projectPoints (the renderer's camera) and the table
    homography fitted to table points it projects: the raised marker's top corners land where the camera
    says."""
    cell = parse_cell(sample_cell_data())
    cam = make_camera(CameraSpec(tilt_deg=2.0, tilt_azimuth_deg=40.0, k1=0.0, k2=0.0), cell)
    grid = np.array([[x, y, 0.0] for x in (0, 200, 400) for y in (-250, 0, 250)])
    H_table_from_pixel = fit_homography_dlt(cam.project(grid), grid[:, :2])
    top = marker_paper_corners_mm(cell.markers.layout[9], 60.0)
    via_camera = apply_homography(H_table_from_pixel, cam.project(top))
    np.testing.assert_allclose(seen_on_table_mm(top, cam.centre_mm), via_camera, atol=1e-6)
    with pytest.raises(ValueError, match="camera_centre_mm: the camera"):
        seen_on_table_mm(top, [200.0, 0.0, 50.0])


def test_the_stand_of_the_demo_riser_covers_marker_3_only_with_60_mm_markers():
    """The demo layout (made for 40 mm markers) with a camera 760 mm above the markers' middle: with 60 mm
    markers the riser's 80 mm box stands in front of marker 3's black square. By hand: the box's near top
    edge y = 210 mm at z = 60 is seen at 210 * 760 / 700 = 228 mm; marker 3's square starts at 255 - 30 =
    225 mm, a 3 mm strip of its 60 mm side (5 %)."""
    layout = parse_cell(sample_cell_data()).markers.layout
    centre = [202.5, 0.0, 760.0]
    assert stands_in_front(layout, 40.0, 10.0, centre) == []
    (o,) = stands_in_front(layout, 60.0, 10.0, centre)
    assert (o.marker_id, o.stand_id) == (3, 9)
    assert o.square_fraction == pytest.approx(3.0 / 60.0, abs=0.002)
    outline = stand_outline_mm(layout[9], 80.0, centre)
    assert outline[:, 1].max() == pytest.approx(210 * 760 / 700)
    assert stands_in_front(layout, 60.0, 10.0, [202.5, 0.0, 50.0]) == []      # a camera below the riser sees nothing
