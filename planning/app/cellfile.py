"""The cell file: schema, defaults, loading and error reporting.

A cell file (YAML) describes one cell: markers on the table, the camera, the work area, the arm, the
colour classes of parts, the bins and the motion settings. Lengths are millimetres, angles degrees,
times seconds, pulses microseconds; every key carries its unit in its name where it has one.

Loading is done by :func:`load_cell`. It reads with YAML safe loading only, validates with pydantic v2
(strict types: a quoted ``"12"`` is not a number) and then runs the cross-field checks of
:func:`_semantic_problems`. Every problem is reported with its dotted key path, e.g.
``arm.joints.shoulder.min_deg: must be less than max_deg (135)``, in one :class:`CellFileError`.
"""

from __future__ import annotations

import hashlib
import math
import os
from typing import Annotated, Literal

from pydantic import AfterValidator, BaseModel, ConfigDict, Field, PrivateAttr, ValidationError
from pydantic_core import PydanticCustomError

from gripsight.app.errors import CellFileError, Problem
from gripsight.app.yamlfile import read_yaml
from gripsight.vision.markerdict import DICTIONARY_NAMES, dictionary_size
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
#: the most samples one move may take (speed, joint speeds, dwell and sample rate together); beyond,
#: a plan would need gigabytes: the cell is refused by validate rather than by the planner
MAX_SAMPLES_PER_MOVE = 200_000

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


# ---------------------------------------------------------------- cross-field checks
def _joint_problems(where: str, joint: JointConfig) -> list[Problem]:
    out = []
    if joint.min_deg >= joint.max_deg:
        out.append(Problem(f"{where}.min_deg", f"must be less than max_deg ({joint.max_deg:g})"))
    (a0, p0), (a1, p1) = joint.servo.map
    servo = joint.servo
    if servo.min_us >= servo.max_us:
        out.append(Problem(f"{where}.servo.min_us", f"must be less than max_us ({servo.max_us:g})"))
    if a0 == a1:
        out.append(Problem(f"{where}.servo.map", "the two calibration points need different angles"))
    elif joint.min_deg < joint.max_deg:
        for limit_name, angle in (("min_deg", joint.min_deg), ("max_deg", joint.max_deg)):
            pulse = p0 + (angle - a0) * (p1 - p0) / (a1 - a0)
            if not servo.min_us - 1e-9 <= pulse <= servo.max_us + 1e-9:
                out.append(Problem(
                    f"{where}.{limit_name}",
                    f"{angle:g} deg maps to {pulse:.0f} us, outside the servo range "
                    f"{servo.min_us:g}-{servo.max_us:g} us"))
    return out


def _polygon_area(points: list[list[float]]) -> float:
    area = 0.0
    for (x0, y0), (x1, y1) in zip(points, points[1:] + points[:1]):
        area += x0 * y1 - x1 * y0
    return 0.5 * area


def _self_intersecting(points: list[list[float]]) -> bool:
    """True if two edges of the closed polygon that do not share a corner cross or touch (orientation test)."""
    import numpy as np

    p = np.asarray(points, float)
    a, b = p, np.roll(p, -1, axis=0)
    n = len(p)

    def orient(o, q, r):
        return np.sign((q[..., 0] - o[..., 0]) * (r[..., 1] - o[..., 1]) - (q[..., 1] - o[..., 1]) * (r[..., 0] - o[..., 0]))

    i, j = np.triu_indices(n, k=2)
    keep = ~((i == 0) & (j == n - 1))                  # the first and last edges share a corner
    i, j = i[keep], j[keep]
    d1, d2 = orient(a[i], b[i], a[j]), orient(a[i], b[i], b[j])
    d3, d4 = orient(a[j], b[j], a[i]), orient(a[j], b[j], b[i])
    return bool(np.any((d1 * d2 < 0) & (d3 * d4 < 0)))


