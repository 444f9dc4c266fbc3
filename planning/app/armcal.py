"""Glue for the arm calibration from photos of the gripper marker (``arm-poses``, ``arm-fit``).

The planning core (:mod:`gripsight.planning.armfit`, :mod:`gripsight.planning.armposes`) knows no
images; here the camera calibration becomes its :class:`PixelModel` (the raised-marker model: a point P
at height z is seen at the table point ``q = C + (P - C) C_z / (C_z - z)``, then through the inverse
table mapping to pixels), the gripper marker is found in each photo with vision's detector, the stops
file is written and read, and the fitted cell file and its picture are written.
"""

from __future__ import annotations

import csv
import io
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from gripsight.app.errors import GripsightError, InputError
from gripsight.planning.armfit import ArmFit, MarkerMount, PixelModel, StopObservation

__all__ = ["STOP_COLUMNS", "mount_of", "pixel_model", "marker_centre_px", "stops_csv_text", "read_stops",
           "match_photos", "fitted_cell_text", "default_fitted_path", "draw_tool_errors", "FoundStop"]

STOP_COLUMNS = ["stop", "start_s", "end_s", "base_deg", "shoulder_deg", "elbow_deg", "base_us", "shoulder_us",
                "elbow_us", "x_mm", "y_mm", "z_mm"]


def mount_of(cell) -> MarkerMount | None:
    """The gripper marker's mount from the cell (None if the cell names no gripper marker)."""
    m = cell.markers.on_gripper
    if m is None:
        return None
    level = cell.arm.tool.level if m.level is None else m.level
    return MarkerMount(tuple(float(v) for v in m.offset_mm), bool(level))


def pixel_model(stored) -> PixelModel:
    """The calibration as a :class:`PixelModel`: table mapping plus camera centre (raised-marker model)."""
    return PixelModel.raised(stored.mapping.inverse, stored.mapping, stored.camera_centre_mm)


def marker_centre_px(corners_px, lens) -> np.ndarray:
    """A square marker's centre (2,) px from its corners (4, 2): where the diagonals cross, taken in ideal
    (undistorted) pixels, where it is exact under perspective, and distorted back."""
    c = lens.ideal(np.asarray(corners_px, float).reshape(4, 2))
    p1, d1 = c[0], c[2] - c[0]
    p2, d2 = c[1], c[3] - c[1]
    det = d1[0] * -d2[1] - d1[1] * -d2[0]
    r = p2 - p1
    t = (r[0] * -d2[1] - r[1] * -d2[0]) / det
    return lens.distort((p1 + t * d1)[None])[0]


def stops_csv_text(stops, cell, created: str, hold_s: float, speed_scale: float) -> str:
    """The list of stops: comment lines (cell, its SHA-256, time), a header and one row per stop."""
    out = io.StringIO()
    out.write("# gripsight arm stops: take one photo of the gripper marker during each stop's hold\n")
    out.write(f"# cell: {cell.cell}\n# cell_sha256: {cell.sha256 or 'not from a file'}\n# created: {created}\n")
    out.write(f"# hold_s: {hold_s:g}\n# speed_scale: {speed_scale:g}\n")
    writer = csv.DictWriter(out, STOP_COLUMNS, lineterminator="\n")
    writer.writeheader()
    for s in stops:
        writer.writerow(s.as_dict())
    return out.getvalue()


@dataclass(frozen=True)
class FoundStop:
    index: int
    pulses_us: np.ndarray      # (3,)


_MAX_STOPS_BYTES = 1024 * 1024      # arm-poses writes at most 60 stops: a few kB


