"""The cell file: schema, defaults, loading and error reporting.

A cell file (YAML) describes one cell: markers on the table, the camera, the work area, the arm, the
colour classes of parts, the bins and the motion settings. Lengths are millimetres, angles degrees,
times seconds, pulses microseconds; every key carries its unit in its name where it has one.

Loading is done by :func:`load_cell`. It reads with YAML safe loading only, validates with pydantic v2
(strict types: a quoted ``"12"`` is not a number) and then runs the cross-field checks of
:func:`gripsight.app.cellchecks.semantic_problems`. Every problem is reported with its dotted key path, e.g.
``arm.joints.shoulder.min_deg: must be less than max_deg (135)``, in one :class:`CellFileError`.
"""

from __future__ import annotations

import hashlib
import os
from typing import Annotated, Literal

from pydantic import AfterValidator, BaseModel, ConfigDict, Field, PrivateAttr, ValidationError
from pydantic_core import PydanticCustomError

from gripsight.app.cellchecks import semantic_problems
from gripsight.app.errors import CellFileError, Problem
from gripsight.app.yamlfile import read_yaml
from gripsight.vision.markerdict import DICTIONARY_NAMES
from gripsight.vision.settings import LensMode, OnMove

__all__ = [
    "Cell",
    "ArmConfig",
    "JointConfig",
    "ServoConfig",
    "load_cell",
    "parse_cell",
    "starter_cell_text",
]

#: the largest length or coordinate a tabletop cell can mean (100 m): 1e308 is a typo, and would overflow
LIMIT_MM = 1.0e5
#: the most part classes and markers a cell may list (the label image holds up to 65,534 classes)
MAX_PART_CLASSES = 1000
MAX_MARKERS = 1000

#: the smallest size a cell can mean (1 um): 1e-300 is a typo too, and its square (an area) underflows to 0
MIN_SIZE_MM = 1.0e-3


def _not_vanishing(value: float) -> float:
    if value < MIN_SIZE_MM:
        raise PydanticCustomError("too_small_size", "must be at least {least} (1 um): a smaller size is a typo",
                                  {"least": f"{MIN_SIZE_MM:g}"})
    return value


Number = Annotated[float, Field(allow_inf_nan=False, ge=-LIMIT_MM, le=LIMIT_MM)]
PositiveMm = Annotated[float, Field(gt=0, allow_inf_nan=False, le=LIMIT_MM), AfterValidator(_not_vanishing)]
NonNegativeMm = Annotated[float, Field(ge=0, allow_inf_nan=False, le=LIMIT_MM)]
# speeds: at least 1 mm/s or 1 deg/s (slower would take hours per move and millions of samples)
SpeedMmS = Annotated[float, Field(ge=1, le=1.0e4, allow_inf_nan=False)]
SpeedDegS = Annotated[float, Field(ge=1, le=1.0e4, allow_inf_nan=False)]
Point2 = Annotated[list[Number], Field(min_length=2, max_length=2)]
Point3 = Annotated[list[Number], Field(min_length=3, max_length=3)]

# Every dictionary OpenCV predefines, by our name (the vision library owns the list).
DictionaryName = Literal[DICTIONARY_NAMES]


class _Model(BaseModel):
    model_config = ConfigDict(extra="forbid", strict=True, allow_inf_nan=False, frozen=True)


# ---------------------------------------------------------------- markers and camera
class MarkerPlacement(_Model):
    x: Number
    y: Number
    z: NonNegativeMm = 0.0
    yaw_deg: Number = 0.0


class GripperMarker(_Model):
    """A marker fixed to the gripper, for fitting the servo maps and base placement from photos
    (``gripsight arm-poses`` / ``arm-fit``). Same dictionary as the table markers."""

    id: Annotated[int, Field(ge=0)]
    size_mm: PositiveMm
    margin_mm: NonNegativeMm = 5.0
    offset_mm: Point3 = [0.0, 0.0, 0.0]     # its centre from the tool point: forward, left, up (tool frame)
    level: bool | None = None              # faces up; false: tilts with the forearm; default: as arm.tool.level


class MarkersConfig(_Model):
    dictionary: DictionaryName = "aruco_4x4_50"
    size_mm: PositiveMm
    margin_mm: NonNegativeMm = 10.0
    paper_srgb: Annotated[float, Field(ge=100, le=255, allow_inf_nan=False)] = 232.0   # paper's grey level in a well-lit photo
    layout: dict[Annotated[int, Field(ge=0)], MarkerPlacement] = Field(min_length=1, max_length=MAX_MARKERS)
    on_gripper: GripperMarker | None = None


