"""The one validator of (N, 3) arrays (table points, joint angles) at the planning library's edge."""

from __future__ import annotations

import math

import numpy as np

__all__ = ["as_n_by_3"]


def as_n_by_3(values, name: str = "xyz_mm", one: bool = False) -> np.ndarray:
    """Rows of three (points in mm, joint angles) as float64: shape (N, 3) (a single (3,) point becomes (1, 3)), or (3,) with ``one``.

    Raises
    ------
    ValueError
        Naming ``name`` with the expected and actual shape, or the non-finite values of a single point.
    """
    arr = np.asarray(values, dtype=float)
    if one:
        if arr.shape != (3,):
            raise ValueError(f"{name}: expected shape (3,), got {arr.shape}")
        if not all(math.isfinite(v) for v in arr.tolist()):
            raise ValueError(f"{name}: must be finite, got {arr.tolist()}")
        return arr
    if arr.ndim == 1 and arr.shape[0] == 3:
        arr = arr[None, :]
    if arr.ndim != 2 or arr.shape[1] != 3:
        raise ValueError(f"{name}: expected shape (N, 3), got {arr.shape}")
    return arr
