"""A photo's outputs: plan.json, joints.csv, joints.png, path.png and overlay.png (the plan drawn on
the photo: parts and reasons, pick points, bins, the reachable region at grip height, the tool path)."""

from __future__ import annotations


import numpy as np

from gripsight.app.export import write_plan_outputs
from gripsight.app.fileio import output_dir, strict_json, write_bytes_atomic, write_text_atomic, utc_now

__all__ = ["write_photo_outputs", "plan_overlay"]

_PATH_BGR = (255, 160, 30)
_CARRY_BGR = (0, 140, 255)
_REACH_BGR = (120, 220, 120)


def _reach_outline_mm(cell, arm, z_mm: float, step_mm: float = 4.0) -> list[np.ndarray]:
    import cv2

    from gripsight.planning.reach import reachable_xy

    wa = np.asarray(cell.work_area, float)
    x = np.arange(wa[:, 0].min() - 60, wa[:, 0].max() + 60, step_mm)
    y = np.arange(wa[:, 1].min() - 60, wa[:, 1].max() + 60, step_mm)
    mask = reachable_xy(arm, x, y, z_mm).astype(np.uint8)           # (ny, nx)
    contours, _ = cv2.findContours(mask, cv2.RETR_EXTERNAL, cv2.CHAIN_APPROX_SIMPLE)
    return [np.column_stack([x[0] + c[:, 0, 0] * step_mm, y[0] + c[:, 0, 1] * step_mm]) for c in contours if len(c) > 2]


def plan_overlay(analysis, plan, cell, arm) -> np.ndarray:
    import cv2

    from gripsight.planning.reach import lowest_grip_z_mm
    from gripsight.vision.overlay import detection_overlay, draw_panel, draw_path_3d, draw_polyline_mm, table_point_px

    reg = analysis.registration
    out = detection_overlay(analysis.image, analysis.detection, reg.mapping, reg.camera_centre_mm, cell)
    for outline in _reach_outline_mm(cell, arm, lowest_grip_z_mm(cell)):
        draw_polyline_mm(out, reg.mapping, outline, _REACH_BGR, thickness=1, samples_per_edge=2)
    for name, b in cell.bins.items():
        uv = table_point_px(reg.mapping, reg.camera_centre_mm, [[b.x, b.y, b.z]])[0]
        cv2.circle(out, tuple(np.round(uv).astype(int)), 18, (60, 60, 60), 2, cv2.LINE_AA)
        cv2.putText(out, f"bin {name}", (int(uv[0]) - 25, int(uv[1]) + 32), cv2.FONT_HERSHEY_SIMPLEX, 0.45,
                    (255, 255, 255), 1, cv2.LINE_AA)
    if plan is None:
        return out
    if len(plan.samples.t_s) > 1:
        # the tool path straight down onto the table (its plan view), so it runs over parts and bins
        xyz = plan.samples.xyz_mm * [1.0, 1.0, 0.0]
        closed = plan.samples.gripper_closed.astype(int)
        draw_path_3d(out, reg.mapping, reg.camera_centre_mm, xyz, _PATH_BGR, 1)
        edges = np.diff(np.concatenate([[0], closed, [0]]))
        for a, b in zip(np.flatnonzero(edges == 1), np.flatnonzero(edges == -1)):
            draw_path_3d(out, reg.mapping, reg.camera_centre_mm, xyz[max(a - 1, 0):b], _CARRY_BGR, 2)
    by_reason: dict[str, int] = {}
    for o in plan.parts:
        if o.rejection is None:
            continue
        by_reason[o.rejection.label] = by_reason.get(o.rejection.label, 0) + 1
        if not o.part.pickable:
            continue                            # the detection overlay already says why
        uv = table_point_px(reg.mapping, reg.camera_centre_mm, [[*o.part.xy_mm, o.part.height_mm]])[0]
        c = tuple(np.round(uv).astype(int))
        cv2.drawMarker(out, c, (40, 40, 220), cv2.MARKER_TILTED_CROSS, 22, 3, cv2.LINE_AA)
        text = f"{o.part.id}: {o.rejection.label}"
        cv2.putText(out, text, (c[0] + 12, c[1] + 18), cv2.FONT_HERSHEY_SIMPLEX, 0.5, (0, 0, 0), 3, cv2.LINE_AA)
        cv2.putText(out, text, (c[0] + 12, c[1] + 18), cv2.FONT_HERSHEY_SIMPLEX, 0.5, (80, 80, 255), 1, cv2.LINE_AA)
    rejected = ", ".join(f"{n} {r}" for r, n in sorted(by_reason.items())) or "none"
    cycle_s = sum(p.duration_s for p in plan.picks)      # this photo's picks, not the run's clock (plan.cycle_s)
    draw_panel(out, [f"plan: {len(plan.picks)} picks, cycle {cycle_s:.1f} s; rejected: {rejected}",
                     "blue: tool path seen from above; orange: carrying; green: reach at grip height"],
               corner="bottom-right")
    return out


