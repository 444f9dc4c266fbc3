"""Benchmark: vectorised closed-form IK against a per-pose numeric IK from ikpy, same targets, one run.

Run:  python tests/bench/bench_ik.py     (not part of the test suite; quote the figures in notes)
"""

from __future__ import annotations

import time

import numpy as np

from gripsight.planning.arm import Arm, Reason
from gripsight.app.cellfile import parse_cell
from tests.conftest import cell_data_with_linkage


def _targets(arm: Arm, n: int, rng) -> np.ndarray:
    lo, hi = arm.limits_rad[:, 0], arm.limits_rad[:, 1]
    q = lo + (hi - lo) * rng.random((4 * n, 3))
    q = q[arm.check_joints(q) == Reason.OK]
    p = arm.forward(q)
    return p[arm.inverse(p).ok][:n]


def _ikpy_chain(arm: Arm):
    """The serial arm as an ikpy URDF-style chain (base yaw, shoulder pitch, elbow pitch, fixed tool)."""
    from ikpy.chain import Chain
    from ikpy.link import OriginLink, URDFLink

    return Chain(name="gripsight", links=[
        OriginLink(),
        URDFLink("base", origin_translation=[0, 0, arm.base_height_mm], origin_orientation=[0, 0, 0],
                 rotation=[0, 0, 1], bounds=tuple(arm.limits_rad[0])),
        URDFLink("shoulder", origin_translation=[arm.shoulder_offset_mm, 0, 0], origin_orientation=[0, 0, 0],
                 rotation=[0, -1, 0], bounds=tuple(arm.limits_rad[1])),
        URDFLink("elbow", origin_translation=[arm.upper_arm_mm, 0, 0], origin_orientation=[0, 0, 0],
                 rotation=[0, -1, 0], bounds=tuple(arm.limits_rad[2])),
        URDFLink("tool", origin_translation=[arm.forearm_mm + arm.tool_reach_mm, 0, -arm.tool_drop_mm],
                 origin_orientation=[0, 0, 0], rotation=None, joint_type="fixed"),
    ], active_links_mask=[False, True, True, True, False])


def main(n: int = 100_000, n_numeric: int = 300, repeats: int = 5) -> None:
    rng = np.random.default_rng(0)
    data = cell_data_with_linkage("serial", level=False)
    arm = Arm.from_config(parse_cell(data).arm)
    targets = _targets(arm, n, rng)

    for kind in ("serial", "parallel", "four_bar"):
        a = Arm.from_config(parse_cell(cell_data_with_linkage(kind)).arm)
        pts = _targets(a, n, rng)
        a.inverse(pts)  # warm up
        best = min(_timed(lambda: a.inverse(pts)) for _ in range(repeats))
        print(f"closed-form IK, {kind:9s}: {len(pts) / best / 1e6:6.2f} M poses/s  ({len(pts)} poses in {best * 1e3:.1f} ms)")

    best = min(_timed(lambda: arm.inverse(targets)) for _ in range(repeats))
    ours = len(targets) / best
    chain = _ikpy_chain(arm)
    q_check = np.radians([[20, 40, -60], [-30, 100, -120]])
    for qi in q_check:  # the ikpy chain is the same arm as ours
        assert np.allclose(chain.forward_kinematics([0, *qi, 0])[:3, 3], arm.forward(qi[None])[0], atol=1e-9)
    subset = targets[:n_numeric]
    t0 = time.perf_counter()
    errors = []
    for p in subset:
        q = chain.inverse_kinematics(target_position=p)
        errors.append(np.linalg.norm(chain.forward_kinematics(q)[:3, 3] - p))
    numeric = len(subset) / (time.perf_counter() - t0)
    print(f"closed-form IK, serial (tool on forearm): {ours / 1e6:.2f} M poses/s")
    print(f"ikpy per-pose numeric IK, same arm:      {numeric:.0f} poses/s "
          f"(median position error {np.median(errors):.3f} mm over {len(subset)} targets)")
    print(f"ratio: {ours / numeric:.0f}x")


def _timed(fn) -> float:
    t0 = time.perf_counter()
    fn()
    return time.perf_counter() - t0


if __name__ == "__main__":
    main()
