"""One photo's blob search: what its windows share (:class:`BlobSearch`) and the outlines of each
class's colour in one window of classified pixels (:func:`outlines_in_window`)."""

from __future__ import annotations

from dataclasses import dataclass

import cv2
import numpy as np

from gripsight.vision.shapes import ColourGroup
from gripsight.vision.topface import expected_area_mm2

__all__ = ["BlobSearch", "ColourOutline", "outlines_in_window", "MIN_RATIO", "MAX_RATIO"]

MIN_RATIO, MAX_RATIO = 0.45, 1.6     # a blob of one part: its area within these multiples of the class's


class BlobSearch:
    """What every window of one photo shares: the classified pixels, the searched area's edge band, the
    mapping, the cell's classes and the camera centre."""

    def __init__(self, image_bgr, classified, edge_band, mapping, cell, groups, parallax, seen_as, camera_centre_mm):
        self.image_bgr = image_bgr
        self.classified, self.edge_band, self.mapping, self.cell = classified, edge_band, mapping, cell
        self.parallax, self.seen_as = parallax, seen_as
        self.groups: dict[str, ColourGroup] = groups
        self.names = list(groups)
        self.nadir = np.asarray(camera_centre_mm[:2], float)
        self.cz = float(camera_centre_mm[2])
        self.kernel = cv2.getStructuringElement(cv2.MORPH_ELLIPSE, (3, 3))
        self.tallest = max(c.height_mm for c in cell.parts.values())
        self.typical = float(np.median([expected_area_mm2(c) for c in cell.parts.values()]))

    def k_of(self, height_mm: float) -> float:
        """The top face's scale about the nadir for a part of this height (1 without parallax)."""
        return self.cz / (self.cz - height_mm) if self.parallax else 1.0


@dataclass
class ColourOutline:
    """One contour of one class's colour (or an unknown colour), before it is measured: its class, its
    outline (photo px), its pixels ``sub`` and where they sit in the searched rectangle (x, y)."""

    name: str
    cls: object
    height_mm: float
    k: float
    outline_px: np.ndarray
    sub: np.ndarray
    x: int
    y: int
    group: ColourGroup | None = None          # its colour group, when that holds several classes
    members: tuple[str, ...] = ()             # once a class is chosen: the classes of its colour
    split_into: int = 0                       # parts side by side its outline's length says it holds


def outlines_in_window(search: BlobSearch, group: int, window) -> list[ColourOutline]:
    """The outlines of every class in one group's window of classified pixels (a blob of another group
    that reaches into the window is left to its own)."""
    wx, wy, ww, wh = window
    classified, names = search.classified, search.names
    rh, rw = classified.label.shape
    x0, y0 = max(wx - 2, 0), max(wy - 2, 0)               # a margin for the morphology
    x1, y1 = min(wx + ww + 2, rw), min(wy + wh + 2, rh)
    labels = classified.label[y0:y1, x0:x1]
    u0, v0 = classified.origin
    out = []
    for k_label in np.flatnonzero(np.bincount(labels.ravel(), minlength=len(names) + 2)[1:]) + 1:
        mask = cv2.morphologyEx((labels == k_label).astype(np.uint8), cv2.MORPH_OPEN, search.kernel)
        mask = cv2.morphologyEx(mask, cv2.MORPH_CLOSE, search.kernel)
        contours, _ = cv2.findContours(mask, cv2.RETR_EXTERNAL, cv2.CHAIN_APPROX_NONE)
        unknown = k_label == len(names) + 1
        colour = None if unknown else search.groups[names[k_label - 1]]
        several = colour is not None and len(colour.members) > 1
        name = "unknown" if unknown else (colour.name if several else colour.members[0])
        cls = None if unknown or several else search.cell.parts[name]
        height = cls.height_mm if cls is not None else (
            max(search.cell.parts[n].height_mm for n in colour.members) if several else search.tallest)
        k = search.k_of(height)
        for contour in contours:
            if len(contour) < 10:                             # a speck of a few pixels
                continue
            outline = contour.reshape(-1, 2)
            if classified.group_at(int(outline[0, 0]) + x0, int(outline[0, 1]) + y0) != group:
                continue
            x, y, w, h = cv2.boundingRect(contour)
            sub = np.zeros((h, w), np.uint8)
            cv2.drawContours(sub, [contour], -1, 1, thickness=cv2.FILLED, offset=(-x, -y))
            out.append(ColourOutline(name, cls, float(height), k, (outline + (x0 + u0, y0 + v0)).astype(float), sub,
                                x + x0, y + y0, colour if several else None))
    return out
