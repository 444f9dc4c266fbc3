"""Has the camera moved since the calibration? And what to do about it for one photo.

:func:`check_drift` compares the markers in a new photo with the calibration: each marker's shift in
pixels and in table mm (through the old mapping), then refits the mapping from the new photo's
markers (keeping the calibrated lens: a bump moves the camera, not its optics) and measures, over a
10 mm grid of the work area, how far the old mapping would put each point from where it now is.
Verdict ``moved`` when that exceeds ``camera.drift_tolerance_mm``.

:func:`register` applies the cell's ``camera.on_move`` policy for ``run`` and ``batch``: use the
calibration (``ok``), refit from this photo (``refit``), or refuse the photo (``stop``).
"""

from __future__ import annotations

from collections import Counter
from dataclasses import dataclass, field
from enum import StrEnum

import numpy as np

from gripsight.vision.calibration import Calibration, CalibrationError, CentreSource, Verdict, calibrate
from gripsight.vision.settings import LensMode, OnMove
from gripsight.vision.markers import MarkerDetection
from gripsight.vision.polygon import points_in_polygon

_STILL_PX = 0.3            # markers closer than this to their calibrated corners have not moved

__all__ = ["DriftReport", "DriftVerdict", "MarkerShift", "check_drift", "register", "Registration", "RegistrationAction",
           "work_area_grid_mm"]


class DriftVerdict(StrEnum):
    """Has the camera moved against its calibration (beyond ``camera.drift_tolerance_mm``)?"""

    OK = "ok"
    MOVED = "moved"


class RegistrationAction(StrEnum):
    """What ``camera.on_move`` made of one photo."""

    CALIBRATED = "calibrated"      # the stored calibration holds
    REFIT = "refit"                # the camera moved; mapped from this photo's own markers
    REFUSED = "refused"            # no usable mapping: nothing is planned for this photo


@dataclass(frozen=True)
class MarkerShift:
    id: int
    shift_px: float
    shift_mm: float


@dataclass
class DriftReport:
    verdict: DriftVerdict
    tolerance_mm: float
    grid_max_mm: float | None
    grid_mean_mm: float | None
    markers: list[MarkerShift]
    missing: list[int]
    refit: Calibration | None
    notes: list[str] = field(default_factory=list)

    def as_dict(self) -> dict:
        return {"verdict": self.verdict, "tolerance_mm": self.tolerance_mm,
                "grid_max_mm": None if self.grid_max_mm is None else round(self.grid_max_mm, 4),
                "grid_mean_mm": None if self.grid_mean_mm is None else round(self.grid_mean_mm, 4),
                "markers": [{"id": m.id, "shift_px": round(m.shift_px, 3), "shift_mm": round(m.shift_mm, 3)}
                            for m in self.markers],
                "missing": self.missing, "notes": self.notes}


def work_area_grid_mm(cell, step_mm: float = 10.0) -> np.ndarray:
    """Points (N, 2) of a grid with ``step_mm`` spacing inside the work-area polygon."""
    wa = np.asarray(cell.work_area, float)
    x = np.arange(wa[:, 0].min(), wa[:, 0].max() + 1e-9, step_mm)
    y = np.arange(wa[:, 1].min(), wa[:, 1].max() + 1e-9, step_mm)
    xx, yy = np.meshgrid(x, y)
    pts = np.column_stack([xx.ravel(), yy.ravel()])
    return pts[points_in_polygon(pts, wa)]


