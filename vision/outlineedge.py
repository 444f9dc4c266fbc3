"""Outlines placed on the photo's edges, not on the colour threshold.

A blob's outline from its class mask runs through the centres of its boundary pixels, and where along
a blurred edge the colour test gives up depends on what lies beyond the edge: against a dark shadow
the mixed pixels fall out of the class sooner or later than against bright wood, so the mask's
outline leans to one side by a fraction of a pixel, and a top-face fit with it (measured on the outside
photo set: the outer outline 0.4-0.58 mm inside the true top face, 0.15 mm more on the shadow side).

Each outline point is moved along its outward normal onto the edge. Across a profile of 7 samples
(+-3 px, 1 px apart) the two sides' levels are read at its ends, every sample's place between them is measured
along the line joining the two colours (so a red part against wood and against its own shadow are the
same test), and the edge is where the profile's area on the near side equals that on the far side:
for a step blurred by any symmetric spread that is the step itself (the area, or partial-area, idea of
sub-pixel edge location; e.g. Trujillo-Pino et al., Image and Vision Computing 31(1), 2013, from memory).
That holds when the profile is centred on the edge, or long enough for both ends to lie beyond the
blur; from a mask outline a pixel or two inside a soft edge the far end lies in the blur and the edge
comes out inward. So the profile is read again centred on the edge found, until the edge stays (moves
less than 0.05 px; at most 6 more times): centred, both ends lie in the blur alike and the area finds
the step. Measured on the outside set's cubes (outer top-face edges against the truth's projected top
faces): hard photos (blurred, JPEG 70) -0.91 / -0.70 px (shadow / lit side) after one reading, -0.09 /
-0.14 px read until it stays; nominal photos -0.17 / -0.11 -> +0.03 / -0.01 px. A reading that would move
an edge a pixel or more has found another edge (a neighbour, a shadow's far side) and is not taken.

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

import cv2
import numpy as np

from gripsight.vision.colour import linear_from_srgb
from gripsight.vision.topface import outlines_geometry


def _linear_of_codes(codes: np.ndarray) -> np.ndarray:
    """Linear light of (fractional) 8-bit sRGB codes."""
    return linear_from_srgb(np.asarray(codes, float) / 255.0)

__all__ = ["edge_outlines_px"]

_REACH_PX = 3.0          # the profile runs this far either side of the outline point
_STEP_PX = 1.0
_PLATEAU = 2             # samples at each end taken as the two sides' levels
_MIN_CONTRAST = 0.15     # the step, relative to the brighter side's level
_SAME_CHROMA = 0.25       # a shading step keeps the colour: chromaticity within a quarter of its colourfulness
_DARKER = 0.8             # ... and loses at least a fifth of its light
_PIXEL_EDGE_PX = 0.5     # a pixel-centre outline lies half a pixel inside its region's boundary
_MORE_PASSES = 6         # profiles centred again on the edge found, at most this many times ...
_SETTLED_PX = 0.05       # ... while the edge still moves more than this
_MAX_MOVE_PX = 1.0       # a pass that moves an edge further found another edge: the previous place stays
_FLAT = 0.05             # a profile's end is level when its two samples differ by less than this of the step


def edge_outlines_px(image_bgr: np.ndarray, outlines_px: list[np.ndarray]) -> tuple[list[np.ndarray], list[np.ndarray]]:
    """Outlines (each (N, 2) photo px, closed, of a region's boundary pixel centres) moved along their
    outward normals onto the photo's edges (same lengths and order), and for each a bool (N,): the
    point lies on a shading step, not an edge (beyond it: the same colour, only darker)."""
    if not outlines_px:
        return [], []
    lengths = np.cumsum([len(o) for o in outlines_px])[:-1]
    pts = np.concatenate(outlines_px).astype(float)
    normals = np.concatenate(outlines_geometry([np.asarray(o, float) for o in outlines_px])[2])
    e, clear, near, far, flat = _edge_offsets(image_bgr, pts, normals)
    # then again with each profile centred on the edge just found, until it stays: from a mask outline a
    # pixel or more inside the edge the far plateau lies in the blur, which pulls the area's edge inward;
    # centred on the edge, the two plateaus lie in the blur alike and the area finds the step itself
    moving = np.flatnonzero(clear & ~flat)          # a profile whose two ends are level spans the blur: exact
    last = e[moving]
    for _ in range(_MORE_PASSES):
        if not len(moving):
            break
        step, clear_again, _, _, _ = _edge_offsets(image_bgr, pts[moving] + e[moving, None] * normals[moving], normals[moving])
        ok = clear_again & (np.abs(step) < _MAX_MOVE_PX)
        e[moving[ok]] += step[ok]
        # on until it moves less than 0.05 px, or turns back (it is at the edge within the photo's noise)
        on = ok & (np.abs(step) > _SETTLED_PX) & (step * last > 0)
        moving, last = moving[on], step[on]
    offset = np.where(clear, e, _PIXEL_EDGE_PX)
    shaded = np.zeros(len(pts), bool)
    darker = np.flatnonzero(clear & (far.sum(axis=1) < near.sum(axis=1)))
    shaded[darker] = _shading_step(near[darker], far[darker])
    return np.split(pts + offset[:, None] * normals, lengths), np.split(shaded, lengths)


def _edge_offsets(image_bgr: np.ndarray, pts: np.ndarray, normals: np.ndarray):
    """Per point (N, 2 px) and unit normal: the edge's offset along the normal (px), whether the profile
    shows a clear step, the two sides' levels (N, 3 codes each), and whether both ends are level."""
    h, w = image_bgr.shape[:2]
    s = np.arange(-_REACH_PX, _REACH_PX + 1e-9, _STEP_PX).astype(np.float32)
    map_u = (pts[:, 0, None] + s * normals[:, 0, None]).astype(np.float32)        # (N, S)
    map_v = (pts[:, 1, None] + s * normals[:, 1, None]).astype(np.float32)
    ends_u, ends_v = map_u[:, [0, -1]], map_v[:, [0, -1]]          # a straight profile: its ends bound it
    inside_photo = ((ends_u >= 0) & (ends_u < w - 1) & (ends_v >= 0) & (ends_v < h - 1)).all(axis=1)
    # (N, S, 3) codes, bilinear (OpenCV's 1/32 px weights; the area sums 7 samples, so rounding to
    # whole codes moves an edge by well under 0.01 px); a profile leaving the photo reads its border
    values = cv2.remap(image_bgr, map_u, map_v, cv2.INTER_LINEAR, borderMode=cv2.BORDER_REPLICATE).astype(np.float32)
    near = sum(values[:, i] for i in range(_PLATEAU)) * (1.0 / _PLATEAU)      # (N, 3); sums of columns are
    far = sum(values[:, -1 - i] for i in range(_PLATEAU)) * (1.0 / _PLATEAU)   # faster than mean over a short axis
    step = far - near                                                              # (N, 3)
    size2 = np.einsum("nc,nc->n", step, step)
    with np.errstate(divide="ignore", invalid="ignore"):
        t = (np.einsum("nsc,nc->ns", values, step) - np.einsum("nc,nc->n", near, step)[:, None]) / size2[:, None]
    # a step at e: the integral of (1 - t) over the profile (0 near .. 1 far) is e + reach
    inner = np.clip(1.0 - t, 0.0, 1.0)
    e = _STEP_PX * (inner.sum(axis=1) - 0.5 * (inner[:, 0] + inner[:, -1])) - _REACH_PX
    both = np.maximum(near, far)
    brighter = np.maximum(np.maximum(both[:, 0], both[:, 1]), both[:, 2])
    clear = inside_photo & (size2 >= (_MIN_CONTRAST * brighter) ** 2) & (np.abs(e) < _REACH_PX - 1.0)
    # both ends level (their two samples within 5 % of the step of each other): the blur ends inside the profile
    flat = (np.abs(t[:, 1] - t[:, 0]) < _FLAT) & (np.abs(t[:, -1] - t[:, -2]) < _FLAT)
    return e, clear, near, far, flat


def _shading_step(near: np.ndarray, far: np.ndarray) -> np.ndarray:
    """(N,) bool: the far side (N, 3 codes) is the near side's colour in less light: darker, and its
    chromaticity (linear light, normalised to sum 1) closer to the near side's than a quarter of the
    near side's own distance from grey. A shadow cast on a part's top face, not the part's edge."""
    lin_near, lin_far = _linear_of_codes(near), _linear_of_codes(far)
    sum_near, sum_far = lin_near.sum(axis=1), lin_far.sum(axis=1)
    chroma_near = lin_near / np.maximum(sum_near, 1e-6)[:, None]
    chroma_far = lin_far / np.maximum(sum_far, 1e-6)[:, None]
    colourful = np.linalg.norm(chroma_near - 1.0 / 3.0, axis=1)
    same = np.linalg.norm(chroma_far - chroma_near, axis=1) < _SAME_CHROMA * colourful
    return same & (sum_far < _DARKER * sum_near)
