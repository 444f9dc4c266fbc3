"""Drawing a marker held by the arm's gripper at a 3-D pose (level facing up, or pitched).

The marker's own frame: ``x`` toward its image's top edge, ``y`` toward its left edge, normal up. At
yaw 0 and pitch 0 it lies like a table marker of yaw 0; ``yaw_deg`` turns it about the table's z axis
(a marker on the gripper turns with the base) and ``pitch_deg`` then raises its top edge (a marker on
a tool fixed to the forearm pitches with it). The paper is warped onto the canvas by the homography of
its plane, ``K [R e_x, R e_y, R (c - C)]``, so its corners land where ``Camera.project`` puts them.
"""

from __future__ import annotations

import numpy as np

from gripsight.vision.synth.paper import marker_paper

__all__ = ["marker_axes", "gripper_marker_corners_mm", "draw_gripper_marker"]

def marker_axes(yaw_deg: float, pitch_deg: float) -> tuple[np.ndarray, np.ndarray]:
    """The marker's x (toward its top edge) and y (toward its left edge) axes in the table frame."""
    b, p = np.radians(yaw_deg), np.radians(pitch_deg)
    ex = np.array([np.cos(b) * np.cos(p), np.sin(b) * np.cos(p), np.sin(p)])
    ey = np.array([-np.sin(b), np.cos(b), 0.0])
    return ex, ey


def gripper_marker_corners_mm(spec, margin_mm: float = 0.0) -> np.ndarray:
    """Corners (4, 3) of the black square (or the paper with ``margin_mm``) in OpenCV's order."""
    h = spec.size_mm / 2 + margin_mm
    ex, ey = marker_axes(spec.yaw_deg, spec.pitch_deg)
    local = np.array([[h, h], [h, -h], [-h, -h], [-h, h]])
    return np.asarray(spec.centre_mm, float) + local[:, :1] * ex + local[:, 1:] * ey


def draw_gripper_marker(canvas, cam, K_canvas, dictionary: str, spec, warp_into, shade: float = 1.0) -> None:
    """Warp the marker's paper into the canvas at its pose (``warp_into`` is the renderer's blender)."""
    centre = np.asarray(spec.centre_mm, float)
    depth = float(cam.to_camera(centre[None])[0, 2])
    if depth <= 1.0:
        return
    paper, n = marker_paper(dictionary, spec.id, spec.size_mm, spec.margin_mm, 1.25 * K_canvas[0, 0] / depth)
    h = spec.size_mm / 2 + spec.margin_mm
    res = n / (2 * h)
    # paper pixel (col, row) -> marker-local (x, y): image down = -x, image right = -y
    A_local = np.array([[0.0, -1 / res, h - 0.5 / res], [-1 / res, 0.0, h - 0.5 / res], [0, 0, 1.0]])
    ex, ey = marker_axes(spec.yaw_deg, spec.pitch_deg)
    R = cam.R_camera_from_table
    H = K_canvas @ np.column_stack([R @ ex, R @ ey, R @ (centre - cam.centre_mm)]) @ A_local
    corners = cam.project_ideal(gripper_marker_corners_mm(spec, spec.margin_mm), K_canvas)
    warp_into(canvas, paper * np.float32(shade), H, corners)
