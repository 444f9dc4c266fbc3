"""Angle helpers: the one ``wrap_angle`` of the project."""

from __future__ import annotations

import numpy as np

__all__ = ["wrap_angle"]


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
    return (np.asarray(angle_rad, dtype=float) + np.pi) % (2.0 * np.pi) - np.pi
