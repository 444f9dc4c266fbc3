"""Angle helpers: the one ``wrap_angle`` of the project."""

from __future__ import annotations

import numpy as np

__all__ = ["wrap_angle"]

_TWO_PI = 2.0 * np.pi
_BELOW_PI = np.nextafter(np.pi, 0.0)       # the largest float below pi


def wrap_angle(angle_rad):
    """Wrap angles to [-pi, pi).

    Parameters
    ----------
    angle_rad : float or ndarray
        Angles in radians.

    Returns
    -------
    float or ndarray
        The same angles in [-pi, pi).

    Examples
    --------
    >>> float(wrap_angle(3 * np.pi / 2))
    -1.5707963267948966
    """
    a = np.asarray(angle_rad, dtype=float)
    # floor, not %: numpy's % is several times slower; the clamps keep rounding inside [-pi, pi)
    wrapped = a - _TWO_PI * np.floor((a + np.pi) / _TWO_PI)
    return np.minimum(np.maximum(wrapped, -np.pi), _BELOW_PI)
