"""White balance and light falloff from the markers' white paper, a known white in every photo.

Around each detected marker the white margin is sampled (a ring between the black square and the
paper's edge, found through that marker's own corners, so raised markers work too). Per colour channel,
the paper's linear brightness is fitted over the photo as ``a + b u + c v + d (u^2 + v^2)`` (six or more
markers; ``a + b u + c v`` with four or five; a constant with fewer), from each marker's median.
Dividing by that field and multiplying by the reference white makes the paper the same white
everywhere: a colour cast, a dim or bright lamp, a gradient and vignetting are taken out together.

Reference white: the cell's ``markers.paper_srgb`` (default 232, linear 0.80), the paper's grey level
in a well-lit photo. Class colours in the cell file are CIELAB values measured in photos normalised
this way (``gripsight detect --sample`` reports them); a cell whose class colours were measured with
the paper at another level says so there.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import cv2
import numpy as np

from gripsight.vision.colour import linear_from_srgb
from gripsight.vision.robust import masked_median

__all__ = ["Illumination", "fit_illumination", "REFERENCE_WHITE", "lab_image", "lab_of_pixels", "balanced_lab", "lab_of_linear", "linear_of",
           "white_gain"]

REFERENCE_WHITE = 0.80
_LIN_LUT = linear_from_srgb(np.arange(256) / 255.0).astype(np.float32)


@dataclass(frozen=True)
class Illumination:
    """Per-channel paper brightness over the photo (linear, BGR order), as polynomial coefficients."""

    coeffs: np.ndarray          # (3, n_terms)
    width_px: int
    height_px: int
    n_markers: int
    white: float = REFERENCE_WHITE   # linear value the paper is normalised to

    def _normalised(self, u, v):
        """Pixel coordinates about the photo's centre, in half-widths (float32)."""
        half = np.float32(self.width_px / 2)
        return ((np.asarray(u, np.float32) - half) / half,
                (np.asarray(v, np.float32) - np.float32(self.height_px / 2)) / half)

    def _features(self, u, v):
        un, vn = self._normalised(u, v)
        feats = [np.ones_like(un), un, vn, un * un + vn * vn]
        return feats[: self.coeffs.shape[1]]

    def field(self, u, v) -> np.ndarray:
        """Paper brightness (..., 3) at pixel coordinates u, v (broadcast: a row of u and a column of v
        give the grid). The polynomial is a sum of a part in u and a part in v, so a grid costs one add."""
        c = np.zeros((3, 4), np.float32)
        c[:, : self.coeffs.shape[1]] = self.coeffs
        un, vn = self._normalised(u, v)
        # channel by channel: numpy broadcasts slowly over a last axis of three
        return np.stack([(ch[0] + un * (ch[1] + un * ch[3])) + vn * (ch[2] + vn * ch[3]) for ch in c], axis=-1)

    def as_dict(self) -> dict:
        return {"markers": self.n_markers, "terms": int(self.coeffs.shape[1]),
                "paper_at_centre_bgr": [round(float(x), 4) for x in self.field(self.width_px / 2, self.height_px / 2)]}


@functools.lru_cache(maxsize=16)
def _ring_points_local(size_mm: float, margin_mm: float, per_side: int = 8) -> np.ndarray:
    """Points in the marker's local frame (black square from -s/2 to s/2) on its white margin."""
    h = size_mm / 2
    pts = []
    for frac in (0.3, 0.6):
        d = h + frac * margin_mm
        t = np.linspace(-h, h, per_side)
        pts += [np.column_stack([t, np.full_like(t, d)]), np.column_stack([t, np.full_like(t, -d)]),
                np.column_stack([np.full_like(t, d), t]), np.column_stack([np.full_like(t, -d), t])]
    return np.concatenate(pts)


def _bilinear_linear(image_bgr: np.ndarray, uv: np.ndarray) -> np.ndarray:
    """Linear-light BGR (..., 3) at sub-pixel points uv (..., 2) inside the image, interpolated in linear
    light."""
    x0 = np.floor(uv[..., 0]).astype(int)
    y0 = np.floor(uv[..., 1]).astype(int)
    fx = (uv[..., 0] - x0)[..., None].astype(np.float32)
    fy = (uv[..., 1] - y0)[..., None].astype(np.float32)
    corners = linear_of(np.stack([image_bgr[y0, x0], image_bgr[y0, x0 + 1], image_bgr[y0 + 1, x0],
                                  image_bgr[y0 + 1, x0 + 1]]))
    return (corners[0] * (1 - fx) + corners[1] * fx) * (1 - fy) + (corners[2] * (1 - fx) + corners[3] * fx) * fy


