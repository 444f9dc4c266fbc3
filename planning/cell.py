"""The cell end to end: a photo in, parts in table coordinates out, ready for the planner.

This is one of the two places (with ``planning/cli.py``) that import both ``vision`` and ``planning``.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from planning.errors import GripsightError
from planning.targets import PartTarget

__all__ = ["PhotoAnalysis", "analyse_photo", "targets_from_detection", "default_calibration_path",
           "load_or_make_calibration"]


@dataclass
class PhotoAnalysis:
    """What one photo said: markers, how it was mapped (calibration, refit or refused), the parts."""

    photo: str
    image: np.ndarray
    markers: list
    registration: object          # vision.drift.Registration
    detection: object | None      # vision.parts.Detection, None if the photo was refused

    @property
    def refused(self) -> bool:
        return self.registration.action == "refused"


def default_calibration_path(cell) -> Path:
    """``calibration.yaml`` beside the cell file."""
    return Path(cell.source_path).parent / "calibration.yaml" if cell.source_path else Path("calibration.yaml")


def load_or_make_calibration(cell, calibration_path: Path | None):
    """Read the calibration; if there is none at the default place but ``calibration.jpg`` lies beside
    the cell file, calibrate from it first (the demo cell's first run)."""
    from vision.calfile import read_calibration, write_calibration
    from vision.calibration import calibrate
    from vision.markers import detect_markers
    from vision.photo import read_photo

    path = Path(calibration_path) if calibration_path else default_calibration_path(cell)
    if not path.exists() and calibration_path is None and cell.source_path:
        photo = Path(cell.source_path).parent / "calibration.jpg"
        if photo.is_file():
            image = read_photo(photo)
            cal = calibrate(detect_markers(image, cell.markers.dictionary), cell, (image.shape[1], image.shape[0]),
                            str(photo))
            write_calibration(path, cal, cell, photo)
        else:
            raise GripsightError(f"{path}: no calibration; make one with: gripsight calibrate PHOTO --cell "
                                 f"{cell.source_path}")
    return read_calibration(path)


def analyse_photo(photo, cell, stored, image=None) -> PhotoAnalysis:
    """Read (unless given), register against the calibration per ``camera.on_move``, find the parts."""
    from vision.drift import register
    from vision.markers import detect_markers
    from vision.parts import detect_parts
    from vision.photo import read_photo

    image = read_photo(photo) if image is None else image
    markers = detect_markers(image, cell.markers.dictionary)
    reg = register(stored, markers, cell, (image.shape[1], image.shape[0]), str(photo))
    detection = None
    if reg.action != "refused":
        detection = detect_parts(image, reg.mapping, reg.camera_centre_mm, cell, markers)
    return PhotoAnalysis(str(photo), image, markers, reg, detection)


def targets_from_detection(detection, cell) -> list[PartTarget]:
    """The planner's parts from the photo's: sizes and heights from the class, the photo's verdict kept."""
    out = []
    for d in detection.parts:
        cls = cell.parts.get(d.class_name)
        if cls is not None:
            fp = list(cls.footprint_mm) * (2 if len(cls.footprint_mm) == 1 else 1)
            length, width, round_part = fp[0], fp[1], cls.shape == "cylinder"
        else:
            length, width, round_part = max(d.length_mm, d.width_mm), min(d.length_mm, d.width_mm), False
        out.append(PartTarget(d.id, d.class_name, d.xy_mm, d.height_mm, d.yaw_deg, length, width, round_part,
                              known_class=cls is not None, pixel_uv=d.pixel_uv,
                              vision_status=d.status, vision_detail=d.reason))
    return out
