"""A pinhole camera with OpenCV's lens-distortion model, placed over the table.

Frames: ``table`` (x forward, y left, z up, mm) and the camera frame (x right, y down, z along the
optical axis, OpenCV's). ``R_camera_from_table`` rotates table vectors into the camera frame and the
camera centre ``centre_mm`` is in the table frame, so ``X_cam = R_camera_from_table @ (X_table - C)``.
Projection to pixels is ``cv2.projectPoints`` (the outside reference the renderer is tested against).

A camera looking straight down with no roll has the image's top edge toward +x and its right edge
toward -y, so a photo shows the table as a person standing behind the arm's base would draw it.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["Camera", "nadir_rotation", "tilt_rotation"]


def nadir_rotation() -> np.ndarray:
    """``R_camera_from_table`` for a camera looking straight down, image top toward +x."""
    # rows: camera x (image right) = -y_table, camera y (image down) = -x_table, camera z = -z_table
    return np.array([[0.0, -1.0, 0.0], [-1.0, 0.0, 0.0], [0.0, 0.0, -1.0]])


def _axis_angle(axis, angle_rad) -> np.ndarray:
    axis = np.asarray(axis, float)
    axis = axis / np.linalg.norm(axis)
    k = np.array([[0, -axis[2], axis[1]], [axis[2], 0, -axis[0]], [-axis[1], axis[0], 0]])
    return np.eye(3) + np.sin(angle_rad) * k + (1 - np.cos(angle_rad)) * k @ k


def tilt_rotation(tilt_deg: float, azimuth_deg: float, roll_deg: float = 0.0) -> np.ndarray:
    """``R_camera_from_table``: the nadir camera tilted by ``tilt_deg`` about the horizontal table axis at
    ``azimuth_deg`` from +x, then rolled by ``roll_deg`` about its optical axis."""
    az = np.radians(azimuth_deg)
    r_tilt = _axis_angle([np.cos(az), np.sin(az), 0.0], np.radians(tilt_deg))   # table frame rotation
    r_roll = _axis_angle([0.0, 0.0, 1.0], np.radians(roll_deg))                # camera frame rotation
    return r_roll @ nadir_rotation() @ r_tilt.T


@dataclass(frozen=True)
class Camera:
    """Intrinsics ``K`` (3x3, px), OpenCV distortion ``dist`` (k1, k2, p1, p2, k3), pose, image size."""

    K: np.ndarray
    dist: np.ndarray
    R_camera_from_table: np.ndarray
    centre_mm: np.ndarray
    width_px: int
    height_px: int

    @classmethod
    def create(cls, centre_mm, focal_px: float, width_px: int = 1280, height_px: int = 960,
               tilt_deg: float = 0.0, tilt_azimuth_deg: float = 0.0, roll_deg: float = 0.0,
               k1: float = 0.0, k2: float = 0.0, principal_offset_px=(0.0, 0.0)) -> "Camera":
        """A camera with square pixels and the principal point at the image centre (plus an offset, as
        real lenses are seldom centred on the sensor)."""
        du, dv = principal_offset_px
        K = np.array([[focal_px, 0.0, (width_px - 1) / 2.0 + du], [0.0, focal_px, (height_px - 1) / 2.0 + dv],
                      [0, 0, 1.0]])
        return cls(K, np.array([k1, k2, 0.0, 0.0, 0.0]), tilt_rotation(tilt_deg, tilt_azimuth_deg, roll_deg),
                   np.asarray(centre_mm, float), int(width_px), int(height_px))

    @property
    def rvec(self) -> np.ndarray:
        import cv2

        return cv2.Rodrigues(self.R_camera_from_table)[0].ravel()

    @property
    def tvec(self) -> np.ndarray:
        return -self.R_camera_from_table @ self.centre_mm

    def to_camera(self, xyz_mm) -> np.ndarray:
        """Table points (N, 3) mm -> camera-frame points (N, 3) mm."""
        p = np.asarray(xyz_mm, float).reshape(-1, 3)
        return (p - self.centre_mm) @ self.R_camera_from_table.T

    def project(self, xyz_mm) -> np.ndarray:
        """Pixels (N, 2) of table points (N, 3) through lens distortion (cv2.projectPoints)."""
        import cv2

        p = np.asarray(xyz_mm, float).reshape(-1, 3)
        uv, _ = cv2.projectPoints(p, self.rvec, self.tvec, self.K, self.dist)
        return uv.reshape(-1, 2)

    def project_ideal(self, xyz_mm, K=None) -> np.ndarray:
        """Pixels (N, 2) through the distortion-free pinhole with intrinsics ``K`` (default ``self.K``)."""
        K = self.K if K is None else K
        pc = self.to_camera(xyz_mm)
        uvw = pc @ K.T
        return uvw[:, :2] / uvw[:, 2:3]

    def in_view(self, xyz_mm) -> np.ndarray:
        """Mask: in front of the camera and projecting inside the image."""
        pc = self.to_camera(xyz_mm)
        uv = self.project(xyz_mm)
        return ((pc[:, 2] > 1.0) & (uv[:, 0] >= 0) & (uv[:, 0] <= self.width_px - 1)
                & (uv[:, 1] >= 0) & (uv[:, 1] <= self.height_px - 1))

    def undistort_normalised(self, uv_px) -> np.ndarray:
        """Distorted pixels (N, 2) -> normalised ideal image coordinates (N, 2) (x/z, y/z in the camera frame)."""
        import cv2

        pts = np.asarray(uv_px, float).reshape(-1, 1, 2)
        if not np.any(self.dist):
            return ((pts.reshape(-1, 2) - self.K[:2, 2]) / np.diag(self.K)[:2])
        crit = (cv2.TERM_CRITERIA_COUNT | cv2.TERM_CRITERIA_EPS, 100, 1e-14)
        return cv2.undistortPoints(pts, self.K, self.dist, None, np.eye(3), np.eye(3), crit).reshape(-1, 2)

    def as_dict(self) -> dict:
        return {"K": self.K.round(6).tolist(), "dist": self.dist.round(8).tolist(),
                "R_camera_from_table": self.R_camera_from_table.round(12).tolist(),
                "centre_mm": self.centre_mm.round(6).tolist(), "width_px": self.width_px, "height_px": self.height_px}

    @classmethod
    def from_dict(cls, d: dict) -> "Camera":
        return cls(np.array(d["K"], float), np.array(d["dist"], float), np.array(d["R_camera_from_table"], float),
                   np.array(d["centre_mm"], float), int(d["width_px"]), int(d["height_px"]))
