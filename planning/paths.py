"""Tool-path primitives and time scaling.

Geometry and timing are separate: :class:`StraightPath` and :class:`ArcPath` map a path parameter
s in [0, 1] to table points (mm, table frame); :func:`time_scaling` maps normalised time tau = t / T in
[0, 1] to s, with its first and second derivatives. Published forms (Lynch & Park, Modern Robotics,
2017, sec. 9.2):

- cubic:     s = 3 tau^2 - 2 tau^3                      peak s' = 1.5 at tau = 1/2, peak |s''| = 6
- quintic:   s = 10 tau^3 - 15 tau^4 + 6 tau^5          peak s' = 1.875, peak |s''| = 10 / sqrt(3)
- trapezoid: constant acceleration for the first third, cruise, constant deceleration for the last
  third: peak s' = 1.5, |s''| = 4.5 (the usual choice v T / L = 1.5 of the trapezoidal profile).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from enum import Enum

import numpy as np

from planning.errors import GripsightError

__all__ = ["ArcPath", "PathGeometryError", "StraightPath", "TimeScaling", "time_scaling", "peak_rate"]


class PathGeometryError(GripsightError, ValueError):
    """Points that do not define the requested path (coincident or collinear)."""


class TimeScaling(str, Enum):
    CUBIC = "cubic"
    QUINTIC = "quintic"
    TRAPEZOID = "trapezoid"


_TRAPEZOID_ACCEL_FRACTION = 1.0 / 3.0

# peak s'(tau) of each scaling, for sizing the duration from a top speed
_PEAK_RATE = {TimeScaling.CUBIC: 1.5, TimeScaling.QUINTIC: 1.875,
              TimeScaling.TRAPEZOID: 1.0 / (1.0 - _TRAPEZOID_ACCEL_FRACTION)}


def peak_rate(kind: TimeScaling | str) -> float:
    """Peak of ds/dtau for a time scaling (1.5 cubic, 1.875 quintic, 1.5 trapezoid)."""
    return _PEAK_RATE[TimeScaling(kind)]


def time_scaling(kind: TimeScaling | str, tau) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Path parameter s and its derivatives ds/dtau, d2s/dtau2 at normalised times tau in [0, 1].

    Parameters
    ----------
    kind : TimeScaling or {'cubic', 'quintic', 'trapezoid'}
        Unknown names raise ``ValueError`` (no silent fallback).
    tau : array_like, shape (M,)
        Normalised time t / T; clipped to [0, 1].

    Returns
    -------
    s, ds, dds : ndarray, shape (M,)
        To get time derivatives divide ds by T and dds by T**2.
    """
    kind = TimeScaling(kind)
    t = np.clip(np.asarray(tau, dtype=float), 0.0, 1.0)
    if kind is TimeScaling.CUBIC:
        return 3 * t**2 - 2 * t**3, 6 * t - 6 * t**2, 6 - 12 * t
    if kind is TimeScaling.QUINTIC:
        return (10 * t**3 - 15 * t**4 + 6 * t**5, 30 * t**2 - 60 * t**3 + 30 * t**4,
                60 * t - 180 * t**2 + 120 * t**3)
    ta = _TRAPEZOID_ACCEL_FRACTION
    v = 1.0 / (1.0 - ta)
    a = v / ta
    up, down = t < ta, t > 1.0 - ta
    s = np.where(up, 0.5 * a * t**2, np.where(down, 1.0 - 0.5 * a * (1.0 - t) ** 2, v * t - 0.5 * v * ta))
    ds = np.where(up, a * t, np.where(down, a * (1.0 - t), v))
    dds = np.where(up, a, np.where(down, -a, 0.0))
    return s, ds, dds


def _as_point(p, name: str) -> np.ndarray:
    arr = np.asarray(p, dtype=float)
    if arr.shape != (3,):
        raise ValueError(f"{name}: expected shape (3,), got {arr.shape}")
    if not np.isfinite(arr).all():
        raise ValueError(f"{name}: must be finite, got {arr.tolist()}")
    return arr