def longest_move_samples(cell: Cell) -> tuple[float, float]:
    """(seconds, samples) of the longest move the cell's motion settings allow: twice the arm's reach at
    ``speed_mm_s``, a full turn of the slowest joint, and the dwell (an upper bound, used for limits)."""
    arm, motion = cell.arm, cell.motion
    reach_mm = abs(arm.shoulder_offset_mm) + arm.upper_arm_mm + arm.forearm_mm + arm.tool.reach_mm
    slowest = min(getattr(arm.joints, n).max_speed_deg_s for n in ("base", "shoulder", "elbow"))
    longest_s = 2 * reach_mm / motion.speed_mm_s + 360.0 / slowest + motion.dwell_s
    return longest_s, longest_s * motion.sample_hz


#: the most samples one plan may hold (moves of every part together), ~1 GB of arrays at most
MAX_SAMPLES_PER_PLAN = 5_000_000


def check_plan_size(n_parts: int, cell: Cell, source: str) -> None:
    """Refuse, before planning, a plan whose samples could exceed MAX_SAMPLES_PER_PLAN (4 moves a part)."""
    _, per_move = longest_move_samples(cell)
    bound = 4 * max(n_parts, 1) * per_move
    if bound > MAX_SAMPLES_PER_PLAN:
        raise CellFileError(source, [Problem("", f"{n_parts} parts at these motion settings could take {bound:,.0f} "
                                                 f"samples, more than {MAX_SAMPLES_PER_PLAN:,}; plan fewer parts at once "
                                                 "or raise motion.speed_mm_s")])


def _sample_problems(cell: Cell) -> list[Problem]:
    """Refuse motion settings whose longest move would take more than MAX_SAMPLES_PER_MOVE samples."""
    longest_s, samples = longest_move_samples(cell)
    if samples > MAX_SAMPLES_PER_MOVE:
        return [Problem("motion.sample_hz", f"the longest move (~{longest_s:,.0f} s) would take {samples:,.0f} samples, "
                                            f"more than {MAX_SAMPLES_PER_MOVE:,}; raise motion.speed_mm_s or the joints' "
                                            "max_speed_deg_s, or lower sample_hz or dwell_s")]
    return []


