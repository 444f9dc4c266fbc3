"""Test photos of printed marker sheets with exact corner truth, made independently of the product's
renderer: every marker is OpenCV's own marker image (``cv2.aruco.generateImageMarker``) warped by a known
homography onto a supersampled page, area-averaged down to the photo (so an edge sits where the
homography puts it, to a small fraction of a pixel), then blurred, sRGB-encoded and noised.

Corners are in OpenCV's order (top-left, top-right, bottom-right, bottom-left of the marker image) and
pixel convention (centre of the top-left pixel at (0, 0)).
"""

from __future__ import annotations

from dataclasses import dataclass

import cv2
import numpy as np

from gripsight.vision.colour import srgb_from_linear

_SS = 4                 # supersampling factor
_PAPER = 0.80           # linear albedo
_INK = 0.03


@dataclass
class Sheet:
    image_bgr: np.ndarray
    corners_px: dict          # id -> (4, 2)


def _dictionary(name: int):
    return cv2.aruco.getPredefinedDictionary(name)


def sheet_photo(rng: np.random.Generator, ids, marker_px: float, size_px=(1280, 960), *, dictionary=cv2.aruco.DICT_4X4_50,
                quiet_cells: float = 1.5, blur_px: float = 0.5, noise: float = 1.5, tilt: float = 0.0,
                background=None, board: bool = False) -> Sheet:
    """A photo of markers ``ids`` about ``marker_px`` across, laid on a grid over the photo.

    ``board``: a ChArUco-like board (markers in the white squares of a chessboard whose black squares
    touch the markers' quiet zones diagonally). ``background``: a linear grey image (H, W) to lay the
    paper on; white paper everywhere by default. ``tilt`` adds a random perspective of about that
    fraction. Returns the 8-bit BGR photo and the true corners of every marker.
    """
    w, h = size_px
    d = _dictionary(dictionary)
    n = d.markerSize + 2
    page = np.full((h * _SS, w * _SS), _PAPER, np.float32) if background is None else \
        cv2.resize(background.astype(np.float32), (w * _SS, h * _SS), interpolation=cv2.INTER_LINEAR)
    ids = list(ids)
    pitch = marker_px * (1 + 2 * quiet_cells / n) * (1.0 if board else 1.15)
    cols = max(1, int((w - 2 * pitch) // pitch))
    cols -= (1 - cols % 2) if board else 0          # odd: every row of a board holds (cols + 1) / 2 or fewer
    x0 = (w - cols * pitch) / 2 + pitch / 2
    per_row = (cols + 1) // 2 if board else cols
    rows = int(np.ceil(len(ids) / per_row))
    y0 = (h - rows * pitch) / 2 + pitch / 2
    # one homography for the whole sheet (a slightly tilted page), applied to each marker's square
    src = np.float32([[0, 0], [w, 0], [w, h], [0, h]])
    jitter = rng.uniform(-tilt, tilt, (4, 2)) * [w, h]
    H_page = cv2.getPerspectiveTransform(src, np.float32(src + jitter))
    corners = {}
    if board:
        sq = pitch
        for r in range(-1, rows + 1):
            for c in range(-1, cols + 1):
                if (r + c) % 2:
                    quad = np.array([[x0 + (c - .5) * sq, y0 + (r - .5) * sq], [x0 + (c + .5) * sq, y0 + (r - .5) * sq],
                                     [x0 + (c + .5) * sq, y0 + (r + .5) * sq], [x0 + (c - .5) * sq, y0 + (r + .5) * sq]])
                    q = cv2.perspectiveTransform(quad[None], H_page)[0]
                    cv2.fillPoly(page, [np.round((q * _SS + (_SS - 1) / 2) * 16).astype(np.int32)], _INK,
                                 lineType=cv2.LINE_AA, shift=4)
    for k, marker_id in enumerate(ids):
        r, c = divmod(k, per_row)
        if board:
            c = 2 * c + (r % 2)
        cx, cy = x0 + c * pitch, y0 + r * pitch
        half = marker_px / 2
        quiet = half + quiet_cells * marker_px / n
        paper_quad = np.array([[cx - quiet, cy - quiet], [cx + quiet, cy - quiet], [cx + quiet, cy + quiet], [cx - quiet, cy + quiet]])
        q = cv2.perspectiveTransform(paper_quad[None], H_page)[0]
        cv2.fillPoly(page, [np.round((q * _SS + (_SS - 1) / 2) * 16).astype(np.int32)], _PAPER, lineType=cv2.LINE_AA, shift=4)
        quad = np.array([[cx - half, cy - half], [cx + half, cy - half], [cx + half, cy + half], [cx - half, cy + half]])
        truth = cv2.perspectiveTransform(quad[None], H_page)[0]
        corners[int(marker_id)] = truth
        side = 48 * n
        img = d.generateImageMarker(int(marker_id), side, borderBits=1).astype(np.float32) / 255.0
        img = np.where(img > 0.5, _PAPER, _INK).astype(np.float32)
        # marker image pixel (col, row) covers [col, col+1): its corner (0, 0) is the square's corner
        src_m = np.float32([[-0.5, -0.5], [side - 0.5, -0.5], [side - 0.5, side - 0.5], [-0.5, side - 0.5]])
        dst = np.float32(truth * _SS + (_SS - 1) / 2)            # photo px -> supersampled px
        x_lo, y_lo = np.maximum(np.floor(dst.min(axis=0)).astype(int) - 2, 0)
        x_hi, y_hi = np.minimum(np.ceil(dst.max(axis=0)).astype(int) + 3, [w * _SS, h * _SS])
        H = cv2.getPerspectiveTransform(src_m, np.float32(dst - [x_lo, y_lo]))
        roi = (int(x_hi - x_lo), int(y_hi - y_lo))
        warped = cv2.warpPerspective(img, H, roi, flags=cv2.INTER_AREA)
        alpha = cv2.warpPerspective(np.ones_like(img), H, roi, flags=cv2.INTER_LINEAR)
        sub = page[y_lo:y_hi, x_lo:x_hi]
        sub[...] = sub * (1 - alpha) + warped * alpha
    linear = cv2.resize(page, (w, h), interpolation=cv2.INTER_AREA)
    if blur_px > 0:
        linear = cv2.GaussianBlur(linear, (0, 0), blur_px)
    img = srgb_from_linear(np.clip(linear, 0, 1)) * 255.0
    img = img + rng.normal(size=img.shape) * noise
    gray = np.clip(np.round(img), 0, 255).astype(np.uint8)
    return Sheet(cv2.cvtColor(gray, cv2.COLOR_GRAY2BGR), corners)