def check_drift(stored, detections: list[MarkerDetection], cell, image_size, photo: str = "photo") -> DriftReport:
    """Compare a photo's markers with a stored calibration (see the module docstring).

    Raises
    ------
    CalibrationError
        If the photo's size differs from the calibration photo's.
    """
    if tuple(image_size) != tuple(stored.image_size):
        w, h = stored.image_size
        raise CalibrationError(f"{photo}: the photo is {image_size[0]}x{image_size[1]} px but the calibration "
                               f"was made from {w}x{h} px photos; calibrate again with a photo from this camera")
    tol = cell.camera.drift_tolerance_mm
    seen = {d.id: d.corners_px for d in detections}
    counts = Counter(d.id for d in detections)
    old = stored.mapping
    ids = sorted(stored.marker_corners_px)
    missing = [i for i in ids if i not in seen or counts[i] > 1]
    both = [i for i in ids if i not in missing]
    shifts = []
    if both:
        # every marker's corners then and now through the stored mapping at once
        old_px = np.array([np.asarray(stored.marker_corners_px[i], float).reshape(4, 2) for i in both])
        new_px = np.array([np.asarray(seen[i], float).reshape(4, 2) for i in both])
        mm = old(np.concatenate([new_px, old_px]).reshape(-1, 2)).reshape(2, len(both), 4, 2)
        shift_px = np.sqrt(((new_px - old_px) ** 2).sum(axis=2)).mean(axis=1)
        shift_mm = np.sqrt(((mm[0] - mm[1]) ** 2).sum(axis=2)).mean(axis=1)
        shifts = [MarkerShift(i, float(a), float(b)) for i, a, b in zip(both, shift_px, shift_mm)]
    notes = []
    if not missing and shifts and max(sh.shift_px for sh in shifts) < _STILL_PX:
        # every calibrated marker is where it was: the mapping has not moved (no refit needed)
        bound = max(sh.shift_mm for sh in shifts)
        return DriftReport(DriftVerdict.OK, tol, bound, float(np.mean([sh.shift_mm for sh in shifts])), shifts, missing, None,
                           ["no marker moved (all within 0.3 px): mapping unchanged"])
    try:
        refit = calibrate(detections, cell, image_size, photo, lens=_fixed_lens(old.lens))
    except CalibrationError as exc:
        refit = None
        notes.append(f"no refit from this photo: {exc}")
    stored_rms = float(stored.data.residual.get("rms_mm", 0.1)) if hasattr(stored, "data") else 0.1
    if refit is not None and cell.camera.lens == LensMode.ESTIMATE and refit.rms_mm > max(0.15, 2 * stored_rms):
        # the calibrated lens does not fit this photo's markers: another lens, or a zoom; estimate it again
        again = calibrate(detections, cell, image_size, photo)
        if again.rms_mm < refit.rms_mm:
            notes.append(f"the calibrated lens did not fit this photo ({refit.rms_mm:.2f} mm RMS); lens estimated "
                         f"again ({again.rms_mm:.2f} mm)")
            refit = again
    grid_max = grid_mean = None
    if refit is not None:
        grid = work_area_grid_mm(cell)
        d = np.linalg.norm(refit.mapping(old.inverse(grid)) - grid, axis=1)
        grid_max, grid_mean = float(d.max()), float(d.mean())
        moved = grid_max > tol
    else:
        moved = any(s.shift_mm > tol for s in shifts) or not shifts
    if missing:
        notes.append(f"markers not seen: {', '.join(map(str, missing))}")
    return DriftReport(DriftVerdict.MOVED if moved else DriftVerdict.OK, tol, grid_max, grid_mean, shifts, missing, refit, notes)


def _fixed_lens(lens):
    from gripsight.vision.lens import NoLens

    return None if isinstance(lens, NoLens) else lens


@dataclass
class Registration:
    """How one photo is mapped to the table: the mapping and camera centre to use, and why."""

    action: RegistrationAction
    mapping: object | None
    camera_centre_mm: np.ndarray | None
    drift: DriftReport | None
    message: str = ""


def register(stored, detections, cell, image_size, photo: str = "photo") -> Registration:
    """Apply ``camera.on_move`` to one photo: use the calibration, refit from the photo, or refuse it."""
    if not detections:
        return Registration(RegistrationAction.REFUSED, None, None, None,
                            f"{photo}: no {cell.markers.dictionary} markers seen, so the camera cannot be checked; "
                            "check the light and that the markers are in view")
    try:
        report = check_drift(stored, detections, cell, image_size, photo)
    except CalibrationError as exc:
        return Registration(RegistrationAction.REFUSED, None, None, None, str(exc))
    if report.verdict is DriftVerdict.OK:
        return Registration(RegistrationAction.CALIBRATED, stored.mapping, stored.camera_centre_mm, report)
    moved = (f"camera moved: the calibration is off by up to {report.grid_max_mm:.2f} mm over the work area"
             if report.grid_max_mm is not None else "camera moved (markers shifted)")
    if cell.camera.on_move == OnMove.STOP:
        return Registration(RegistrationAction.REFUSED, None, None, report, f"{moved}; camera.on_move is 'stop': nothing planned for "
                                                           f"{photo}; recalibrate with: gripsight calibrate {photo}")
    if report.refit is None:
        return Registration(RegistrationAction.REFUSED, None, None, report, f"{moved}, and this photo cannot be refitted: "
                                                           f"{report.notes[0] if report.notes else ''}")
    if report.refit.verdict is Verdict.POOR:
        return Registration(RegistrationAction.REFUSED, None, None, report,
                            f"{moved}, and this photo's markers do not fit the cell file's layout (refit RMS "
                            f"{report.refit.rms_mm:.1f} mm): wrong cell file, or a photo of another cell? Nothing "
                            "planned; check the cell file, or recalibrate if markers were moved on purpose")
    centre = report.refit.camera_centre_mm if report.refit.centre_source is not CentreSource.ASSUMED else stored.camera_centre_mm
    return Registration(RegistrationAction.REFIT, report.refit.mapping, centre, report,
                        f"{moved}; refitted from this photo's markers (RMS {report.refit.rms_mm:.3f} mm)")