def _cross(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """a x b for two 3-vectors (np.cross costs many times more for one pair)."""
    return np.array([a[1] * b[2] - a[2] * b[1], a[2] * b[0] - a[0] * b[2], a[0] * b[1] - a[1] * b[0]])


def _fmt(p: np.ndarray) -> str:
    return "(" + ", ".join(f"{v:.3f}" for v in p) + ")"


@dataclass(frozen=True)
class StraightPath:
    """Straight segment p0 -> p1 in table mm; ``points(s)`` is p0 + s (p1 - p0)."""

    p0: np.ndarray
    p1: np.ndarray

    def __post_init__(self):
        object.__setattr__(self, "p0", _as_point(self.p0, "p0"))
        object.__setattr__(self, "p1", _as_point(self.p1, "p1"))

    @property
    def length_mm(self) -> float:
        return math.dist(self.p1, self.p0)

    def points(self, s) -> np.ndarray:
        """Points for path parameters s, shape (M,) -> (M, 3), table mm."""
        s = np.asarray(s, dtype=float)[:, None]
        return self.p0 + s * (self.p1 - self.p0)


@dataclass(frozen=True)
class ArcPath:
    """Circular arc from p0 through ``via`` to p1 (table mm).

    The circle is the circumcircle of the three points, in their plane with normal
    n = (via - p0) x (p1 - p0). In the arc's own frame (e1 toward p0 from the centre, e2 = n x e1) the
    end angle comes from atan2 and is taken in [0, 2 pi): the sweep runs positively about n, which is
    the way that passes the via point, so there is no ambiguity (sweeps over 180 degrees included).

    Raises
    ------
    PathGeometryError
        If two points coincide or the three are collinear (the error names them).
    """

    p0: np.ndarray
    via: np.ndarray
    p1: np.ndarray
    centre: np.ndarray = field(init=False)
    radius_mm: float = field(init=False)
    sweep_rad: float = field(init=False)
    _e1: np.ndarray = field(init=False, repr=False)
    _e2: np.ndarray = field(init=False, repr=False)

    def __post_init__(self):
        p0, via, p1 = (_as_point(p, n) for p, n in ((self.p0, "p0"), (self.via, "via"), (self.p1, "p1")))
        for (a, na), (b, nb) in (((p0, "p0"), (via, "via")), ((via, "via"), (p1, "p1")), ((p0, "p0"), (p1, "p1"))):
            if math.dist(a, b) < 1e-9:
                raise PathGeometryError(f"arc: {na} {_fmt(a)} and {nb} {_fmt(b)} coincide")
        a, b = via - p0, p1 - p0
        n = _cross(a, b)
        nn = float(np.dot(n, n))
        scale = math.hypot(*a) * math.hypot(*b)
        if np.sqrt(nn) <= 1e-9 * scale:
            raise PathGeometryError(f"arc: p0 {_fmt(p0)}, via {_fmt(via)} and p1 {_fmt(p1)} are collinear")
        # circumcentre of the triangle (p0, via, p1), in 3D
        centre = p0 + (np.dot(a, a) * _cross(b, n) + np.dot(b, b) * _cross(n, a)) / (2.0 * nn)
        n_hat = n / np.sqrt(nn)
        e1 = (p0 - centre) / math.dist(p0, centre)
        e2 = _cross(n_hat, e1)
        d1 = p1 - centre
        sweep = float(np.arctan2(np.dot(d1, e2), np.dot(d1, e1))) % (2.0 * np.pi)
        object.__setattr__(self, "p0", p0)
        object.__setattr__(self, "via", via)
        object.__setattr__(self, "p1", p1)
        object.__setattr__(self, "centre", centre)
        object.__setattr__(self, "radius_mm", math.dist(p0, centre))
        object.__setattr__(self, "sweep_rad", sweep)
        object.__setattr__(self, "_e1", e1)
        object.__setattr__(self, "_e2", e2)

    @property
    def length_mm(self) -> float:
        return self.radius_mm * self.sweep_rad

    def points(self, s) -> np.ndarray:
        """Points for path parameters s, shape (M,) -> (M, 3), table mm."""
        ang = np.asarray(s, dtype=float)[:, None] * self.sweep_rad
        pts = self.centre + self.radius_mm * (np.cos(ang) * self._e1 + np.sin(ang) * self._e2)
        # exact end points (no rounding drift at s = 0 and s = 1)
        s_flat = np.asarray(s, dtype=float)
        pts[s_flat == 0.0] = self.p0
        pts[s_flat == 1.0] = self.p1
        return pts
