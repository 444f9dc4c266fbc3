"""The cell's camera settings that vision reads, as enums (light: the cell-file schema imports them).

The application's schema turns the YAML strings into these members; the library compares members.
"""

from __future__ import annotations

from enum import StrEnum

__all__ = ["LensMode", "OnMove"]


class LensMode(StrEnum):
    """The cell's ``camera.lens``: how calibration treats the lens."""

    NONE = "none"            # a pinhole: the homography alone
    ESTIMATE = "estimate"    # fit a one-parameter division model with the homography, keep it if it helps
    FILE = "file"            # OpenCV intrinsics and distortion from camera.lens_file


class OnMove(StrEnum):
    """The cell's ``camera.on_move``: what to do with a photo whose camera has moved."""

    REFIT = "refit"          # map it from its own markers and go on
    STOP = "stop"            # plan nothing for it
