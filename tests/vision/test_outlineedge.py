"""Outlines moved onto the photo's edges (vision/outlineedge.py).

Reference: the exact area a circle covers in each pixel (supersampled 16 x 16), i.e. the image a
camera integrating over its pixels would give, against the analytic circle; what the colour threshold
alone gives (the boundary pixels' centres, half a pixel inside) is the comparison.
"""

import cv2
import numpy as np
import pytest

from gripsight.vision import outlineedge
from gripsight.vision.outlineedge import edge_outlines_px

_SS = 16


def _coverage(shape_hw, centre_px, radius_px) -> np.ndarray:
    """Fraction (H, W) of each pixel inside the circle (pixel centres at integers, 16 x 16 samples)."""
    h, w = shape_hw
    s = (np.arange(_SS) + 0.5) / _SS - 0.5
    y = np.arange(h)[:, None, None, None] + s[None, None, :, None]
    x = np.arange(w)[None, :, None, None] + s[None, None, None, :]
    return (((x - centre_px[0]) ** 2 + (y - centre_px[1]) ** 2) <= radius_px ** 2).mean(axis=(2, 3))


def _photo(coverage, part_bgr, left_bgr, right_bgr):
    """A part over a background that is dark (a shadow) left of x = 40 and bright right of it, mixed by
    coverage in the 8-bit codes, then blurred a little."""
    h, w = coverage.shape
    back = np.where(np.arange(w)[None, :, None] < 40, np.array(left_bgr, float), np.array(right_bgr, float))
    back = np.broadcast_to(back, (h, w, 3))
    img = coverage[..., None] * np.array(part_bgr, float) + (1 - coverage[..., None]) * back
    return np.clip(cv2.GaussianBlur(img, (0, 0), 0.6) + 0.5, 0, 255).astype(np.uint8)


def _outline(img, part_bgr):
    mask = (np.abs(img.astype(int) - part_bgr).sum(axis=2) < 60).astype(np.uint8)
    contours, _ = cv2.findContours(mask, cv2.RETR_EXTERNAL, cv2.CHAIN_APPROX_NONE)
    return max(contours, key=cv2.contourArea).reshape(-1, 2).astype(float)


@pytest.mark.parametrize("centre", [(40.3, 41.7), (39.6, 40.2)])
def test_outline_lands_on_the_circle_on_dark_and_bright_backgrounds(centre):
    r = 14.0
    part, shadow, wood = (40, 160, 60), (25, 30, 35), (150, 190, 215)
    img = _photo(_coverage((82, 82), centre, r), part, shadow, wood)
    mask_outline = _outline(img, part)
    refined = edge_outlines_px(img, [mask_outline])[0][0]
    d_mask = np.hypot(*(mask_outline - centre).T) - r
    d_edge = np.hypot(*(refined - centre).T) - r
    # the mask's outline: inside by about half a pixel and more on one side than the other
    assert d_mask.mean() < -0.3
    # on the edges: within 0.1 px on average, 0.25 px RMS, the dark half and the bright half alike
    assert abs(d_edge.mean()) <= 0.1
    assert np.sqrt((d_edge ** 2).mean()) <= 0.25
    dark = refined[:, 0] < centre[0] - 3
    bright = refined[:, 0] > centre[0] + 3
    assert abs(d_edge[dark].mean() - d_edge[bright].mean()) <= 0.1
    # the fitted centre (mean of the points of a circle) within 0.05 px
    fit = cv2.fitEllipse(refined.astype(np.float32))
    assert np.hypot(fit[0][0] - centre[0], fit[0][1] - centre[1]) <= 0.05
    # the mask's own outline leans toward the dark side: its centre 0.15-0.24 px off (measured)
    leaning = cv2.fitEllipse(mask_outline.astype(np.float32))
    assert np.hypot(leaning[0][0] - centre[0], leaning[0][1] - centre[1]) >= 0.1


