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

from gripsight.planning.errors import PlanningError
from gripsight.planning.points import as_n_by_3

__all__ = ["ArcPath", "PathGeometryError", "PathTerms", "StraightPath", "TimeScaling", "path_points", "peak_rate", "time_scaling"]


class PathGeometryError(PlanningError, ValueError):
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


def _cross(a, b) -> tuple[float, float, float]:
    """a x b for two 3-vectors as float tuples (numpy costs many times more for one pair)."""
    return (a[1] * b[2] - a[2] * b[1], a[2] * b[0] - a[0] * b[2], a[0] * b[1] - a[1] * b[0])


def _dot(a, b) -> float:
    return a[0] * b[0] + a[1] * b[1] + a[2] * b[2]


def _fmt(p) -> str:
    return "(" + ", ".join(f"{v:.3f}" for v in p) + ")"


_ZERO = np.zeros(3)


@dataclass(frozen=True)
class PathTerms:
    """A path as p(s) = c + s d + cos(s w) e1 + sin(s w) e2 (straight: c = p0, d = p1 - p0, e1 = e2 = 0,
    w = 0; arc: c = centre, d = 0, e1 and e2 the radius along the arc's frame, w = sweep in rad).

    Each field is one row for every sample, or one row per sample (so the segments of a whole plan are
    evaluated in one pass: see :func:`path_points`).
    """

    c_mm: np.ndarray
    d_mm: np.ndarray
    e1_mm: np.ndarray
    e2_mm: np.ndarray
    sweep_rad: np.ndarray | float


def path_points(terms: PathTerms, s) -> np.ndarray:
    """Points (M, 3) of a path's :class:`PathTerms` at path parameters s (M,), table mm."""
    s = np.asarray(s, dtype=float)
    ang = s * terms.sweep_rad
    return (terms.c_mm + s[:, None] * terms.d_mm + np.cos(ang)[:, None] * terms.e1_mm
            + np.sin(ang)[:, None] * terms.e2_mm)


@dataclass(frozen=True)
class StraightPath:
    """Straight segment p0 -> p1 in table mm; ``points(s)`` is p0 + s (p1 - p0)."""

    p0: np.ndarray
    p1: np.ndarray

    def __post_init__(self):
        object.__setattr__(self, "p0", as_n_by_3(self.p0, one=True, name="p0"))
        object.__setattr__(self, "p1", as_n_by_3(self.p1, one=True, name="p1"))

    @property
    def length_mm(self) -> float:
        return math.dist(self.p1, self.p0)

    def terms(self) -> PathTerms:
        """The path's :class:`PathTerms`."""
        return PathTerms(self.p0, self.p1 - self.p0, _ZERO, _ZERO, 0.0)

    def points(self, s) -> np.ndarray:
        """Points for path parameters s, shape (M,) -> (M, 3), table mm (the ends exact)."""
        return _exact_ends(path_points(self.terms(), s), s, self.p0, self.p1)


def _exact_ends(pts: np.ndarray, s, p0: np.ndarray, p1: np.ndarray) -> np.ndarray:
    s = np.asarray(s, dtype=float)
    pts[s == 0.0] = p0
    pts[s == 1.0] = p1
    return pts


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
        arrays = [as_n_by_3(p, one=True, name=n) for p, n in ((self.p0, "p0"), (self.via, "via"), (self.p1, "p1"))]
        p0, via, p1 = (a.tolist() for a in arrays)
        for (a, na), (b, nb) in (((p0, "p0"), (via, "via")), ((via, "via"), (p1, "p1")), ((p0, "p0"), (p1, "p1"))):
            if math.dist(a, b) < 1e-9:
                raise PathGeometryError(f"arc: {na} {_fmt(a)} and {nb} {_fmt(b)} coincide")
        a = [v - o for v, o in zip(via, p0)]
        b = [v - o for v, o in zip(p1, p0)]
        n = _cross(a, b)
        nn = _dot(n, n)
        if math.sqrt(nn) <= 1e-9 * math.hypot(*a) * math.hypot(*b):
            raise PathGeometryError(f"arc: p0 {_fmt(p0)}, via {_fmt(via)} and p1 {_fmt(p1)} are collinear")
        # circumcentre of the triangle (p0, via, p1), in 3D
        aa, bb = _dot(a, a), _dot(b, b)
        bn, na_ = _cross(b, n), _cross(n, a)
        centre = [o + (aa * u + bb * v) / (2.0 * nn) for o, u, v in zip(p0, bn, na_)]
        radius = math.dist(p0, centre)
        n_len = math.sqrt(nn)
        n_hat = [v / n_len for v in n]
        e1 = [(v - c) / radius for v, c in zip(p0, centre)]
        e2 = _cross(n_hat, e1)
        d1 = [v - c for v, c in zip(p1, centre)]
        sweep = math.atan2(_dot(d1, e2), _dot(d1, e1)) % (2.0 * math.pi)
        object.__setattr__(self, "p0", arrays[0])
        object.__setattr__(self, "via", arrays[1])
        object.__setattr__(self, "p1", arrays[2])
        object.__setattr__(self, "centre", np.array(centre))
        object.__setattr__(self, "radius_mm", radius)
        object.__setattr__(self, "sweep_rad", sweep)
        object.__setattr__(self, "_e1", np.array(e1))
        object.__setattr__(self, "_e2", np.array(e2))

    @property
    def length_mm(self) -> float:
        return self.radius_mm * self.sweep_rad

    def terms(self) -> PathTerms:
        """The path's :class:`PathTerms`."""
        return PathTerms(self.centre, _ZERO, self.radius_mm * self._e1, self.radius_mm * self._e2, self.sweep_rad)

    def points(self, s) -> np.ndarray:
        """Points for path parameters s, shape (M,) -> (M, 3), table mm (the ends exact)."""
        return _exact_ends(path_points(self.terms(), s), s, self.p0, self.p1)
