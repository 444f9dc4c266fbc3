"""Table surfaces for synthetic photos: the plain plywood bench, and busy ones that a makerspace bench
really has under its markers and parts (each a scene option, ``surface:`` in a scene file).

- ``plywood``: light plywood, slow mottling and faint grain (the default; see ``render._table_texture``);
- ``wood_grain``: a darker wood with strong, wavy grain lines;
- ``cutting_mat``: a dark green self-healing mat with a pale 10, 12.7 or 20 mm grid (every fifth line heavier),
  45-degree guide lines and printed numbers in grid cells (a cell ringed by grid lines with a number
  in it is what fooled the detector before: issue 19);
- ``printed_text``: sheets of paper with lines of black text, headlines and black labels with white
  letters, strewn over the plywood;
- ``checker_cloth``: a chequered cloth of dark and light squares of 8-25 mm, slightly turned.

Every texture is linear RGB, rows along table x and columns along table y, at ``px_per_mm``.
"""

from __future__ import annotations

from enum import Enum

import cv2
import numpy as np

from gripsight.vision.colour import linear_from_srgb, srgb_from_lab

__all__ = ["Surface", "BUSY_SURFACES", "busy_texture", "BUSY_PX_PER_MM"]

BUSY_PX_PER_MM = 4.0          # fine enough for 0.35 mm grid lines and 2.5 mm letters (area-weighted)


class Surface(str, Enum):
    PLYWOOD = "plywood"
    WOOD_GRAIN = "wood_grain"
    CUTTING_MAT = "cutting_mat"
    PRINTED_TEXT = "printed_text"
    CHECKER_CLOTH = "checker_cloth"


BUSY_SURFACES = (Surface.CUTTING_MAT, Surface.PRINTED_TEXT, Surface.CHECKER_CLOTH)
_WORDS = ("gripsight", "tray", "PLA", "token", "sorter", "print", "farm", "batch", "nozzle", "0.4 mm", "layer",
          "spool", "bed", "25", "30", "20", "infill", "M3", "bolt", "pick", "place", "QC", "PETG", "#17", "OK")


def _lab(lab) -> np.ndarray:
    return linear_from_srgb(srgb_from_lab(np.asarray(lab, float))).astype(np.float32)


