"""Colour conversions: sRGB <-> linear RGB <-> CIE XYZ (D65) <-> CIELAB, vectorised.

Published definitions: the sRGB transfer function and primaries (IEC 61966-2-1) and CIELAB (CIE 15)
with the D65 reference white. Arrays have the channels last, values in [0, 1] for RGB.
"""

from __future__ import annotations

import numpy as np

__all__ = ["lab_from_srgb", "srgb_from_lab", "linear_from_srgb", "srgb_from_linear",
           "xyz_from_linear", "linear_from_xyz", "lab_from_xyz", "xyz_from_lab", "D65_WHITE", "delta_e_2000"]

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


def _seventh_power(x):
    x2 = x * x
    return x2 * x2 * x2 * x          # by products: a float power is slow


def delta_e_2000(lab1, lab2, kL: float = 1.0, kC: float = 1.0, kH: float = 1.0):
    """CIEDE2000 colour difference (CIE 142-2001), vectorised with broadcasting over leading axes.

    Implemented as written out by Sharma, Wu & Dalal, "The CIEDE2000 color-difference formula:
    implementation notes, supplementary test data, and mathematical observations" (2005), including
    their notes on hue angles when a chroma is zero and on the mean hue across 0/360 degrees. Written
    with products, square roots and boolean factors: np.hypot, np.degrees, % and np.where are several
    times slower than the arithmetic they stand for, and float32 input stays float32.
    """
    dtype = np.result_type(np.asarray(lab1).dtype, np.asarray(lab2).dtype, np.float32)   # float32 stays
    f = dtype.type                    # constants multiplying booleans must carry the dtype
    lab1 = np.asarray(lab1, dtype=dtype)
    lab2 = np.asarray(lab2, dtype=dtype)
    L1, a1, b1 = lab1[..., 0], lab1[..., 1], lab1[..., 2]
    L2, a2, b2 = lab2[..., 0], lab2[..., 1], lab2[..., 2]
    deg, rad = f(180.0 / np.pi), f(np.pi / 180.0)
    c_mean = 0.5 * (np.sqrt(a1 * a1 + b1 * b1) + np.sqrt(a2 * a2 + b2 * b2))
    c7 = _seventh_power(c_mean)
    g1 = 1.5 - 0.5 * np.sqrt(c7 / (c7 + 25.0 ** 7))          # 1 + G
    a1p, a2p = g1 * a1, g1 * a2
    c1p, c2p = np.sqrt(a1p * a1p + b1 * b1), np.sqrt(a2p * a2p + b2 * b2)
    h1p = np.arctan2(b1, a1p) * deg
    h2p = np.arctan2(b2, a2p) * deg
    h1p += f(360.0) * (h1p < 0)                              # [0, 360)
    h2p += f(360.0) * (h2p < 0)
    cc = c1p * c2p
    chromatic = cc != 0
    dh = h2p - h1p
    far = np.abs(dh) > 180.0
    dh -= f(360.0) * far * np.sign(dh)                       # (-180, 180]
    dh *= chromatic                                          # a zero chroma's hue never counts
    dHp = 2.0 * np.sqrt(cc) * np.sin(dh * (rad / 2.0))
    hsum = h1p + h2p
    # mean hue: half the sum, moved by 180 when the hues are more than 180 apart (Sharma et al. 2005)
    hp = 0.5 * hsum + f(180.0) * far * (f(1.0) - f(2.0) * (hsum >= 360.0))
    hp = np.where(chromatic, hp, hsum)
    hr = hp * rad
    t = (1.0 - 0.17 * np.cos(hr - 30.0 * rad) + 0.24 * np.cos(2.0 * hr)
         + 0.32 * np.cos(3.0 * hr + 6.0 * rad) - 0.20 * np.cos(4.0 * hr - 63.0 * rad))
    q = (hp - 275.0) / 25.0
    Cp = 0.5 * (c1p + c2p)
    cp7 = _seventh_power(Cp)
    rt = -2.0 * np.sqrt(cp7 / (cp7 + 25.0 ** 7)) * np.sin((60.0 * rad) * np.exp(-q * q))
    Lm = 0.5 * (L1 + L2) - 50.0
    lq = Lm * Lm
    sl = 1.0 + 0.015 * lq / np.sqrt(20.0 + lq)
    tl = (L2 - L1) / (kL * sl)
    tc = (c2p - c1p) / (kC * (1.0 + 0.045 * Cp))
    th = dHp / (kH * (1.0 + 0.015 * Cp * t))
    return np.sqrt(tl * tl + tc * tc + th * th + rt * tc * th)
