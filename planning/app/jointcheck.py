"""The last pass over a whole joint file before it is written (issue 14, item 2).

Every sample of every plan was checked when it was planned; this pass checks the file as a whole, as
the arm would play it, so that a bug in assembling it (rows of another run, a photo twice, a clock
restarted) can never reach the arm:

- time strictly increasing, one sample period per row (the sample clock),
- every joint's step between consecutive rows within its ``max_speed_deg_s`` over one period,
- the gripper closing only on a ``close`` row and opening only on an ``open`` row (where a plan says so).

A failure is a bug in gripsight, not a user's mistake: the file is not written and the command says so
(:class:`JointFileRefused`, exit code 70, "internal software error" of BSD sysexits.h).
"""

from __future__ import annotations

import csv

import numpy as np

from gripsight.app.errors import GripsightError

__all__ = ["JointFileRefused", "check_joint_file_text", "refusal"]

_CLOCK_TOL_S = 2e-4            # times are written with 4 decimals
_SPEED_TOL_DEG_S = 1e-3        # angles are written with 6 decimals; over 0.02 s that is 5e-5 deg/s


class JointFileRefused(GripsightError):
    """A joint file failed the whole-file check: not written (a bug; please report it)."""


def refusal(name: str, what: str) -> JointFileRefused:
    """The error that refuses to write joint file ``name`` because of ``what``."""
    return JointFileRefused(f"{name}: not written: the whole-file check found {what} "
                            "(a bug in gripsight; please report it with the command you ran)")


def check_joint_file_text(text: str, cell, name: str = "joints.csv") -> int:
    """Check a joint file's text as a whole; return its number of samples.

    Parameters
    ----------
    text : str
        The file as it would be written (comment lines start with ``#``; then the header and rows).
    cell
        The cell (``motion.sample_hz``, ``arm.joints.*.max_speed_deg_s``).
    name : str
        The file's name for the message.

    Raises
    ------
    JointFileRefused
        Naming the row, the value and the limit of the first thing wrong.
    """
    header, columns = _table(text, name)
    if not columns[0]:
        return 0
    col = dict(zip(header, columns))
    try:
        t_s = np.array(list(map(float, col["time_s"])))
        q_deg = np.column_stack([list(map(float, col[c])) for c in ("base_deg", "shoulder_deg", "elbow_deg")])
    except (KeyError, ValueError):
        # the first value that is not a number, in row order (the message names it as it always did)
        try:
            [float(v) for v in col["time_s"]]
            [float(col[c][i]) for i in range(len(columns[0])) for c in ("base_deg", "shoulder_deg", "elbow_deg")]
        except (KeyError, ValueError) as exc:
            raise refusal(name, f"a row that is not numbers where numbers belong ({exc})") from None
        raise
    dt_s = 1.0 / cell.motion.sample_hz
    steps = np.diff(t_s)
    off = np.flatnonzero(np.abs(steps - dt_s) > _CLOCK_TOL_S)
    if off.size:
        i = int(off[0])
        raise refusal(name, f"time going from {t_s[i]:.4f} s to {t_s[i + 1]:.4f} s at row {i + 2} "
                            f"(the sample clock steps {dt_s:g} s)")
    joints = cell.arm.joints
    limit = np.array([joints.base.max_speed_deg_s, joints.shoulder.max_speed_deg_s, joints.elbow.max_speed_deg_s])
    speed = np.abs(np.diff(q_deg, axis=0)) / dt_s
    over = np.argwhere(speed > limit + _SPEED_TOL_DEG_S)
    if over.size:
        i, j = (int(v) for v in over[0])
        joint = ("base", "shoulder", "elbow")[j]
        raise refusal(name, f"{joint} stepping {q_deg[i + 1, j] - q_deg[i, j]:+.3f} deg in {dt_s:g} s at row {i + 2} "
                            f"({speed[i, j]:.1f} deg/s > {limit[j]:g} deg/s)")
    grip, segment = col["gripper"], col["segment"]
    for i in [i for i, (a, b) in enumerate(zip(grip, grip[1:]), start=1) if a != b]:
        planned = {"closed": "close", "open": "open"}.get(grip[i])
        if segment[i] != planned:
            raise refusal(name, f"the gripper turning {grip[i]} at row {i + 1} in a '{segment[i]}' move "
                                "(only a close or open dwell changes it)")
    return len(grip)


def _table(text: str, name: str) -> tuple[list[str], list[list[str]]]:
    """The header and the columns (lists of field texts) of a joint file's text, read as ``csv.reader``
    reads it; a row of another width than the header is refused. A file without quotes, carriage
    returns or NULs (every file gripsight writes) is split on commas in one pass: the same fields, five
    times faster, and no list per row."""
    lines = [line for line in text.split("\n") if line and not line.startswith("#")]
    if not lines:
        raise refusal(name, "no header")
    if '"' in text or "\r" in text or "\x00" in text:
        rows = list(csv.reader(lines))
        header, rows = rows[0], rows[1:]
        widths = [len(r) for r in rows]
    else:
        header, rows = lines[0].split(","), None
        widths = [line.count(",") + 1 for line in lines[1:]]
    n = len(header)
    bad = next((i for i, w in enumerate(widths) if w != n), None)
    if bad is not None:
        raise refusal(name, f"row {bad + 1} with {widths[bad]} fields, not {n}")
    if rows is None:
        cells = ",".join(lines[1:]).split(",") if len(lines) > 1 else []
        return header, [cells[k::n] for k in range(n)]
    return header, [[r[k] for r in rows] for k in range(n)]
