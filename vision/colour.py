"""Colour conversions: sRGB <-> linear RGB <-> CIE XYZ (D65) <-> CIELAB, vectorised.

Published definitions: the sRGB transfer function and primaries (IEC 61966-2-1) and CIELAB (CIE 15)
with the D65 reference white. Arrays have the channels last, values in [0, 1] for RGB.
"""

from __future__ import annotations

import numpy as np

__all__ = ["lab_from_srgb", "srgb_from_lab", "linear_from_srgb", "srgb_from_linear",
           "xyz_from_linear", "linear_from_xyz", "lab_from_xyz", "xyz_from_lab", "D65_WHITE"]

# IEC 61966-2-1 sRGB primaries, D65
_M_XYZ_FROM_LINEAR = np.array([[0.4124564, 0.3575761, 0.1804375],
                               [0.2126729, 0.7151522, 0.0721750],
                               [0.0193339, 0.1191920, 0.9503041]])
_M_LINEAR_FROM_XYZ = np.linalg.inv(_M_XYZ_FROM_LINEAR)
D65_WHITE = _M_XYZ_FROM_LINEAR @ np.ones(3)     # the XYZ of linear RGB (1, 1, 1)
_DELTA = 6.0 / 29.0


def linear_from_srgb(rgb):
    """sRGB-encoded values in [0, 1] -> linear light."""
    c = np.asarray(rgb, dtype=float)
    return np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)


def srgb_from_linear(rgb):
    """Linear light -> sRGB-encoded values (clipped to [0, 1])."""
    c = np.clip(np.asarray(rgb, dtype=float), 0.0, 1.0)
    return np.where(c <= 0.0031308, 12.92 * c, 1.055 * c ** (1 / 2.4) - 0.055)


def xyz_from_linear(rgb):
    return np.asarray(rgb, dtype=float) @ _M_XYZ_FROM_LINEAR.T


def linear_from_xyz(xyz):
    return np.asarray(xyz, dtype=float) @ _M_LINEAR_FROM_XYZ.T


def _f(t):
    return np.where(t > _DELTA ** 3, np.cbrt(t), t / (3 * _DELTA ** 2) + 4.0 / 29.0)


def _f_inv(t):
    return np.where(t > _DELTA, t ** 3, 3 * _DELTA ** 2 * (t - 4.0 / 29.0))


def lab_from_xyz(xyz, white=D65_WHITE):
    xyz = np.asarray(xyz, dtype=float) / white
    fx, fy, fz = _f(xyz[..., 0]), _f(xyz[..., 1]), _f(xyz[..., 2])
    return np.stack([116 * fy - 16, 500 * (fx - fy), 200 * (fy - fz)], axis=-1)


def xyz_from_lab(lab, white=D65_WHITE):
    lab = np.asarray(lab, dtype=float)
    fy = (lab[..., 0] + 16) / 116
    fx = fy + lab[..., 1] / 500
    fz = fy - lab[..., 2] / 200
    return np.stack([_f_inv(fx), _f_inv(fy), _f_inv(fz)], axis=-1) * white


def lab_from_srgb(rgb):
    """sRGB in [0, 1] (..., 3) -> CIELAB (..., 3), D65."""
    return lab_from_xyz(xyz_from_linear(linear_from_srgb(rgb)))


def srgb_from_lab(lab):
    """CIELAB (..., 3) -> sRGB in [0, 1] (..., 3), clipped to the gamut."""
    return srgb_from_linear(linear_from_xyz(xyz_from_lab(lab)))
