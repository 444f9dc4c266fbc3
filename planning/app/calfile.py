"""The calibration file: YAML, written atomically, an existing one moved to a dated history file.

Content: ``H_table_from_pixel`` (ideal pixels -> table mm), the lens, the camera centre and where it
came from, the image size, the photo's SHA-256, the time, per-marker residuals (and the corners seen,
which the drift check compares against), the overall residuals and a verdict.
"""

from __future__ import annotations

import hashlib
import os
import shutil
from datetime import datetime, timezone
from pathlib import Path
from typing import Annotated, Literal

import numpy as np
import yaml
from pydantic import BaseModel, ConfigDict, Field, ValidationError

from gripsight.app.errors import CellFileError, Problem
from gripsight.app.fileio import atomic_output, utc_now, utf8
from gripsight.vision.calibration import Calibration, CentreSource, MarkerFit, Verdict
from gripsight.vision.homography import TableMapping
from gripsight.vision.lens import lens_from_dict

__all__ = ["write_calibration", "read_calibration", "StoredCalibration", "history_path", "file_sha256"]

Finite = Annotated[float, Field(allow_inf_nan=False)]
#: a tone curve's power (light = code ** p) beyond these is no camera's: a typo or a damaged file
_TONE_POWER = (0.2, 5.0)