def read_stops(path) -> list[FoundStop]:
    """Read a stops file written by ``arm-poses`` (the pulses are what the servos were sent).

    Raises
    ------
    InputError
        Missing, not a regular file, not UTF-8, without the columns, or a row whose stop is not a whole
        number >= 1 (or repeats one) or whose pulses are not finite and within 1-100,000 us (exit 2).
    """
    path = Path(path)
    if not path.exists():
        raise InputError(f"{path}: no such stops file; write one with: gripsight arm-poses CELL --out DIR")
    if not path.is_file():
        raise InputError(f"{path}: not a regular file (a folder, pipe or device); give the stops.csv of arm-poses")
    try:
        if path.stat().st_size > _MAX_STOPS_BYTES:
            raise InputError(f"{path}: too large for a stops file (arm-poses writes a few kB)")
        lines = [ln for ln in path.read_text(encoding="utf-8").splitlines() if ln and not ln.startswith("#")]
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"{path}: cannot be read as a stops file ({exc})") from None
    rows = list(csv.DictReader(lines))
    need = {"stop", "base_us", "shoulder_us", "elbow_us"}
    if not rows or not need <= set(rows[0]):
        raise InputError(f"{path}: not a stops file (needs columns {', '.join(sorted(need))})")
    out, seen = [], set()
    for n, row in enumerate(rows, 2):
        try:
            stop = int(row["stop"])
            pulses_us = np.array([float(row[k]) for k in ("base_us", "shoulder_us", "elbow_us")])
        except (TypeError, ValueError):
            raise InputError(f"{path}: line {n}: stop and pulses must be numbers") from None
        if stop < 1 or stop in seen or not (np.isfinite(pulses_us).all() and (pulses_us >= 1).all()
                                             and (pulses_us <= 1e5).all()):
            raise InputError(f"{path}: line {n}: a stop number >= 1 seen once, and pulses of 1-100000 us, "
                             f"expected; got stop {row['stop']!r}, pulses {', '.join(row[k] for k in ('base_us', 'shoulder_us', 'elbow_us'))}")
        seen.add(stop)
        out.append(FoundStop(stop, pulses_us))
    return out


def match_photos(photos: list[Path], stops: list[FoundStop]) -> list[tuple[Path, FoundStop]]:
    """Pair photos with stops: by the number at the end of each photo's name if every photo has a
    different one that is a stop index (``stop07.jpg``), else in the order given (one photo per stop)."""
    by_index = {s.index: s for s in stops}
    numbers = []
    for p in photos:
        m = re.search(r"(\d+)\D*$", p.stem)
        numbers.append(int(m.group(1)) if m else None)
    if None not in numbers and len(set(numbers)) == len(numbers) and all(n in by_index for n in numbers):
        return [(p, by_index[n]) for p, n in zip(photos, numbers)]
    if len(photos) != len(stops):
        raise GripsightError(f"{len(photos)} photos for {len(stops)} stops: give one photo per stop in order, or "
                             "name each photo by its stop number (stop07.jpg)")
    return list(zip(photos, stops))


def default_fitted_path(cell_path: Path, when: str) -> Path:
    stamp = when.replace("-", "").replace(":", "")
    return cell_path.with_name(f"{cell_path.stem}-fitted-{stamp}{cell_path.suffix}")