def fit_illumination(image_bgr: np.ndarray, detections, cell) -> Illumination | None:
    """Fit the paper-brightness field from the detected markers' margins; None if no marker is usable."""
    size, margin = cell.markers.size_mm, cell.markers.margin_mm
    if margin <= 1.0:
        return None
    h_img, w_img = image_bgr.shape[:2]
    if not detections:
        return None
    local_corners = np.float32([[-size / 2, -size / 2], [size / 2, -size / 2], [size / 2, size / 2], [-size / 2, size / 2]])
    ring = _ring_points_local(size, margin)
    ring = np.column_stack([ring, np.ones(len(ring))])
    H = np.array([cv2.getPerspectiveTransform(local_corners, np.float32(d.corners_px)) for d in detections])
    p = np.einsum("mij,pj->mpi", H, ring)
    uv = p[..., :2] / p[..., 2:3]                                           # (markers, points, 2)
    inside = (uv[..., 0] >= 1) & (uv[..., 0] < w_img - 2) & (uv[..., 1] >= 1) & (uv[..., 1] < h_img - 2)
    vals = _bilinear_linear(image_bgr, np.where(inside[..., None], uv, 1.0))  # (markers, points, 3) linear
    lum = vals.mean(axis=2)
    keep = inside & (lum > 0.6 * masked_median(lum, inside)[:, None])     # drop samples in a shadow or on ink
    usable = inside.sum(axis=1) >= 16
    centres = np.array([d.corners_px for d in detections]).mean(axis=1)[usable]
    m = len(vals)                                                           # the three channels' medians at once
    medians = masked_median(np.moveaxis(vals, 2, 0).reshape(3 * m, -1), np.tile(keep, (3, 1))).reshape(3, m).T[usable]
    if not len(medians):
        return None
    n = len(medians)
    terms = 4 if n >= 6 else (3 if n >= 4 else 1)
    white = float(_LIN_LUT[int(round(getattr(cell.markers, "paper_srgb", 232.0)))])
    probe = Illumination(np.zeros((3, terms)), w_img, h_img, n, white)
    A = np.column_stack(probe._features(centres[:, 0], centres[:, 1]))
    coeffs = np.linalg.lstsq(A, medians, rcond=None)[0].T          # (3, terms)
    ill = Illumination(coeffs, w_img, h_img, n, white)
    if np.any(ill.field(centres[:, 0], centres[:, 1]) <= 0.01):
        ill = Illumination(medians.mean(axis=0)[:, None], w_img, h_img, n, white)
    return ill


# OpenCV's linear-BGR -> CIELAB for float images, written out: its sRGB/D65 matrix, white point and
# piecewise cube root (OpenCV documentation of cvtColor, "RGB <-> CIE L*a*b*"). OpenCV's own call costs
# 90-220 ms the first time in a process (it builds its 8-bit tables), a third of `gripsight detect`;
# this agrees with it to 5e-4 (tested) at the same per-photo cost.
_M_XYZN_FROM_LBGR = (np.array([[0.180423, 0.357580, 0.412453],
                               [0.072169, 0.715160, 0.212671],
                               [0.950227, 0.119193, 0.019334]]) / [[0.950456], [1.0], [1.088754]]).astype(np.float32)
_LAB_T0 = np.float32(0.008856)


def lab_of_linear(lin_bgr: np.ndarray) -> np.ndarray:
    """CIELAB (D65) of linear BGR float32 (..., 3), as OpenCV's ``COLOR_LBGR2Lab`` gives it (which agrees
    with :func:`vision.colour.lab_from_xyz` to 0.02 on 8-bit codes: tested)."""
    t = np.ascontiguousarray(lin_bgr, np.float32).reshape(-1, 3) @ _M_XYZN_FROM_LBGR.T   # X/Xn, Y, Z/Zn
    f = np.cbrt(t)
    low = t <= _LAB_T0
    if low.any():
        f[low] = np.float32(7.787) * t[low] + np.float32(16.0 / 116.0)
    lab = np.empty_like(t)
    lab[:, 0] = np.float32(116.0) * f[:, 1] - np.float32(16.0)
    dark = low[:, 1]
    if dark.any():
        lab[dark, 0] = np.float32(903.3) * t[dark, 1]
    lab[:, 1] = np.float32(500.0) * (f[:, 0] - f[:, 1])
    lab[:, 2] = np.float32(200.0) * (f[:, 1] - f[:, 2])
    return lab.reshape(lin_bgr.shape)


def balanced_lab(bgr: np.ndarray, gain) -> np.ndarray:
    """CIELAB (..., 3) float32 of 8-bit BGR codes (..., 3) scaled in linear light by ``gain``
    (:func:`white_gain`, or one factor per pixel gathered from it)."""
    return lab_of_linear(linear_of(bgr) * gain)


def lab_of_pixels(bgr: np.ndarray, u: np.ndarray, v: np.ndarray, illumination: Illumination | None) -> np.ndarray:
    """CIELAB (..., 3) float32 of pixels (..., 3) uint8 BGR at photo coordinates u, v, white-balanced."""
    return balanced_lab(bgr, white_gain(illumination, u, v))


def linear_of(bgr: np.ndarray) -> np.ndarray:
    """Linear light (float32, same shape) of 8-bit sRGB codes."""
    return cv2.LUT(bgr, _LIN_LUT)


def white_gain(illumination: Illumination | None, u, v) -> np.ndarray | float:
    """The factor (..., 3) that white-balances linear BGR at photo coordinates u, v (1 without a fit)."""
    if illumination is None:
        return np.float32(1.0)
    field = illumination.field(u, v)                       # float32, a fresh array: worked in place
    return np.divide(np.float32(illumination.white), np.maximum(field, np.float32(1e-3), out=field), out=field)


def lab_image(image_bgr: np.ndarray, illumination: Illumination | None, origin=(0, 0)) -> np.ndarray:
    """CIELAB (H, W, 3) float32 of an image (or a crop at ``origin`` = (u0, v0)), white-balanced."""
    h, w = image_bgr.shape[:2]
    u = np.arange(w, dtype=np.float32)[None, :] + np.float32(origin[0])
    v = np.arange(h, dtype=np.float32)[:, None] + np.float32(origin[1])
    return lab_of_pixels(image_bgr, u, v, illumination)
