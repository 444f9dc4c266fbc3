"""The cell end to end: a photo in, parts in table coordinates out, ready for the planner.

This is one of the two places (with ``planning/cli.py``) that import both ``vision`` and ``planning``.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from gripsight.app.errors import GripsightError
from gripsight.vision.drift import RegistrationAction
from gripsight.planning.targets import PartTarget

__all__ = ["PhotoAnalysis", "PhotoPlan", "analyse_photo", "plan_photo", "photo_record", "targets_from_detection",
           "load_or_make_calibration", "check_photo_fits_calibration", "check_calibration_fits_cell"]


@dataclass
class PhotoAnalysis:
    """What one photo said: markers, how it was mapped (calibration, refit or refused), the parts."""

    photo: str
    image: np.ndarray
    markers: list
    registration: object          # vision.drift.Registration
    detection: object | None      # vision.parts.Detection, None if the photo was refused
    warnings: list = None         # what the terminal and the reports must show (camera moved, markers unseen...)

    @property
    def refused(self) -> bool:
        return self.registration.action is RegistrationAction.REFUSED


def load_or_make_calibration(cell, calibration_path: Path | None, say=None):
    """Read the calibration; if there is none at the default place but ``calibration.jpg`` lies beside
    the cell file, calibrate from it first (the demo cell's first run) and tell ``say`` (a callable)."""
    from gripsight.app.calfile import default_calibration_path, read_calibration, write_calibration
    from gripsight.vision.photo import read_photo
    from gripsight.vision.tonecurve import calibrate_photo

    path = Path(calibration_path) if calibration_path else default_calibration_path(cell)
    if not path.exists() and calibration_path is None and cell.source_path:
        photo = Path(cell.source_path).parent / "calibration.jpg"
        if photo.is_file():
            image = read_photo(photo)
            cal, _ = calibrate_photo(image, cell, str(photo))
            write_calibration(path, cal, cell, photo)
            if say is not None:
                say(f"no calibration yet: calibrated from {photo} ({cal.verdict}, {cal.rms_mm:.3f} mm RMS over "
                    f"{len(cal.used)} markers), saved as {path}")
        else:
            raise GripsightError(f"{path}: no calibration; make one with: gripsight calibrate PHOTO --cell "
                                 f"{cell.source_path}")
    return read_calibration(path)


def analyse_photo(photo, cell, stored, image=None) -> PhotoAnalysis:
    """Read (unless given), register against the calibration per ``camera.on_move``, find the parts."""
    from gripsight.vision.drift import register
    from gripsight.vision.markers import detect_markers
    from gripsight.vision.parts import detect_parts
    from gripsight.vision.photo import read_photo

    image = read_photo(photo) if image is None else image
    check_photo_fits_calibration(photo, image, stored)
    check_calibration_fits_cell(stored, cell)
    expected = stored.marker_corners_px if tuple(image.shape[1::-1]) == tuple(stored.image_size) else None
    markers = detect_markers(image, cell.markers.dictionary, expected=expected, search_ids=cell.markers.layout,
                             tone_power=stored.tone_power)
    reg = register(stored, markers, cell, (image.shape[1], image.shape[0]), str(photo))
    detection = None
    if reg.action is not RegistrationAction.REFUSED:
        detection = detect_parts(image, reg.mapping, reg.camera_centre_mm, cell, markers)
    return PhotoAnalysis(str(photo), image, markers, reg, detection, photo_warnings(image, markers, reg, stored, cell))


def photo_warnings(image, markers, registration, stored, cell) -> list[str]:
    """What must not pass unseen: a poor calibration in use, a camera that moved (refitted), layout
    markers not seen, a greyscale photo (colours cannot be told apart)."""
    out = []
    if getattr(stored, "data", None) is not None and stored.data.cell != cell.cell:
        out.append(f"the calibration {stored.path} was made for cell '{stored.data.cell}', not '{cell.cell}'; "
                   "check you gave the right files")
    if stored.verdict == "poor":
        out.append(f"the calibration {stored.path} is poor; positions may be off: calibrate again "
                   "(gripsight calibrate PHOTO)")
    if registration.action == "refit":
        out.append(registration.message)
    seen = {m.id for m in markers}
    # the table markers the calibration used and this photo misses (raised ones serve calibration only)
    unseen = sorted(i for i in stored.marker_corners_px if i not in seen
                    and i in cell.markers.layout and cell.markers.layout[i].z == 0)
    if unseen and seen:
        out.append(f"markers not seen: {', '.join(map(str, unseen))} (covered, out of view or badly lit)")
    sample = image[::7, ::7].astype(np.int16)
    if np.abs(sample[..., 0] - sample[..., 1]).max() <= 2 and np.abs(sample[..., 1] - sample[..., 2]).max() <= 2:
        out.append("the photo is greyscale: part colours cannot be told apart, so parts are missed; "
                   "give the camera's colour photos")
    return out


def check_photo_fits_calibration(photo, image, stored) -> None:
    """A photo of another size than the calibration's cannot be mapped by it (the lens and the homography
    are in that photo's pixels): refused, naming both sizes."""
    from gripsight.app.errors import InputError

    w, h = image.shape[1], image.shape[0]
    cw, ch = stored.image_size
    if (w, h) != (cw, ch):
        raise InputError(f"{photo}: {w}x{h} px, but the calibration {stored.path} was made from {cw}x{ch} px photos; "
                         "take photos at the calibrated size, or calibrate from a photo of this size")


#: how far (mm) the stored calibration may place a table marker from where the cell file says before the
#: cell file is taken for another cell's (or edited since): far above any calibration's residual
LAYOUT_MISMATCH_MM = 5.0


def check_calibration_fits_cell(stored, cell) -> None:
    """The calibration's markers, mapped through its own homography, must lie where the cell file puts
    them; else the cell file is not the one the calibration was made with."""
    from gripsight.app.errors import InputError

    worst = (0.0, None)
    for marker_id, corners_px in stored.marker_corners_px.items():
        place = cell.markers.layout.get(marker_id)
        if place is None or place.z != 0:
            continue
        centre_mm = stored.mapping(np.asarray(corners_px, float)).mean(axis=0)
        off = float(np.hypot(centre_mm[0] - place.x, centre_mm[1] - place.y))
        if off > worst[0]:
            worst = (off, marker_id)
    if worst[0] > LAYOUT_MISMATCH_MM:
        raise InputError(f"{cell.source_path or 'the cell'}: marker {worst[1]} is {worst[0]:.0f} mm from where the "
                         f"calibration {stored.path} saw it: wrong cell file, or markers moved since calibrating? "
                         "Give the right cell file, or calibrate again with this one")


def targets_from_detection(detection, cell) -> list[PartTarget]:
    """The planner's parts from the photo's: sizes and heights from the class, the photo's verdict kept."""
    out = []
    for d in detection.parts:
        cls = cell.parts.get(d.class_name)
        if cls is not None:
            fp = list(cls.length_width_mm)
            length, width, round_part = fp[0], fp[1], cls.shape == "cylinder"
        else:
            length, width, round_part = max(d.length_mm, d.width_mm), min(d.length_mm, d.width_mm), False
        out.append(PartTarget(d.id, d.class_name, d.xy_mm, d.height_mm, d.yaw_deg, length, width, round_part,
                              known_class=cls is not None, pixel_uv=d.pixel_uv, pickable=d.status.pickable,
                              vision_status=d.status.value, vision_detail=d.reason))
    return out


@dataclass
class PhotoPlan:
    """One photo's analysis and the plan made from it (None when the photo was refused)."""

    analysis: PhotoAnalysis
    plan: object | None           # planning.picks.Plan
    message: str = ""


def plan_photo(photo, cell, stored, planner, start_joints_rad=None, t0_s: float = 0.0, end_at_home: bool = True,
               order: str = "nearest", image=None, bin_room: dict | None = None) -> PhotoPlan:
    """Analyse a photo and plan its picks from ``start_joints_rad`` at clock time ``t0_s``.

    ``bin_room`` (bin -> places left) leaves parts whose bin is full out of the plan, with a reason.
    """
    analysis = analyse_photo(photo, cell, stored, image=image)
    if analysis.refused:
        return PhotoPlan(analysis, None, analysis.registration.message)
    from gripsight.app.cellchecks import check_plan_size

    targets = targets_from_detection(analysis.detection, cell)
    check_plan_size(len(targets), cell, str(photo))
    plan = planner.plan(targets, order=order, start_joints_rad=start_joints_rad, end_at_home=end_at_home, t0_s=t0_s,
                        bin_room=bin_room)
    return PhotoPlan(analysis, plan, analysis.registration.message)


def photo_record(analysis: PhotoAnalysis, stored) -> tuple[dict, dict]:
    """The ``photo`` and ``calibration`` objects of plan.json."""
    reg = analysis.registration
    photo = {"path": analysis.photo, "width_px": int(analysis.image.shape[1]), "height_px": int(analysis.image.shape[0]),
             "markers_seen": [m.id for m in analysis.markers],
             "white_balance": None if analysis.detection is None or analysis.detection.illumination is None
             else analysis.detection.illumination.as_dict(),
             "notes": [] if analysis.detection is None else analysis.detection.notes,
             "warnings": list(analysis.warnings or [])}
    calibration = {"file": stored.path, "verdict": stored.verdict.value, "registration": reg.action.value,
                   "message": reg.message, "drift": None if reg.drift is None else reg.drift.as_dict(),
                   "camera_centre_mm": None if reg.camera_centre_mm is None else
                   [round(float(v), 3) for v in reg.camera_centre_mm]}
    return photo, calibration
