"""Outlines placed on the photo's edges, not on the colour threshold.

A blob's outline from its class mask runs through the centres of its boundary pixels, and where along
a blurred edge the colour test gives up depends on what lies beyond the edge: against a dark shadow
the mixed pixels fall out of the class sooner or later than against bright wood, so the mask's
outline leans to one side by a fraction of a pixel, and a top-face fit with it (measured on the outside
photo set: the outer outline 0.4-0.58 mm inside the true top face, 0.15 mm more on the shadow side).

Each outline point is moved along its outward normal onto the edge. Across a profile of 13 samples
(+-3 px) the two sides' levels are read at its ends, every sample's place between them is measured
along the line joining the two colours (so a red part against wood and against its own shadow are the
same test), and the edge is where the profile's area on the near side equals that on the far side:
for a step blurred by any symmetric spread that is the step itself (the area, or partial-area, idea of
sub-pixel edge location; e.g. Trujillo-Pino et al., Image and Vision Computing 31(1), 2013, from memory).

The samples are the photo's own 8-bit codes, not linear light. Optics blur linear light, but at the
scale of a pixel what mixes neighbours in a delivered photo is mostly its processing (demosaicing,
resampling, sharpening, JPEG), which works on the encoded values. Measured on printed markers (known
40 mm squares): on the outside set the black square's edge lies 0.22 px outward in linear light and
0.08 px inward in codes; on parts, codes took the outside set's nominal pick-point RMS from 0.29 mm
(linear) to 0.16 mm and our own renders' (which blur in linear light) from 0.19 to 0.16 mm.

Points whose profile shows no clear step (too little contrast, or the edge near the profile's ends)
keep the mask's outline, moved half a pixel outward to the boundary of the pixels it runs through.
"""

from __future__ import annotations

import numpy as np

from gripsight.vision.topface import outlines_geometry
from gripsight.vision.whitebalance import bilinear_sample

__all__ = ["edge_outlines_px"]

_REACH_PX = 3.0          # the profile runs this far either side of the outline point
_STEP_PX = 0.5
_PLATEAU = 3             # samples at each end taken as the two sides' levels
_MIN_CONTRAST = 0.15     # the step, relative to the brighter side's level
_PIXEL_EDGE_PX = 0.5     # a pixel-centre outline lies half a pixel inside its region's boundary


def edge_outlines_px(image_bgr: np.ndarray, outlines_px: list[np.ndarray]) -> list[np.ndarray]:
    """Outlines (each (N, 2) photo px, closed, of a region's boundary pixel centres) moved along their
    outward normals onto the photo's edges; same lengths and order."""
    if not outlines_px:
        return []
    h, w = image_bgr.shape[:2]
    lengths = np.cumsum([len(o) for o in outlines_px])[:-1]
    pts = np.concatenate(outlines_px).astype(float)
    normals = np.concatenate(outlines_geometry([np.asarray(o, float) for o in outlines_px])[2])
    s = np.arange(-_REACH_PX, _REACH_PX + 1e-9, _STEP_PX)
    line = pts[:, None, :] + s[None, :, None] * normals[:, None, :]          # (N, S, 2)
    inside_photo = ((line[..., 0] >= 0) & (line[..., 0] < w - 1) & (line[..., 1] >= 0) & (line[..., 1] < h - 1)).all(axis=1)
    values = bilinear_sample(image_bgr, np.where(inside_photo[:, None, None], line, 0.0))   # (N, S, 3) codes
    near, far = values[:, :_PLATEAU].mean(axis=1), values[:, -_PLATEAU:].mean(axis=1)
    step = far - near
    size2 = (step * step).sum(axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        t = ((values - near[:, None, :]) * step[:, None, :]).sum(axis=2) / size2[:, None]   # 0 near .. 1 far
    # a step at e: the integral of (1 - t) over the profile is e + reach
    e = np.trapezoid(1.0 - np.clip(t, 0.0, 1.0), s, axis=1) - _REACH_PX
    brighter = np.maximum(near.max(axis=1), far.max(axis=1))
    clear = inside_photo & (np.sqrt(size2) >= _MIN_CONTRAST * np.maximum(brighter, 1e-6)) & (np.abs(e) < _REACH_PX - 1.0)
    offset = np.where(clear, e, _PIXEL_EDGE_PX)
    return np.split(pts + offset[:, None] * normals, lengths)