_PICTURES = ("overlay.png", "joints.png", "path.png")


def write_photo_outputs(out_dir, photo_plan, cell, arm, stored, overlay: bool = True, pictures: bool = True,
                        plots: bool = True):
    """Write everything for one photo under ``out_dir``; returns (the plan.json object, the overlay image
    or None).

    joints.csv is written first, then plan.json; with ``pictures`` then overlay.png (unless not
    ``overlay``), joints.png and path.png (unless not ``plots``) (:func:`write_photo_pictures`). Without ``pictures`` the
    pictures of an earlier run in the folder are removed, so what is there always belongs together.
    A refused photo (camera moved with ``on_move: stop``, or no markers) gets a plan.json that says why
    and no joint sequence or overlay.
    """
    from gripsight.app.pipeline import photo_record

    out = output_dir(out_dir)
    photo, calibration = photo_record(photo_plan.analysis, stored)
    if photo_plan.plan is None:
        data = {"gripsight": "plan", "created": utc_now(), "cell": cell.cell, "cell_sha256": cell.sha256,
                "photo": photo, "calibration": calibration, "status": "refused", "reason": photo_plan.message,
                "parts": [], "picks": [], "totals": {"parts": 0, "planned": 0, "rejected": 0, "cycle_s": 0.0},
                "warnings": [photo_plan.message]}
        write_text_atomic(out / "plan.json", strict_json(data) + "\n")
        for stale in ("joints.csv",) + _PICTURES:
            (out / stale).unlink(missing_ok=True)
        return data, None
    data = write_plan_outputs(out, photo_plan.plan, cell, arm, photo=photo, calibration=calibration, plots=False)
    if not pictures:
        for stale in _PICTURES:
            (out / stale).unlink(missing_ok=True)
        return data, None
    return data, write_photo_pictures(out, photo_plan, cell, arm, overlay=overlay, plots=plots)


def write_photo_pictures(out_dir, photo_plan, cell, arm, overlay: bool = True, plots: bool = True):
    """overlay.png, joints.png and path.png of a planned photo (the views of its plan); returns the
    overlay image (None if not drawn). A refused photo has none."""
    from gripsight.app.chart import png_bytes
    from gripsight.app.plan_plot import draw_joint_plot, draw_path_plot

    if photo_plan.plan is None:
        return None
    out = output_dir(out_dir)
    image = None
    if overlay:
        image = plan_overlay(photo_plan.analysis, photo_plan.plan, cell, arm)
        write_bytes_atomic(out / "overlay.png", png_bytes(image))
    if plots:
        draw_joint_plot(photo_plan.plan, cell, arm, out / "joints.png")
        draw_path_plot(photo_plan.plan, cell, arm, out / "path.png")
    else:
        for stale in _PICTURES[1:]:
            (out / stale).unlink(missing_ok=True)
    return image
