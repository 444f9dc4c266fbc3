"""A printed marker's paper as the renderer draws it: the ink square and its white margin in linear
albedo, each pixel the exact area average of a 12 px/mm master, so edges keep their sub-pixel position
at any resolution. Used for table markers (:mod:`render`) and the gripper's marker (:mod:`gripper`)."""

from __future__ import annotations

import cv2
import numpy as np

from gripsight.vision.markerdict import aruco_dictionary

__all__ = ["marker_paper", "PAPER_ALBEDO", "INK_ALBEDO"]

_MASTER_PX_PER_MM = 12.0
PAPER_ALBEDO = 0.80         # linear
INK_ALBEDO = 0.025


def marker_paper(dictionary: str, marker_id: int, size_mm: float, margin_mm: float, px_per_mm: float):
    """(paper (n, n, 3) float32 linear albedo, n): the marker ``marker_id`` of ``dictionary``, a black
    square of ``size_mm`` with ``margin_mm`` of paper around it, at about ``px_per_mm`` (at least 8 px)."""
    side = int(round(size_mm * _MASTER_PX_PER_MM))
    total = int(round((size_mm + 2 * margin_mm) * _MASTER_PX_PER_MM))
    ink = cv2.aruco.generateImageMarker(aruco_dictionary(dictionary), int(marker_id), side, borderBits=1)
    paper = np.full((total, total), PAPER_ALBEDO, np.float32)
    off = (total - side) // 2
    paper[off:off + side, off:off + side] = np.where(ink > 127, PAPER_ALBEDO, INK_ALBEDO)
    n = max(8, int(round((size_mm + 2 * margin_mm) * px_per_mm)))
    if n < total:
        paper = cv2.resize(paper, (n, n), interpolation=cv2.INTER_AREA)
    return np.repeat(paper[..., None], 3, axis=2), paper.shape[0]
