"""The vision library's typed errors: one base, each with a one-line message for the user.

The library never picks an exit code; the application layer (:mod:`gripsight.app.errors`) does.
"""

from __future__ import annotations

__all__ = ["VisionError", "PhotoError", "CalibrationError", "LensFileError", "SheetError"]


class VisionError(Exception):
    """An expected failure of the vision library, with a one-line message naming the input."""


class PhotoError(VisionError):
    """A photo cannot be read or used (missing, not an image, too large, damaged)."""


class CalibrationError(VisionError):
    """The markers in a photo cannot give a camera-to-table mapping (too few, degenerate, poor)."""


class LensFileError(VisionError):
    """A lens file (OpenCV intrinsics and distortion) cannot be read or used."""


class SheetError(VisionError):
    """The marker sheet cannot be laid out (a marker does not fit the paper)."""