def fitted_cell_text(cell, fit: ArmFit, nominal_arm, photos: list[str], calibration_path: str,
                     created: str) -> tuple[str, list[str]]:
    """The new cell file's text (the old one's data with the fitted servo maps, base position and link
    lengths) and notes about limits narrowed to the servos' pulse ranges. Raises CellFileError if the
    result is not a valid cell."""
    import yaml

    from gripsight.app.cellfile import parse_cell, read_yaml

    data, _ = read_yaml(cell.source_path, "cell file")
    arm = data["arm"]
    notes = []
    for servo, name in zip(fit.errors.servo_maps(nominal_arm), ("base", "shoulder", "elbow")):
        joint = arm["joints"][name]
        joint["servo"]["map"] = [[round(servo.angle_deg[0], 3), servo.pulse_us[0]],
                                 [round(servo.angle_deg[1], 3), servo.pulse_us[1]]]
        lo, hi = sorted(float(servo.deg_from_pulse_us(v)) for v in (servo.min_us, servo.max_us))
        for key, inside in (("min_deg", lambda v: max(v, np.ceil(lo * 100) / 100)),
                            ("max_deg", lambda v: min(v, np.floor(hi * 100) / 100))):
            new = float(inside(joint[key]))
            if new != joint[key]:
                notes.append(f"arm.joints.{name}.{key}: {joint[key]:g} -> {new:g} deg (the servo's pulse range)")
                joint[key] = new
    arm["base_xy_mm"] = [round(v, 3) for v in fit.errors.base_xy_mm]
    if fit.with_lengths:
        arm["upper_arm_mm"] = round(float(fit.errors.upper_arm_mm), 3)
        arm["forearm_mm"] = round(float(fit.errors.forearm_mm), 3)
    parse_cell(data, "the fitted cell")
    head = [f"# fitted by gripsight arm-fit at {created} from {len(photos)} photos of the gripper marker",
            f"# from the cell {cell.source_path} (sha256 {cell.sha256}) and the calibration {calibration_path}",
            f"# photos: {', '.join(photos)}",
            f"# residual {fit.rms_px:.3f} px RMS; changed: arm.joints.*.servo.map, arm.base_xy_mm"
            + (", arm.upper_arm_mm, arm.forearm_mm" if fit.with_lengths else "")]
    head += [f"# limit narrowed: {n}" for n in notes]
    return "\n".join(head) + "\n" + yaml.safe_dump(data, sort_keys=False, default_flow_style=None, width=120), notes


def draw_tool_errors(path, cell, grid_mm: np.ndarray, before_mm: np.ndarray, after_mm: np.ndarray) -> None:
    """A picture of the predicted tool-point error over the work area before and after the fit (the
    worst over the heights at each table point), with max and RMS in the titles."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from gripsight.app.fileio import atomic_output

    xy = np.round(grid_mm[:, :2], 6)
    keys, inverse = np.unique(xy, axis=0, return_inverse=True)
    fig, axes = plt.subplots(1, 2, figsize=(11, 5.2), constrained_layout=True)
    poly = np.array(cell.work_area + cell.work_area[:1])
    for ax, values, title in ((axes[0], before_mm, "before the fit"), (axes[1], after_mm, "after the fit (1 sigma)")):
        worst = np.full(len(keys), np.nan)
        np.fmax.at(worst, inverse.ravel(), values)
        sc = ax.scatter(keys[:, 1], keys[:, 0], c=worst, cmap="viridis", s=14, marker="s")
        fig.colorbar(sc, ax=ax, label="tool-point error, mm")
        ax.plot(poly[:, 1], poly[:, 0], color="0.3", lw=0.8)
        ok = ~np.isnan(values)
        ax.set_title(f"{title}: max {np.nanmax(values):.2f} mm, RMS {np.sqrt(np.mean(values[ok] ** 2)):.2f} mm", fontsize=10)
        ax.set_xlabel("y, mm (left)")
        ax.set_ylabel("x, mm (forward)")
        ax.invert_xaxis()
        ax.set_aspect("equal")
    with atomic_output(path) as tmp:
        fig.savefig(tmp, dpi=110)
    plt.close(fig)


def observations(pairs, cell, stored, nominal_arm, read_photo, detect_markers) -> list[StopObservation]:
    """One observation per photo: the commanded angles (the stop's pulses through the cell's servo maps)
    and the gripper marker's centre if found."""
    marker_id = cell.markers.on_gripper.id
    out = []
    for photo, stop in pairs:
        image = read_photo(photo)
        found = [d for d in detect_markers(image, cell.markers.dictionary, search_ids=[marker_id],
                                           tone_power=stored.tone_power) if d.id == marker_id]
        commanded = tuple(float(s.deg_from_pulse_us(p)) for s, p in zip(nominal_arm.servos, stop.pulses_us))
        uv = None if len(found) != 1 else tuple(marker_centre_px(found[0].corners_px, stored.mapping.lens))
        out.append(StopObservation(Path(photo).name, commanded, uv))
    return out