class CameraConfig(_Model):
    lens: Annotated[LensMode, Field(strict=False)] = LensMode.ESTIMATE
    lens_file: str | None = None
    centre_mm: Point3 | None = None
    height_mm: PositiveMm | None = None
    drift_tolerance_mm: PositiveMm = 1.0
    on_move: Annotated[OnMove, Field(strict=False)] = OnMove.REFIT


# ---------------------------------------------------------------- arm
class ServoConfig(_Model):
    channel: Annotated[int, Field(ge=0, le=63)]
    map: Annotated[list[Point2], Field(min_length=2, max_length=2)]
    min_us: PositiveMm = 500.0    # common practice: hobby servos accept 500-2500 us at 50 Hz
    max_us: PositiveMm = 2500.0


class JointConfig(_Model):
    min_deg: Number
    max_deg: Number
    max_speed_deg_s: SpeedDegS
    servo: ServoConfig


class JointsConfig(_Model):
    base: JointConfig
    shoulder: JointConfig
    elbow: JointConfig


class ToolConfig(_Model):
    reach_mm: NonNegativeMm = 0.0
    drop_mm: Number = 0.0
    level: bool = True


class LinkageConfig(_Model):
    type: Literal["serial", "parallel", "four_bar"]
    crank_mm: PositiveMm | None = None
    coupler_mm: PositiveMm | None = None
    rocker_mm: PositiveMm | None = None
    assembly: Literal["open", "crossed"] = "open"


class GripperConfig(_Model):
    max_opening_mm: PositiveMm
    open_us: PositiveMm
    closed_us: PositiveMm
    channel: Annotated[int, Field(ge=0, le=63)] = 3
    jaw: Literal["tangential", "radial"] = "tangential"
    margin_mm: NonNegativeMm = 2.0
    min_us: PositiveMm = 500.0
    max_us: PositiveMm = 2500.0


class ArmConfig(_Model):
    base_height_mm: Number
    base_xy_mm: Point2 = [0.0, 0.0]   # where the base axis stands in the markers' frame (written by arm-fit)
    shoulder_offset_mm: Number = 0.0
    upper_arm_mm: PositiveMm
    forearm_mm: PositiveMm
    tool: ToolConfig = ToolConfig()
    linkage: LinkageConfig
    elbow: Literal["up", "down"] = "up"
    joints: JointsConfig
    elbow_interior_deg: Point2 = [20.0, 170.0]
    gripper: GripperConfig


# ---------------------------------------------------------------- parts, bins, zones, motion
class PartClass(_Model):
    lab: Point3
    tolerance: Annotated[float, Field(gt=0, le=100, allow_inf_nan=False)] = 18.0     # CIEDE2000
    height_mm: PositiveMm
    shape: Literal["box", "cylinder"] = "box"
    footprint_mm: Annotated[list[PositiveMm], Field(min_length=1, max_length=2)]
    seen_as: Literal["auto", "top", "silhouette"] = "auto"

    @property
    def length_width_mm(self) -> tuple[float, float]:
        """The footprint as (length, width): one value (a cylinder's diameter, a square) is both."""
        fp = self.footprint_mm
        return (float(fp[0]), float(fp[-1]))


class BinConfig(_Model):
    x: Number
    y: Number
    z: Number = 0.0
    capacity: Annotated[int, Field(ge=1)] | None = None


class KeepOutZone(_Model):
    name: str = "zone"
    shape: Literal["cylinder", "box"]
    x: Number | None = None            # cylinder centre
    y: Number | None = None
    radius_mm: PositiveMm | None = None
    min_mm: Point3 | None = None       # box corners
    max_mm: Point3 | None = None
    top_mm: Number = 1.0e4             # cylinder top; boxes use max_mm[2]


class HomeConfig(_Model):
    base: Number = 0.0
    shoulder: Number = 90.0
    elbow: Number = 0.0


class MotionConfig(_Model):
    safe_z_mm: PositiveMm = 120.0
    grip_depth_mm: NonNegativeMm = 12.0
    drop_z_mm: NonNegativeMm = 50.0
    floor_clearance_mm: NonNegativeMm = 2.0
    speed_mm_s: SpeedMmS = 150.0
    time_scaling: Literal["cubic", "quintic", "trapezoid"] = "quintic"
    sample_hz: Annotated[float, Field(ge=1, le=1000, allow_inf_nan=False)] = 50.0
    dwell_s: Annotated[float, Field(ge=0, le=60, allow_inf_nan=False)] = 0.4
    home_deg: HomeConfig = HomeConfig()


