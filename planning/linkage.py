"""Position analysis of the elbow four-bar, in closed form both ways, vectorised.

The forearm of a tabletop arm is often driven from a servo on the shoulder axis through a four-bar:
crank on the shoulder axis, coupler, and a short rocker on the forearm's rear extension. In the arm's
vertical plane, with ``u(t) = (cos t, sin t)``, the shoulder axis ``O`` at the origin::

    E = L2 u(shoulder)             elbow (end of the upper arm)
    A = -crank u(crank_angle)      crank tip (the horn points back)
    B = E - rocker u(psi)          rocker point on the forearm's rear extension
    |A - B| = coupler              loop closure

The upper arm O-E is the four-bar's "ground" link (it moves, but the four-bar lives on it).

Forward (crank -> forearm elevation psi): with ``V = A - E``, closure is
``V . u(psi) = (coupler^2 - rocker^2 - |V|^2) / (2 rocker)``, so ``psi = atan2(V) +/- acos(. / |V|)``.
Inverse (psi -> crank): with ``B`` known, ``B . u(crank) = (coupler^2 - crank^2 - |B|^2) / (2 crank)``.

Assembly modes: the two solutions for B are mirror images across the line E-A. ``open`` is the one where
that line separates O and B (the quadrilateral O-E-B-A is not crossed there); ``crossed`` is the other.
A parallelogram (crank = rocker, coupler = upper arm) in the open mode gives ``psi = crank_angle`` on
both elbow branches, which is how the ``parallel`` linkage is modelled.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["FourBar", "grashof_class"]

_EPS = 1e-12


def _wrap(angle_rad):
    return (angle_rad + np.pi) % (2.0 * np.pi) - np.pi


def _cross(ax, az, bx, bz):
    return ax * bz - az * bx


@dataclass(frozen=True)
class FourBar:
    """Elbow four-bar lengths in mm and assembly mode (``crossed`` False means open)."""

    upper_arm_mm: float
    crank_mm: float
    coupler_mm: float
    rocker_mm: float
    crossed: bool = False

    def _open_mask(self, ex, ez, axx, az, bx, bz):
        """True where line E->A separates O (origin) and B."""
        vx, vz = axx - ex, az - ez
        side_o = _cross(vx, vz, -ex, -ez)
        side_b = _cross(vx, vz, bx - ex, bz - ez)
        return side_o * side_b < 0

    def forearm_rad(self, shoulder_rad, crank_rad):
        """Forearm elevation psi for given shoulder and crank angles.

        Parameters
        ----------
        shoulder_rad, crank_rad : ndarray, shape (N,)
            Upper-arm elevation and crank angle from horizontal, radians.

        Returns
        -------
        ndarray, shape (N,)
            Forearm elevation in radians; NaN where the linkage cannot assemble.
        """
        th1 = np.asarray(shoulder_rad, dtype=float)
        th2 = np.asarray(crank_rad, dtype=float)
        l2, c, k, rho = self.upper_arm_mm, self.crank_mm, self.coupler_mm, self.rocker_mm
        ex, ez = l2 * np.cos(th1), l2 * np.sin(th1)
        axx, az = -c * np.cos(th2), -c * np.sin(th2)
        vx, vz = axx - ex, az - ez
        vn = np.hypot(vx, vz)
        with np.errstate(divide="ignore", invalid="ignore"):
            cos_d = (k * k - rho * rho - vn * vn) / (2.0 * rho * vn)
        ok = np.abs(cos_d) <= 1.0 + 1e-12
        delta = np.arccos(np.clip(cos_d, -1.0, 1.0))
        phi = np.arctan2(vz, vx)
        psi_plus = phi + delta
        bx, bz = ex - rho * np.cos(psi_plus), ez - rho * np.sin(psi_plus)
        plus_open = self._open_mask(ex, ez, axx, az, bx, bz)
        psi = np.where(plus_open != self.crossed, psi_plus, phi - delta)
        psi = _wrap(psi)
        return np.where(ok & (vn > _EPS), psi, np.nan)

    def convex_mask(self, shoulder_rad, crank_rad, forearm_rad) -> np.ndarray:
        """True where the quadrilateral O-E-B-A is convex: A and E on opposite sides of line O-B.

        For a given psi there are two crank positions, mirror images across line O-B; the convex one is
        the parallelogram's side and the one :meth:`crank_rad` returns.
        """
        th1 = np.asarray(shoulder_rad, dtype=float)
        th2 = np.asarray(crank_rad, dtype=float)
        psi = np.asarray(forearm_rad, dtype=float)
        l2, c, rho = self.upper_arm_mm, self.crank_mm, self.rocker_mm
        ex, ez = l2 * np.cos(th1), l2 * np.sin(th1)
        bx, bz = ex - rho * np.cos(psi), ez - rho * np.sin(psi)
        ax, az = -c * np.cos(th2), -c * np.sin(th2)
        return _cross(bx, bz, ax, az) * _cross(bx, bz, ex, ez) < 0

    def crank_rad(self, shoulder_rad, forearm_rad):
        """Crank angle that puts the forearm at elevation psi, in this assembly mode.

        Of the two closed-form candidates, those whose quadrilateral is in this assembly mode reproduce
        psi through :meth:`forearm_rad`; of those the convex one (see :meth:`convex_mask`) is taken.

        Parameters
        ----------
        shoulder_rad, forearm_rad : ndarray, shape (N,)
            Upper-arm and forearm elevation from horizontal, radians.

        Returns
        -------
        ndarray, shape (N,)
            Crank angle in radians; NaN where no crank angle gives psi.
        """
        th1 = np.asarray(shoulder_rad, dtype=float)
        psi = np.asarray(forearm_rad, dtype=float)
        l2, c, k, rho = self.upper_arm_mm, self.crank_mm, self.coupler_mm, self.rocker_mm
        bx = l2 * np.cos(th1) - rho * np.cos(psi)
        bz = l2 * np.sin(th1) - rho * np.sin(psi)
        bn = np.hypot(bx, bz)
        with np.errstate(divide="ignore", invalid="ignore"):
            cos_d = (k * k - c * c - bn * bn) / (2.0 * c * bn)
        ok = (np.abs(cos_d) <= 1.0 + 1e-12) & (bn > _EPS)
        delta = np.arccos(np.clip(cos_d, -1.0, 1.0))
        phi = np.arctan2(bz, bx)
        candidates = _wrap(np.stack([phi + delta, phi - delta]))                  # (2, N)
        ax, az = -c * np.cos(candidates), -c * np.sin(candidates)
        ex, ez = l2 * np.cos(th1), l2 * np.sin(th1)
        # a candidate is valid if its quadrilateral has this assembly mode (see forearm_rad)
        valid = ok & (self._open_mask(ex, ez, ax, az, bx, bz) != self.crossed)
        convex = _cross(bx, bz, ax, az) * _cross(bx, bz, ex, ez) < 0
        score = np.where(valid, np.where(convex, 0, 1), 2)
        pick = np.argmin(score, axis=0)
        crank = np.take_along_axis(candidates, pick[None], axis=0)[0]
        return np.where(valid.any(axis=0), crank, np.nan)


def grashof_class(ground_mm: float, crank_mm: float, coupler_mm: float, rocker_mm: float) -> str:
    """Grashof classification of a four-bar (Grashof condition s + l <= p + q).

    Returns one of ``double-crank``, ``crank-rocker``, ``rocker-crank``, ``double-rocker`` (Grashof, by
    which link is shortest), ``change-point`` (s + l = p + q, e.g. a parallelogram) or ``triple-rocker`` (non-Grashof).
    Classification as in standard mechanism texts (e.g. Norton, Design of Machinery, ch. 2; from memory).
    """
    links = {"ground": ground_mm, "crank": crank_mm, "coupler": coupler_mm, "rocker": rocker_mm}
    lengths = sorted(links.values())
    s, p, q, l_ = lengths
    total = s + l_ - (p + q)
    scale = max(lengths)
    if abs(total) <= 1e-9 * scale:
        return "change-point"
    if total > 0:
        return "triple-rocker"
    shortest = min(links, key=links.get)
    return {"ground": "double-crank", "crank": "crank-rocker",
            "coupler": "double-rocker", "rocker": "rocker-crank"}[shortest]
