"""Benchmark: planning 20 picks on the demo cell (every sample through IK and every check).

Run:  python -m tests.bench.bench_plan
"""

from __future__ import annotations

import time

import numpy as np

from gripsight.app.cellfile import load_cell
from gripsight.planning.picks import Planner
from gripsight.app.partsfile import parse_parts
from tests.conftest import SAMPLE_CELL


def main(n_parts: int = 20, repeats: int = 5) -> None:
    cell = load_cell(SAMPLE_CELL)
    planner = Planner(cell)
    rng = np.random.default_rng(0)
    entries = []
    placed: list[tuple[float, float]] = []
    while len(entries) < n_parts:   # reachable positions in the work area, parts apart as on a real table
        x, y = rng.uniform(120, 330), rng.uniform(-190, 190)
        if 130 < np.hypot(x, y) < 340 and all(np.hypot(x - a, y - b) > 40 for a, b in placed):
            placed.append((x, y))
            entries.append({"class": str(rng.choice(list(cell.parts))), "x_mm": float(x), "y_mm": float(y),
                            "yaw_deg": float(rng.uniform(-45, 45))})
    parts = parse_parts(entries, cell)
    planner.plan(parts)  # warm up
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        plan = planner.plan(parts)
        times.append(time.perf_counter() - t0)
    n = len(plan.samples.t_s)
    print(f"planned {len(plan.picks)}/{n_parts} picks, {n} samples ({plan.cycle_s:.1f} s of motion)")
    print(f"planning time: best {min(times) * 1e3:.1f} ms, median {np.median(times) * 1e3:.1f} ms "
          f"over {repeats} runs")


if __name__ == "__main__":
    main()