def test_points_without_a_clear_step_keep_the_pixel_boundary():
    """A part barely different from its background: the outline moves half a pixel out, no more."""
    img = np.full((60, 60, 3), 120, np.uint8)
    img[20:40, 20:40] = 126
    square = np.array([(x, 20) for x in range(20, 40)] + [(39, y) for y in range(20, 40)]
                      + [(x, 39) for x in range(39, 19, -1)] + [(20, y) for y in range(39, 19, -1)], float)
    refined = edge_outlines_px(img, [square])[0][0]
    moved = np.hypot(*(refined - square).T)
    np.testing.assert_allclose(moved, 0.5, atol=1e-6)


def test_a_shadow_across_the_top_face_is_not_taken_for_its_edge():
    """The right third of a green square lies in a neighbour's shadow (the same green at a third of the
    light) and the mask stops at the shadow: those points are flagged as a shading step; the square's
    real edges against wood and against a red neighbour are not."""
    img = np.zeros((60, 80, 3), np.uint8)
    img[:] = (150, 190, 215)                                   # wood
    img[10:50, 10:50] = (40, 160, 60)                          # lit top face
    img[10:50, 38:50] = (13, 75, 20)                           # the same face in shadow (linear x ~0.33)
    img[10:50, 50:70] = (40, 40, 200)                          # a red neighbour
    img = cv2.GaussianBlur(img, (0, 0), 0.6)
    mask = (np.abs(img.astype(int) - (40, 160, 60)).sum(axis=2) < 60).astype(np.uint8)
    contours, _ = cv2.findContours(mask, cv2.RETR_EXTERNAL, cv2.CHAIN_APPROX_NONE)
    outline = max(contours, key=cv2.contourArea).reshape(-1, 2).astype(float)
    refined, shaded = edge_outlines_px(img, [outline])
    shaded = shaded[0]
    at_shadow = (outline[:, 0] >= 36) & (outline[:, 1] > 14) & (outline[:, 1] < 46)
    at_wood = (outline[:, 0] <= outline[:, 0].min() + 0.5) & (outline[:, 1] > 14) & (outline[:, 1] < 46)
    assert at_shadow.sum() >= 20 and shaded[at_shadow].all()
    assert not shaded[at_wood].any()
    # the wood edge lands on x = 9.5 (the boundary between pixel columns 9 and 10)
    np.testing.assert_allclose(refined[0][at_wood, 0], 9.5, atol=0.15)


def test_a_soft_edge_is_found_from_a_mask_outline_two_pixels_inside(monkeypatch):
    """A circle blurred with a Gaussian of 1.6 px (a soft lens, a small photo), its mask outline taken 2 px
    inside the edge: one reading of the 7-sample profile leaves its far end in the blur and comes out
    inside; read again centred on the edge until it stays, the symmetric blur puts the edge on the circle
    (the area method is exact for a symmetric spread centred on the step: Trujillo-Pino et al. 2013, from
    memory)."""
    centre, r = (60.4, 59.7), 30.0
    coverage = _coverage((120, 120), centre, r)
    img = coverage[..., None] * np.array((40.0, 170.0, 70.0)) + (1 - coverage[..., None]) * np.array((20.0, 25.0, 30.0))
    img = np.clip(cv2.GaussianBlur(img, (0, 0), 1.6) + 0.5, 0, 255).astype(np.uint8)
    t = np.linspace(0, 2 * np.pi, 180, endpoint=False)
    inside = np.column_stack([centre[0] + (r - 2.0) * np.cos(t), centre[1] + (r - 2.0) * np.sin(t)])
    refined = edge_outlines_px(img, [inside])[0][0]
    d = np.hypot(*(refined - centre).T) - r
    # a blurred circle's edge lies about sigma^2 / 2r = 0.04 px inside it (curvature), and the reading stops
    # once the edge moves less than 0.05 px
    assert abs(d.mean()) <= 0.1 and np.sqrt((d ** 2).mean()) <= 0.12
    monkeypatch.setattr(outlineedge, "_MORE_PASSES", 0)
    once = np.hypot(*(edge_outlines_px(img, [inside])[0][0] - centre).T) - r
    assert once.mean() < -0.25                 # one reading: inside, by more than a quarter of a pixel
