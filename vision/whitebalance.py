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

from dataclasses import dataclass

import cv2
import numpy as np

from vision.colour import lab_from_xyz, linear_from_srgb, xyz_from_linear

__all__ = ["Illumination", "fit_illumination", "REFERENCE_WHITE", "lab_image", "lab_of_pixels"]

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

    def _features(self, u, v):
        un = (np.asarray(u, np.float32) - self.width_px / 2) / (self.width_px / 2)
        vn = (np.asarray(v, np.float32) - self.height_px / 2) / (self.width_px / 2)
        feats = [np.ones_like(un), un, vn, un * un + vn * vn]
        return feats[: self.coeffs.shape[1]]

    def field(self, u, v) -> np.ndarray:
        """Paper brightness (..., 3) at pixel coordinates u, v (broadcast)."""
        f = self._features(u, v)
        return np.stack([sum(c * x for c, x in zip(self.coeffs[ch], f)) for ch in range(3)], axis=-1)

    def as_dict(self) -> dict:
        return {"markers": self.n_markers, "terms": int(self.coeffs.shape[1]),
                "paper_at_centre_bgr": [round(float(x), 4) for x in self.field(self.width_px / 2, self.height_px / 2)]}


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


def fit_illumination(image_bgr: np.ndarray, detections, cell) -> Illumination | None:
    """Fit the paper-brightness field from the detected markers' margins; None if no marker is usable."""
    size, margin = cell.markers.size_mm, cell.markers.margin_mm
    if margin <= 1.0:
        return None
    h_img, w_img = image_bgr.shape[:2]
    local_corners = np.array([[-size / 2, -size / 2], [size / 2, -size / 2], [size / 2, size / 2], [-size / 2, size / 2]])
    ring = _ring_points_local(size, margin)
    centres, medians = [], []
    for det in detections:
        H, _ = cv2.findHomography(local_corners, det.corners_px, 0)
        if H is None:
            continue
        p = ring @ H[:, :2].T + H[:, 2]
        uv = (p[:, :2] / p[:, 2:3]).astype(np.float32)
        inside = (uv[:, 0] >= 1) & (uv[:, 0] < w_img - 2) & (uv[:, 1] >= 1) & (uv[:, 1] < h_img - 2)
        if inside.sum() < 16:
            continue
        x0, y0 = np.floor(uv[inside].min(axis=0)).astype(int) - 1
        x1, y1 = np.ceil(uv[inside].max(axis=0)).astype(int) + 2
        patch = _LIN_LUT[image_bgr[y0:y1, x0:x1]]
        mx = (uv[inside, 0] - np.float32(x0)).reshape(1, -1).astype(np.float32)
        my = (uv[inside, 1] - np.float32(y0)).reshape(1, -1).astype(np.float32)
        vals = cv2.remap(patch, mx, my, cv2.INTER_LINEAR)[0]
        lum = vals.mean(axis=1)
        keep = lum > 0.6 * np.median(lum)          # drop samples in a shadow or on ink
        centres.append(det.corners_px.mean(axis=0))
        medians.append(np.median(vals[keep], axis=0))
    if not medians:
        return None
    centres, medians = np.array(centres), np.array(medians)
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


def lab_of_pixels(bgr: np.ndarray, u: np.ndarray, v: np.ndarray, illumination: Illumination | None) -> np.ndarray:
    """CIELAB (N, 3) float32 of pixels (N, 3) uint8 BGR at photo coordinates u, v, white-balanced."""
    lin = _LIN_LUT[bgr]
    if illumination is not None:
        lin = lin * (illumination.white / np.maximum(illumination.field(u, v), 1e-3)).astype(np.float32)
    return lab_from_xyz(xyz_from_linear(lin[..., ::-1])).astype(np.float32)


def lab_image(image_bgr: np.ndarray, illumination: Illumination | None, origin=(0, 0)) -> np.ndarray:
    """CIELAB (H, W, 3) float32 of an image (or a crop at ``origin`` = (u0, v0)), white-balanced."""
    h, w = image_bgr.shape[:2]
    u = np.arange(w, dtype=np.float32)[None, :] + origin[0]
    v = np.arange(h, dtype=np.float32)[:, None] + origin[1]
    return lab_of_pixels(image_bgr, u, v, illumination)
