"""Lens models that map observed (distorted) pixels to ideal pinhole pixels and back.

- :class:`NoLens`: the identity.
- :class:`DivisionLens`: Fitzgibbon's one-parameter division model (Fitzgibbon, "Simultaneous linear
  estimation of multiple view geometry and lens distortion", CVPR 2001), centred at the image centre::

      p = (uv - c) / s,   p_ideal = p / (1 + lam |p|^2),   uv_ideal = c + s p_ideal

  with ``s`` the image half-diagonal so ``lam`` is unit-free. Barrel distortion has ``lam < 0``. The
  inverse is closed form: r_d = (1 - sqrt(1 - 4 lam r_u^2)) / (2 lam r_u).
- :class:`OpenCVLens`: OpenCV's model from a file of intrinsics and distortion coefficients;
  ``ideal`` uses ``cv2.undistortPoints`` (result in the same K's pixels), ``distort`` uses
  ``cv2.projectPoints``.

All take and return ``(N, 2)`` float64 pixel arrays.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["NoLens", "DivisionLens", "OpenCVLens", "lens_from_dict", "load_opencv_lens"]



def _pts(uv) -> np.ndarray:
    a = np.asarray(uv, dtype=float)
    if a.ndim != 2 or a.shape[1] != 2:
        raise ValueError(f"uv_px: expected shape (N, 2), got {a.shape}")
    return a


@dataclass(frozen=True)
class NoLens:
    def ideal(self, uv_px):
        return _pts(uv_px).copy()

    def distort(self, uv_ideal_px):
        return _pts(uv_ideal_px).copy()

    def as_dict(self) -> dict:
        return {"model": "none"}


@dataclass(frozen=True)
class DivisionLens:
    """One-parameter division model about ``centre_px`` with radius unit ``scale_px``."""

    lam: float
    centre_px: tuple[float, float]
    scale_px: float

    @classmethod
    def for_image(cls, lam: float, width_px: int, height_px: int) -> "DivisionLens":
        return cls(float(lam), ((width_px - 1) / 2.0, (height_px - 1) / 2.0), 0.5 * float(np.hypot(width_px, height_px)))

    def ideal(self, uv_px):
        p = (_pts(uv_px) - self.centre_px) / self.scale_px
        r2 = (p * p).sum(axis=1, keepdims=True)
        return np.asarray(self.centre_px) + self.scale_px * p / (1.0 + self.lam * r2)

    def distort(self, uv_ideal_px):
        p = (_pts(uv_ideal_px) - self.centre_px) / self.scale_px
        ru = np.linalg.norm(p, axis=1, keepdims=True)
        if self.lam == 0.0:
            return _pts(uv_ideal_px).copy()
        disc = np.clip(1.0 - 4.0 * self.lam * ru * ru, 0.0, None)
        with np.errstate(divide="ignore", invalid="ignore"):
            rd = np.where(ru > 1e-12, (1.0 - np.sqrt(disc)) / (2.0 * self.lam * ru), 0.0)
            factor = np.where(ru > 1e-12, rd / ru, 1.0)
        return np.asarray(self.centre_px) + self.scale_px * p * factor

    def as_dict(self) -> dict:
        return {"model": "division", "lambda": float(self.lam), "centre_px": [float(c) for c in self.centre_px],
                "scale_px": float(self.scale_px)}


@dataclass(frozen=True)
class OpenCVLens:
    """OpenCV intrinsics ``K`` (3x3) and distortion coefficients (k1, k2, p1, p2[, k3, ...])."""

    K: np.ndarray
    dist: np.ndarray

    def ideal(self, uv_px):
        import cv2

        pts = _pts(uv_px).reshape(-1, 1, 2)
        crit = (cv2.TERM_CRITERIA_COUNT | cv2.TERM_CRITERIA_EPS, 100, 1e-12)
        return cv2.undistortPoints(pts, self.K, self.dist, None, np.eye(3), self.K, crit).reshape(-1, 2)

    def distort(self, uv_ideal_px):
        import cv2

        p = _pts(uv_ideal_px)
        norm = np.column_stack([(p - self.K[:2, 2]) / np.diag(self.K)[:2], np.ones(len(p))])
        uv, _ = cv2.projectPoints(norm, np.zeros(3), np.zeros(3), self.K, self.dist)
        return uv.reshape(-1, 2)

    def as_dict(self) -> dict:
        return {"model": "opencv", "K": np.asarray(self.K).tolist(), "dist": np.asarray(self.dist).ravel().tolist()}


def lens_from_dict(d: dict | None):
    """The lens stored in a calibration file."""
    if not d or d.get("model") == "none":
        return NoLens()
    if d["model"] == "division":
        return DivisionLens(float(d["lambda"]), tuple(d["centre_px"]), float(d["scale_px"]))
    if d["model"] == "opencv":
        return OpenCVLens(np.array(d["K"], float), np.array(d["dist"], float))
    raise ValueError(f"lens.model: expected none, division or opencv, got {d['model']!r}")


_FOCAL_PX = (1.0, 1.0e6)          # the focal lengths a lens file may give (px)
_MAX_COEFFICIENT = 1.0e4          # the largest distortion coefficient a lens file may give


def load_opencv_lens(path, image_size: tuple[int, int] | None = None) -> OpenCVLens:
    """Read OpenCV intrinsics from YAML: ``camera_matrix`` (3x3 list or OpenCV's {rows, cols, data})
    and ``distortion_coefficients`` (list or {data}); also accepts ``K`` and ``dist``.

    When the file gives ``image_width`` and ``image_height`` (as OpenCV's calibration sample writes) and
    ``image_size`` (width, height px) differs: the same aspect ratio scales the camera matrix (a photo
    resized by the camera; the distortion coefficients are in normalised coordinates and stay), another
    aspect ratio (a crop) is refused."""
    from gripsight.vision.errors import LensFileError
    from gripsight.vision.yamltext import YamlTextError, load_yaml_text

    from pathlib import Path

    if Path(path).exists() and not Path(path).is_file():
        raise LensFileError(f"{path}: not a regular file; camera.lens_file must name OpenCV's intrinsics YAML")
    try:
        if Path(path).stat().st_size > 1024 * 1024:
            raise LensFileError(f"{path}: too large for a lens file (OpenCV's intrinsics YAML is a few hundred bytes)")
        with open(path, encoding="utf-8") as fh:
            text = fh.read()
    except OSError as exc:
        raise LensFileError(f"{path}: cannot read the lens file ({exc.strerror}); check camera.lens_file") from None
    except UnicodeDecodeError:
        raise LensFileError(f"{path}: not a YAML lens file (not UTF-8 text)") from None
    if text.startswith("%YAML"):       # OpenCV's "%YAML:1.0" (not YAML's directive): blanked, so lines keep their numbers
        text = "\n".join("" if line.startswith("%YAML") else line for line in text.split("\n"))
        text = text.replace("!!opencv-matrix", "")
    try:
        data = load_yaml_text(text) or {}
    except YamlTextError as exc:        # the app's YAML rules: a duplicated key is refused with its line, as in a cell file
        raise LensFileError(f"{path}: {exc}") from None
    if not isinstance(data, dict):
        raise LensFileError(f"{path}: not a lens file: needs camera_matrix (3x3) and distortion_coefficients "
                            "(OpenCV's intrinsics YAML)")

    def matrix(value, shape):
        if isinstance(value, dict) and "data" in value:
            value = value["data"]
        arr = np.asarray(value, dtype=float)
        return arr.reshape(shape) if shape else arr.ravel()

    try:
        K = matrix(data.get("camera_matrix", data.get("K")), (3, 3))
        dist = matrix(data.get("distortion_coefficients", data.get("dist")), None)
    except (TypeError, ValueError):
        raise LensFileError(f"{path}: needs camera_matrix (3x3) and distortion_coefficients") from None
    # what OpenCV's calibrateCamera writes: [[fx, s, cx], [0, fy, cy], [0, 0, 1]]; a focal length beyond
    # 1-1e6 px or a coefficient beyond 1e4 is a typo (1e-300 or 1e308 would end in a failed SVD or a
    # calibration of nonsense)
    if (dist.size not in (4, 5, 8, 12, 14) or not np.isfinite(K).all() or not np.isfinite(dist).all()
            or not (_FOCAL_PX[0] <= K[0, 0] <= _FOCAL_PX[1] and _FOCAL_PX[0] <= K[1, 1] <= _FOCAL_PX[1])
            or np.abs(K[:2, 2]).max() > _FOCAL_PX[1] or np.any(K[2] != (0.0, 0.0, 1.0)) or K[1, 0] != 0
            or np.abs(dist).max() > _MAX_COEFFICIENT):
        raise LensFileError(f"{path}: camera_matrix must be 3x3 with positive focal lengths and "
                             f"distortion_coefficients 4, 5, 8, 12 or 14 numbers: [[fx, 0, cx], [0, fy, cy], "
                             f"[0, 0, 1]], fx and fy 1-1e6 px, each coefficient within 1e4")
    made = (data.get("image_width"), data.get("image_height"))
    if any(v is not None for v in made) and not all(
            isinstance(v, (int, float)) and not isinstance(v, bool) and 1 <= v <= 1e5 and float(v).is_integer()
            for v in made):
        raise LensFileError(f"{path}: image_width and image_height must both be whole pixel counts (1-100000), "
                            f"got {made[0]!r} and {made[1]!r}")
    if image_size is not None and all(v is not None for v in made):
        sx, sy = image_size[0] / made[0], image_size[1] / made[1]
        if abs(sx / sy - 1) > 0.01:
            raise LensFileError(f"{path}: made for {made[0]:g}x{made[1]:g} px photos, but the photo is "
                                f"{image_size[0]}x{image_size[1]} px (another aspect ratio: a crop?); give the "
                                "lens file of this camera mode")
        if abs(sx - 1) > 1e-6:
            K = K.copy()
            K[0, :] *= sx
            K[1, :] *= sy
            K[2, :] = [0.0, 0.0, 1.0]
    return OpenCVLens(K, dist)