def file_sha256(path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


class _Model(BaseModel):
    # strict, as the cell file: a quoted "2.2" or a `yes` is not a number (lax mode read `yes` as 1.0)
    model_config = ConfigDict(extra="ignore", strict=True, allow_inf_nan=False)


class _Marker(_Model):
    id: int
    used: bool
    reason: str = ""
    role: str = ""
    residual_mm: Finite | None = None
    residual_px: Finite | None = None
    corners_px: Annotated[list[Annotated[list[Finite], Field(min_length=2, max_length=2)]], Field(min_length=4, max_length=4)]


class _Lens(_Model):
    model: Literal["none", "division", "opencv"]
    model_config = ConfigDict(extra="allow", allow_inf_nan=False)


class _Photo(_Model):
    path: str
    sha256: str
    width_px: Annotated[int, Field(gt=0, le=100_000)]
    height_px: Annotated[int, Field(gt=0, le=100_000)]


class _File(_Model):
    gripsight: Literal["calibration"]
    created: str
    cell: str
    photo: _Photo
    H_table_from_pixel: Annotated[list[Annotated[list[Finite], Field(min_length=3, max_length=3)]], Field(min_length=3, max_length=3)]
    lens: _Lens
    camera_centre_mm: Annotated[list[Finite], Field(min_length=3, max_length=3)]
    camera_centre_source: Annotated[CentreSource, Field(strict=False)]
    markers: list[_Marker]
    residual: dict[str, Finite]
    verdict: Annotated[Verdict, Field(strict=False)]
    notes: list[str] = []
    tone_power: Finite | None = None        # None: the sRGB curve; the range is checked in _content_problems


class StoredCalibration:
    """A calibration read back from its file."""

    def __init__(self, path: str, data: _File):
        self.path = path
        self.data = data
        self.mapping = TableMapping(np.array(data.H_table_from_pixel, float), lens_from_dict(data.lens.model_dump()))
        self.camera_centre_mm = np.array(data.camera_centre_mm, float)
        self.centre_source = data.camera_centre_source
        self.image_size = (data.photo.width_px, data.photo.height_px)
        self.marker_corners_px = {m.id: np.array(m.corners_px, float) for m in data.markers if m.used}
        self.verdict = data.verdict
        self.tone_power = data.tone_power
        self.sha256: str | None = None           # SHA-256 of the file's bytes, set by read_calibration


def default_calibration_path(cell) -> Path:
    """``calibration.yaml`` beside the cell file."""
    return Path(cell.source_path).parent / "calibration.yaml" if cell.source_path else Path("calibration.yaml")


def history_path(path: Path, when: datetime) -> Path:
    """``calibration.yaml`` -> ``calibration_history/calibration-20261202T041500Z.yaml`` (never an existing name)."""
    folder = path.parent / f"{path.stem}_history"
    stamp = when.strftime("%Y%m%dT%H%M%SZ")
    candidate = folder / f"{path.stem}-{stamp}{path.suffix}"
    n = 1
    while candidate.exists():
        candidate = folder / f"{path.stem}-{stamp}-{n}{path.suffix}"
        n += 1
    return candidate


def _marker_record(m: MarkerFit) -> dict:
    return {"id": int(m.id), "used": bool(m.used), "reason": m.reason, "role": m.role.value,
            "residual_mm": None if m.residual_mm is None else round(m.residual_mm, 4),
            "residual_px": None if m.residual_px is None else round(m.residual_px, 4),
            "corners_px": np.round(m.corners_px, 4).tolist()}


def calibration_record(cal: Calibration, cell, photo_path) -> dict:
    w, h = cal.image_size
    return {
        "gripsight": "calibration",
        "created": utc_now(),
        "cell": cell.cell,
        "photo": {"path": str(photo_path), "sha256": file_sha256(photo_path), "width_px": int(w), "height_px": int(h)},
        "H_table_from_pixel": [[float(v) for v in row] for row in cal.mapping.H_table_from_pixel],
        "lens": cal.mapping.lens.as_dict(),
        "camera_centre_mm": [round(float(v), 3) for v in cal.camera_centre_mm],
        "camera_centre_source": cal.centre_source.value,
        "markers": [_marker_record(m) for m in sorted(cal.markers, key=lambda m: m.id)],
        "residual": {"rms_mm": round(cal.rms_mm, 4), "max_mm": round(cal.max_mm, 4),
                     "rms_px": round(cal.rms_px, 4), "max_px": round(cal.max_px, 4),
                     "markers_used": len(cal.used)},
        "verdict": cal.verdict.value,
        "notes": list(cal.notes),
        **({"tone_power": cal.tone_power} if cal.tone_power is not None else {}),
    }


def write_calibration(path, cal: Calibration, cell, photo_path) -> Path | None:
    """Write the calibration atomically, the new file first: it is written and flushed beside the old
    one, the old one is then linked (or copied) into its history folder, and only then the new one takes
    its name. A failure anywhere leaves the old calibration where it was.

    Returns the history file the old calibration went to, or None.
    """
    from gripsight.app.errors import GripsightError

    path = Path(path)
    if path.is_dir():
        raise GripsightError(f"{path}: is a folder; a calibration needs a file name inside or beside it")
    record = calibration_record(cal, cell, photo_path)
    text = "# gripsight calibration: table frame in mm, pixels as in the photo (OpenCV's convention)\n" + \
        yaml.safe_dump(record, sort_keys=False, default_flow_style=None, width=140)
    moved = None
    with atomic_output(path) as tmp:
        Path(tmp).write_bytes(utf8(text))
        if path.is_file():
            moved = history_path(path, datetime.now(timezone.utc))
            moved.parent.mkdir(parents=True, exist_ok=True)
            try:
                os.link(path, moved)           # the old bytes keep their name until the new file replaces it
            except OSError:
                shutil.copy2(path, moved)
    return moved


def read_calibration(path) -> StoredCalibration:
    """Read and validate a calibration file.

    Raises
    ------
    CellFileError
        Missing file, YAML errors, or invalid content (each problem with its key path).
    """
    from gripsight.app.cellfile import _pydantic_problems, read_yaml

    data, raw = read_yaml(path, "calibration file")
    if not isinstance(data, dict):
        raise CellFileError(str(path), [Problem("", "not a gripsight calibration file; make one with `gripsight calibrate`")])
    try:
        parsed = _File.model_validate(data)
    except ValidationError as exc:
        raise CellFileError(str(path), _pydantic_problems(exc)) from None
    problems = _content_problems(parsed)
    if problems:
        raise CellFileError(str(path), problems + [Problem("", "make a new one with `gripsight calibrate`")])
    stored = StoredCalibration(str(path), parsed)
    stored.sha256 = hashlib.sha256(raw).hexdigest()       # what a resumed run or batch compares
    return stored


def _content_problems(parsed: _File) -> list[Problem]:
    """What a schema cannot say: a homography that maps the photo, a usable lens, a camera above the table."""
    out = []
    H = np.array(parsed.H_table_from_pixel, float)
    # a homography is invertible; a near-singular one (condition number past 1e12) maps the photo to a line
    if abs(np.linalg.det(H)) < 1e-15 or np.linalg.cond(H) > 1e12:
        out.append(Problem("H_table_from_pixel", "is singular (it maps the photo onto a line or a point)"))
    lens = parsed.lens.model_dump()
    try:
        values = [v for k, v in lens.items() if k != "model"]
        flat = np.concatenate([np.ravel(np.asarray(v, dtype=float)) for v in values]) if values else np.zeros(0)
        if not np.isfinite(flat).all():
            out.append(Problem("lens", "holds a value that is not a finite number"))
        elif lens["model"] == "division":
            if not float(lens["scale_px"]) > 0:
                out.append(Problem("lens.scale_px", f"must be a positive number of pixels, got {lens['scale_px']}"))
            if len(np.ravel(lens["centre_px"])) != 2:
                out.append(Problem("lens.centre_px", "must be two numbers (u, v) px"))
            if not abs(float(lens["lambda"])) < 10:
                out.append(Problem("lens.lambda", f"{lens['lambda']} is not a lens's distortion (needs abs(lambda) < 10)"))
        if not out:
            lens_from_dict(lens)
    except (KeyError, TypeError, ValueError) as exc:
        out.append(Problem("lens", f"invalid ({exc})"))
    p = parsed.tone_power
    if p is not None and not _TONE_POWER[0] < p < _TONE_POWER[1]:
        out.append(Problem("tone_power", f"must be between {_TONE_POWER[0]:g} and {_TONE_POWER[1]:g} (the power of the "
                                         f"photo's tone curve; leave it out for the sRGB curve), got {p:g}"))
    z = parsed.camera_centre_mm[2]
    if not z > 0:
        out.append(Problem("camera_centre_mm", f"the camera must be above the table (z > 0 mm), got z = {z:g} mm"))
    return out
