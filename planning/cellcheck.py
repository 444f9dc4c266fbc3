"""The one check of a cell's settings against its arm: what the planner would refuse, said before planning.

``gripsight validate``, ``plan``, ``run`` and ``batch`` all call :func:`cell_problems` (the planner at
construction), so a cell that ``validate`` passes is never refused by ``plan`` for the cell's sake.
"""

from __future__ import annotations

import numpy as np

from gripsight.planning.arm import Arm
from gripsight.planning.errors import Problem
from gripsight.planning.held import class_carry_problems

__all__ = ["cell_problems"]


def cell_problems(cell, arm: Arm) -> list[Problem]:
    """Every problem of the cell that makes planning impossible, each with its key path.

    Parameters
    ----------
    cell
        The cell's settings (``bins``, ``motion``), as loaded by the application.
    arm : Arm
        The cell's arm.

    Returns
    -------
    list of Problem
        Empty when the cell can be planned with: every bin reachable at its drop height and at the safe
        height, and the home pose inside the arm's own limits.
    """
    problems: list[Problem] = []
    m = cell.motion
    names = list(cell.bins)
    if names:
        places = [(name, label, z)
                  for name in names
                  for label, z in (("drop", cell.bins[name].z + m.drop_z_mm), ("safe", m.safe_z_mm))]
        xyz_mm = np.array([[cell.bins[n].x, cell.bins[n].y, z] for n, _, z in places], float)
        sol = arm.inverse(xyz_mm)
        labels = sol.reason_labels()
        for (name, label, z), ok, why in zip(places, sol.ok, labels):
            if not ok:
                problems.append(Problem(f"bins.{name}", f"cannot be reached at {label} height (z={z:g} mm): {why}"))
    home_rad = np.radians([[m.home_deg.base, m.home_deg.shoulder, m.home_deg.elbow]])
    if arm.check_joints(home_rad)[0] != 0:
        problems.append(Problem("motion.home_deg", "the home pose breaks the arm's own limits "
                                                   "(joint limits, elbow stop or linkage); choose another"))
    return problems + class_carry_problems(cell, arm)