def _noise(rng, shape, cells) -> np.ndarray:
    h, w = shape
    small = rng.normal(size=(max(2, h // cells), max(2, w // cells))).astype(np.float32)
    field = cv2.resize(small, (w, h), interpolation=cv2.INTER_CUBIC)
    return (field - field.mean()) / (field.std() + 1e-9)


def _mix(base: np.ndarray, ink: np.ndarray, colour) -> np.ndarray:
    """Lay ``colour`` (Lab) over ``base`` (float32, changed in place) where ``ink`` (0-1 coverage) says."""
    base = np.asarray(base, np.float32)
    for c, value in enumerate(_lab(colour)):
        channel = base[..., c]
        channel += (np.float32(value) - channel) * ink
    return base


def _put_text(mask, text, org_px, height_px, angle_deg, thickness, value=1.0):
    """Draw text into a float mask (Hershey simplex font), its baseline start at ``org_px`` (x, y),
    turned by ``angle_deg`` (counter-clockwise in the image) about that point."""
    scale = height_px / 22.0                       # FONT_HERSHEY_SIMPLEX is about 22 px tall at scale 1
    (tw, th), base = cv2.getTextSize(text, cv2.FONT_HERSHEY_SIMPLEX, scale, thickness)
    pad = thickness + 2
    tile = np.zeros((th + base + 2 * pad, tw + 2 * pad), np.uint8)
    cv2.putText(tile, text, (pad, pad + th), cv2.FONT_HERSHEY_SIMPLEX, scale, 255, thickness, cv2.LINE_AA)
    rot = cv2.getRotationMatrix2D((float(pad), float(pad + th)), angle_deg, 1.0)
    rot[:, 2] += np.asarray(org_px, float) - [pad, pad + th]
    corners = np.array([[0, 0, 1], [tile.shape[1], 0, 1], [tile.shape[1], tile.shape[0], 1], [0, tile.shape[0], 1]], float) @ rot.T
    h, w = mask.shape
    x0, y0 = np.maximum(np.floor(corners.min(axis=0)).astype(int), 0)
    x1, y1 = np.minimum(np.ceil(corners.max(axis=0)).astype(int) + 1, [w, h])
    if x1 <= x0 or y1 <= y0:
        return
    rot[:, 2] -= [x0, y0]
    cover = cv2.warpAffine(tile, rot, (int(x1 - x0), int(y1 - y0)), flags=cv2.INTER_LINEAR).astype(np.float32) / 255.0
    roi = mask[y0:y1, x0:x1]
    np.maximum(roi, cover * value, out=roi)


def _cutting_mat(rng, shape, res):
    h, w = shape
    base = _lab((38.0, -26.0, 9.0))[None, None, :] * (1 + 0.04 * _noise(rng, shape, 60))[..., None]
    ink = np.zeros(shape, np.float32)
    pitch = float(rng.choice([10.0, 12.7, 20.0])) * res          # metric, half-inch or 2 cm grids
    off = rng.uniform(0, pitch, 2)
    for axis in (0, 1):
        n = shape[axis]
        for k, pos in enumerate(np.arange(off[axis], n, pitch)):
            width = max(1, int(round((0.7 if k % 5 == 0 else 0.35) * res)))
            p = int(round(pos))
            if axis == 0:
                ink[p:p + width, :] = 1.0
            else:
                ink[:, p:p + width] = 1.0
    for c in rng.uniform(-0.5, 1.5, 3) * max(h, w):          # 45-degree guide lines
        cv2.line(ink, (int(c), 0), (int(c - h), h), 0.8, max(1, int(0.3 * res)), cv2.LINE_AA)
    # numbers in grid cells: along every fifth row and column, and scattered
    rows = np.arange(off[0], h, pitch)
    cols = np.arange(off[1], w, pitch)
    cells = [(r, c) for i, r in enumerate(rows) for j, c in enumerate(cols)
             if (i % 5 == 2 or j % 5 == 2 or rng.random() < 0.08)]
    for r, c in cells:
        text = str(int(rng.choice([5, 10, 15, 20, 25, 30, 35, 40, 45, 50, 1, 2, 3, 7, 17])))
        height = rng.uniform(0.35, 0.6) * pitch
        _put_text(ink, text, np.array([c + 0.15 * pitch, r + 0.2 * pitch]), height, 0.0,
                  max(1, int(round(rng.uniform(0.06, 0.1) * pitch))))
    return _mix(base, np.clip(ink, 0, 1), (86.0, -4.0, 18.0))


def _printed_text(rng, shape, res, plywood):
    h, w = shape
    paper_all = np.zeros(shape, np.float32)
    ink_all = np.zeros(shape, np.float32)
    white_all = np.zeros(shape, np.float32)
    for _ in range(int(rng.integers(4, 8))):
        sw, sh = rng.uniform(120, 210) * res, rng.uniform(90, 297) * res
        centre = rng.uniform([0, 0], [w, h])
        angle = rng.uniform(-40, 40)
        box = cv2.boxPoints((tuple(centre), (sw, sh), angle))
        paper = np.zeros(shape, np.float32)
        cv2.fillPoly(paper, [np.round(box * 8).astype(np.int32)], 1.0, cv2.LINE_AA, shift=3)
        ink = np.zeros(shape, np.float32)
        white_ink = np.zeros(shape, np.float32)
        rot = np.array([[np.cos(np.radians(angle)), -np.sin(np.radians(angle))],
                        [np.sin(np.radians(angle)), np.cos(np.radians(angle))]])
        y = -0.45 * sh
        while y < 0.42 * sh:
            height = rng.choice([2.5, 3.0, 4.0, 6.0, 10.0, 14.0], p=[.25, .25, .2, .15, .1, .05]) * res
            y += 1.5 * height
            x = -0.45 * sw
            while x < 0.3 * sw:
                word = str(rng.choice(_WORDS))
                org = centre + rot @ np.array([x, y])
                if height > 8 * res and rng.random() < 0.4:            # a black label with white letters
                    (tw, th), _ = cv2.getTextSize(word, cv2.FONT_HERSHEY_SIMPLEX, height / 22.0, 2)
                    lab_box = cv2.boxPoints((tuple(org + rot @ np.array([tw / 2, -th / 2])), (tw + 0.6 * height, 1.6 * height), angle))
                    cv2.fillPoly(ink, [np.round(lab_box * 8).astype(np.int32)], 1.0, cv2.LINE_AA, shift=3)
                    _put_text(white_ink, word, org, height, -angle, max(1, int(height / 7)))
                else:
                    _put_text(ink, word, org, height, -angle, max(1, int(height / (5 if height > 8 * res else 9))))
                x += (len(word) + 1) * 0.6 * height
        keep = 1.0 - paper                                            # a later sheet covers earlier print
        paper_all = np.maximum(paper_all, paper)
        ink_all = ink_all * keep + ink * paper
        white_all = white_all * keep + white_ink * paper
    out = _mix(plywood.copy(), paper_all, (93.0, 0.5, 3.0))
    out = _mix(out, np.clip(ink_all - white_all, 0, 1), (18.0, 0.0, 0.0))
    return out


def _checker_cloth(rng, shape, res):
    h, w = shape
    square = rng.uniform(8, 25) * res
    angle = np.radians(rng.uniform(-20, 20))
    xx = np.arange(w, dtype=np.float32)[None, :]
    yy = np.arange(h, dtype=np.float32)[:, None]
    u = (np.float32(np.cos(angle) / square) * xx + np.float32(np.sin(angle) / square) * yy)
    v = (np.float32(-np.sin(angle) / square) * xx + np.float32(np.cos(angle) / square) * yy)
    # anti-aliased squares: a smooth step about a texture pixel wide at each square's edge
    soft = np.float32(1.0 / square)
    su = np.clip((np.abs((u % 1.0) - 0.5) - 0.25) / soft + 0.5, 0, 1)
    sv = np.clip((np.abs((v % 1.0) - 0.5) - 0.25) / soft + 0.5, 0, 1)
    dark = su + sv - 2 * su * sv
    weave = 1 + 0.05 * _noise(rng, shape, 3)
    dark_lab = [(22.0, 2.0, -18.0), (18.0, 0.0, 0.0), (30.0, 30.0, 12.0)][int(rng.integers(0, 3))]
    base = np.empty((h, w, 3), np.float32)
    base[...] = _lab((90.0, 0.0, 2.0))
    out = _mix(base, dark.astype(np.float32), dark_lab)
    out *= weave[..., None]
    return out


def _wood_grain(rng, shape, res):
    h, w = shape
    warp = _noise(rng, shape, int(40 * res)) * 6.0 * res + _noise(rng, shape, int(8 * res)) * 1.0 * res
    cols = np.arange(w, dtype=np.float32)[None, :] + warp
    period = rng.uniform(4, 9) * res
    rings = (0.5 + 0.5 * np.sin(np.float32(2 * np.pi / period) * cols)) ** 3
    shade = 1.0 + 0.08 * _noise(rng, shape, int(60 * res)) + 0.03 * _noise(rng, shape, 2)
    out = np.empty((h, w, 3), np.float32)
    light, dark = _lab((56.0, 11.0, 27.0)), _lab((42.0, 15.0, 30.0))
    for c in range(3):
        out[..., c] = (light[c] + (dark[c] - light[c]) * rings) * shade
    return out


def busy_texture(surface: Surface, rng: np.random.Generator, shape, plywood=None) -> np.ndarray:
    """Linear-RGB texture (H, W, 3) of a surface other than plain plywood, at :data:`BUSY_PX_PER_MM`
    (``plywood``, the plain texture at the same size, is the ground under printed sheets)."""
    res = BUSY_PX_PER_MM
    make = {Surface.CUTTING_MAT: lambda: _cutting_mat(rng, shape, res),
            Surface.PRINTED_TEXT: lambda: _printed_text(rng, shape, res, plywood),
            Surface.CHECKER_CLOTH: lambda: _checker_cloth(rng, shape, res),
            Surface.WOOD_GRAIN: lambda: _wood_grain(rng, shape, res)}
    if surface not in make:
        raise ValueError(f"no busy texture for {surface}")
    # drawn with rows along table x and columns along table y, that is mirrored as seen from above:
    # flipped back so printed numbers and text read the right way round
    return np.ascontiguousarray(make[surface]()[:, ::-1])