class Cell(_Model):
    cell: str = Field(min_length=1)
    markers: MarkersConfig
    camera: CameraConfig = CameraConfig()
    work_area: Annotated[list[Point2], Field(min_length=3)]
    arm: ArmConfig
    parts: Annotated[dict[str, PartClass], Field(max_length=MAX_PART_CLASSES)] = {}
    bins: dict[str, BinConfig] = {}
    keep_out: list[KeepOutZone] = []
    motion: MotionConfig = MotionConfig()

    _source_path: str | None = PrivateAttr(default=None)
    _sha256: str | None = PrivateAttr(default=None)

    @property
    def source_path(self) -> str | None:
        """The file this cell was loaded from, if any."""
        return self._source_path

    @property
    def sha256(self) -> str | None:
        """SHA-256 of the cell file's bytes, if loaded from a file."""
        return self._sha256


_PYDANTIC_MESSAGES = {
    "missing": "required key is missing",
    "extra_forbidden": "unknown key (check the spelling; see `gripsight init` for every key)",
    "float_type": "must be a number",
    "int_type": "must be a whole number",
    "bool_type": "must be true or false",
    "string_type": "must be text",
    "dict_type": "must be a mapping of keys to values",
    "model_type": "must be a mapping of keys to values",
    "list_type": "must be a list",
    "finite_number": "must be a finite number (not nan or inf)",
}


def _format_loc(loc: tuple) -> str:
    """Dotted key path; keys with control characters are quoted and long ones shortened (one line)."""
    def one(part) -> str:
        text = str(part)
        if not text.isprintable():
            text = repr(text)
        return text if len(text) <= 40 else text[:37] + "..."
    return ".".join(one(part) for part in loc)


def _describe(value) -> str:
    text = repr(value).replace("\n", "\\n")
    return text if len(text) <= 40 else text[:37] + "..."


def _pydantic_problems(error: ValidationError) -> list[Problem]:
    out = []
    for item in error.errors(include_url=False):
        kind = item["type"]
        message = _PYDANTIC_MESSAGES.get(kind)
        if kind == "literal_error":
            expected = item.get("ctx", {}).get("expected", "")
            message = f"must be one of {expected}, got {_describe(item.get('input'))}"
        elif message is None:
            message = item["msg"][0].lower() + item["msg"][1:]
        elif kind.endswith("_type") or kind == "finite_number":
            message += f", got {_describe(item.get('input'))}"
        out.append(Problem(_format_loc(item["loc"]), message))
    return out


def parse_cell(data, source: str = "<cell>") -> Cell:
    """Validate already-parsed YAML data as a cell.

    Raises
    ------
    CellFileError
        With every problem found, each naming its key path.
    """
    if not isinstance(data, dict):
        kind = "empty" if data is None else f"a {type(data).__name__}, not a mapping of keys"
        raise CellFileError(source, [Problem("", f"the file is {kind}; start from `gripsight init`")])
    from gripsight.app.textsafe import control_character_paths

    controls = control_character_paths(data)
    if controls:      # a name that reaches a CSV, a comment line or HTML must not carry a line break
        raise CellFileError(source, [Problem(".".join(str(k) for k in where) or "<top>",
                                             f"contains a control character or line break ({text[:40]}); "
                                             "use plain text on one line") for where, text in controls])
    try:
        cell = Cell.model_validate(data)
    except ValidationError as exc:
        raise CellFileError(source, _pydantic_problems(exc)) from None
    problems = semantic_problems(cell)
    if problems:
        raise CellFileError(source, problems)
    return cell


def load_cell(path: str | os.PathLike) -> Cell:
    """Load and validate a cell file.

    Parameters
    ----------
    path : str or PathLike
        The YAML cell file.

    Returns
    -------
    Cell
        The validated cell, with ``source_path`` and ``sha256`` set.

    Raises
    ------
    CellFileError
        Every problem found, each with its key path (or YAML line).
    """
    data, raw = read_yaml(path, "cell file")
    cell = parse_cell(data, str(path))
    cell._source_path = str(path)
    cell._sha256 = hashlib.sha256(raw).hexdigest()
    return cell


def starter_cell_text() -> str:
    """The commented starter cell file written by ``gripsight init``."""
    from importlib.resources import files

    return files("gripsight.app").joinpath("templates/cell.yaml").read_text(encoding="utf-8")
