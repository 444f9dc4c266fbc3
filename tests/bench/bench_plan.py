"""Benchmark: planning 20 picks on the demo cell (every sample through IK and every check).

Run:  python -m tests.bench.bench_plan               (20 parts, best and median of 5 runs)
      python -m tests.bench.bench_plan --parts 100   (a full table, parts 20 mm apart: one run, no warm-up)

The area (x 120-330 mm, r 130-340 mm) holds some 35 parts 40 mm apart at random; more parts are
placed 20 mm apart (centres; footprints may then touch, and such picks are rightly rejected).
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from gripsight.app.cellfile import load_cell
from gripsight.planning.picks import Planner
from gripsight.app.partsfile import parse_parts
from tests.conftest import SAMPLE_CELL


def bench_parts(cell, n_parts: int, seed: int = 0, apart_mm: float = 40.0):
    """``n_parts`` parts at reachable positions in the work area, at least ``apart_mm`` apart as on a real
    table, random classes and yaws."""
    rng = np.random.default_rng(seed)
    entries = []
    placed: list[tuple[float, float]] = []
    for _ in range(1000 * n_parts):
        if len(entries) == n_parts:
            break
        x, y = rng.uniform(120, 330), rng.uniform(-190, 190)
        if 130 < np.hypot(x, y) < 340 and all(np.hypot(x - a, y - b) > apart_mm for a, b in placed):
            placed.append((x, y))
            entries.append({"class": str(rng.choice(list(cell.parts))), "x_mm": float(x), "y_mm": float(y),
                            "yaw_deg": float(rng.uniform(-45, 45))})
    if len(entries) < n_parts:
        raise ValueError(f"{n_parts} parts do not fit {apart_mm:g} mm apart in the bench's area (try --apart)")
    return parse_parts(entries, cell)


def main(n_parts: int = 20, repeats: int = 5, warm_up: bool = True, apart_mm: float = 40.0) -> None:
    cell = load_cell(SAMPLE_CELL)
    planner = Planner(cell)
    parts = bench_parts(cell, n_parts, apart_mm=apart_mm)
    if warm_up:
        planner.plan(parts)
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
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--parts", type=int, default=20, help="parts on the table (default 20)")
    ap.add_argument("--apart", type=float, default=None, help="least distance between part centres, mm "
                    "(default 40, or 20 from 50 parts)")
    ap.add_argument("--repeats", type=int, default=None, help="timed runs (default 5, or 1 from 50 parts)")
    args = ap.parse_args()
    big = args.parts >= 50
    main(args.parts, args.repeats or (1 if big else 5), warm_up=not big, apart_mm=args.apart or (20.0 if big else 40.0))