def _semantic_problems(cell: Cell) -> list[Problem]:
    """Checks that need more than one key; each problem names the key to change."""
    out: list[Problem] = []
    arm = cell.arm
    for name in ("base", "shoulder", "elbow"):
        out += _joint_problems(f"arm.joints.{name}", getattr(arm.joints, name))
    lo, hi = arm.elbow_interior_deg
    if not 0 <= lo < hi <= 180:
        out.append(Problem("arm.elbow_interior_deg", f"must be [min, max] with 0 <= min < max <= 180, got [{lo:g}, {hi:g}]"))
    link = arm.linkage
    if link.type == "four_bar":
        for key in ("crank_mm", "coupler_mm", "rocker_mm"):
            if getattr(link, key) is None:
                out.append(Problem(f"arm.linkage.{key}", "required for a four_bar linkage"))
    else:
        for key in ("crank_mm", "coupler_mm", "rocker_mm"):
            if getattr(link, key) is not None:
                out.append(Problem(f"arm.linkage.{key}", f"only used by four_bar, not {link.type}"))
    grip = arm.gripper
    for key in ("open_us", "closed_us"):
        if not grip.min_us <= getattr(grip, key) <= grip.max_us:
            out.append(Problem(f"arm.gripper.{key}", f"outside the servo range {grip.min_us:g}-{grip.max_us:g} us"))
    channels: dict[int, str] = {}
    for name in ("base", "shoulder", "elbow"):
        ch = getattr(arm.joints, name).servo.channel
        if ch in channels:
            out.append(Problem(f"arm.joints.{name}.servo.channel", f"channel {ch} is already used by {channels[ch]}"))
        channels[ch] = name
    if grip.channel in channels:
        out.append(Problem("arm.gripper.channel", f"channel {grip.channel} is already used by {channels[grip.channel]}"))

    home = cell.motion.home_deg
    for name in ("base", "shoulder", "elbow"):
        joint = getattr(arm.joints, name)
        value = getattr(home, name)
        if joint.min_deg < joint.max_deg and not joint.min_deg <= value <= joint.max_deg:
            out.append(Problem(f"motion.home_deg.{name}", f"{value:g} is outside the joint limits [{joint.min_deg:g}, {joint.max_deg:g}]"))

    size = dictionary_size(cell.markers.dictionary)
    layout = cell.markers.layout
    for marker_id in layout:
        if marker_id >= size:
            out.append(Problem(f"markers.layout.{marker_id}", f"id {marker_id} does not exist in {cell.markers.dictionary} (ids 0-{size - 1})"))
    ids = sorted(layout)
    for i, a in enumerate(ids):
        for b in ids[i + 1:]:
            pa, pb = layout[a], layout[b]
            if math.hypot(pa.x - pb.x, pa.y - pb.y) < cell.markers.size_mm:
                out.append(Problem(f"markers.layout.{b}", f"overlaps marker {a} (centres closer than size_mm)"))

    grip_marker = cell.markers.on_gripper
    if grip_marker is not None:
        if grip_marker.id >= size:
            out.append(Problem("markers.on_gripper.id", f"id {grip_marker.id} does not exist in {cell.markers.dictionary} (ids 0-{size - 1})"))
        if grip_marker.id in layout:
            out.append(Problem("markers.on_gripper.id", f"id {grip_marker.id} is already a table marker (markers.layout); "
                                                        "give the gripper its own id"))
        if grip_marker.level and not cell.arm.tool.level:
            out.append(Problem("markers.on_gripper.level", "the tool is fixed to the forearm (arm.tool.level: false), "
                                                           "so a marker on it tilts with it; remove the key or set false"))

    if abs(_polygon_area(cell.work_area)) < 1.0:
        out.append(Problem("work_area", "the polygon has no area (points collinear or repeated)"))
    elif _self_intersecting(cell.work_area):
        out.append(Problem("work_area", "the polygon crosses itself; list its corners in order around it"))
    out += _sample_problems(cell)

    for name, part in cell.parts.items():
        if not 0 <= part.lab[0] <= 100:
            out.append(Problem(f"parts.{name}.lab", f"L* must be in 0-100, got {part.lab[0]:g}"))
        if name == "reject":
            out.append(Problem(f"parts.{name}", "'reject' is reserved for the bin of unknown colours"))
    for name in cell.parts:
        if cell.bins and name not in cell.bins:
            out.append(Problem(f"bins.{name}", f"no bin for part class '{name}'"))
    for name in cell.bins:
        if name != "reject" and name not in cell.parts:
            out.append(Problem(f"bins.{name}", f"no part class '{name}' (bins are named after classes, or 'reject')"))

    # a part taller than safe_z_mm is approached, carried and released at adapted heights; a class that
    # cannot be carried at all is named by the planning core's cell check (parts.<class>.height_mm)
    motion = cell.motion
    if motion.drop_z_mm >= motion.safe_z_mm:
        out.append(Problem("motion.drop_z_mm", f"must be below safe_z_mm ({motion.safe_z_mm:g})"))
    for name, part in cell.parts.items():
        if motion.grip_depth_mm >= part.height_mm:
            out.append(Problem(f"parts.{name}.height_mm", f"must exceed motion.grip_depth_mm ({motion.grip_depth_mm:g})"))

    for i, zone in enumerate(cell.keep_out):
        where = f"keep_out.{i}"
        if zone.shape == "cylinder":
            for key in ("x", "y", "radius_mm"):
                if getattr(zone, key) is None:
                    out.append(Problem(f"{where}.{key}", "required for a cylinder zone"))
        else:
            if zone.min_mm is None or zone.max_mm is None:
                out.append(Problem(f"{where}", "a box zone needs min_mm and max_mm"))
            elif any(a >= b for a, b in zip(zone.min_mm, zone.max_mm)):
                out.append(Problem(f"{where}.min_mm", "every coordinate must be less than max_mm's"))
    if cell.camera.lens == LensMode.FILE and not cell.camera.lens_file:
        out.append(Problem("camera.lens_file", "required when camera.lens is 'file'"))
    return out


# ---------------------------------------------------------------- loading
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
    problems = _semantic_problems(cell)
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
