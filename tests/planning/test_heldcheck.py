"""The chain-wide held-part check (planning.heldcheck) gives exactly what a straightforward loop gives:
every held segment, every obstacle, every sample (the check as first written), on random seeded cases."""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest

from gripsight.planning.checks import Check, Rejection
from gripsight.planning.held import Obstacle, _separated_xy, footprint_outline_mm
from gripsight.planning.heldcheck import HeldSpec, ObstacleSet, held_part_failure, separated_pairs


def _plain_separated(a: np.ndarray, b: np.ndarray) -> bool:
    """Two convex outlines apart: plain loops over both outlines' edge normals."""
    for poly in (a, b):
        for i in range(len(poly)):
            ex, ey = poly[(i + 1) % len(poly)] - poly[i]
            nx, ny = -ey, ex
            pa = [nx * x + ny * y for x, y in a]
            pb = [nx * x + ny * y for x, y in b]
            if max(pa) <= min(pb) or max(pb) <= min(pa):
                return True
    return False


def _reference(chain, specs, t0_s=0.0):
    """The per-segment, per-obstacle loop (the held-part check as first written)."""
    seg_t0 = t0_s + np.concatenate([[0.0], np.cumsum(chain.durations_s[:-1])])
    for k, spec in enumerate(specs):
        if spec is None:
            continue
        i0, i1 = int(chain.starts[k]), int(chain.starts[k + 1])
        xyz = chain.xyz_mm[i0:i1]
        if not len(xyz):
            continue
        t_s = seg_t0[k] + chain.t_s[i0:i1]
        kind = chain.segments[k].kind.value
        bottom, top = xyz[:, 2] - spec.hang_mm, xyz[:, 2] + spec.top_mm
        found = []
        floor = -1e-6 if spec.floor_mm is None else spec.floor_mm - 1e-9
        low = np.flatnonzero(bottom < floor)
        if low.size:
            i = int(low[0])
            what = ("the table" if spec.floor_mm is None else "the tray floor" if kind == "descend"
                    else "the table, trays and markers it passes")
            limit = 0.0 if spec.floor_mm is None else spec.floor_mm
            found.append((i, Rejection(Check.HELD_PART, f"part {spec.part.id} ({spec.part.height_mm:g} mm tall) would "
                                       f"hang to z={bottom[i]:.1f} mm, below {limit:g} mm over {what}",
                                       kind, float(t_s[i]), float(bottom[i]), limit, "mm")))
        turn = chain.joints_rad[i0:i1, 0] - spec.base_grip_rad
        c, s = np.cos(turn), np.sin(turn)
        local = spec.outline_xy_mm
        held_xy = np.stack([c[:, None] * local[:, 0] - s[:, None] * local[:, 1],
                            s[:, None] * local[:, 0] + c[:, None] * local[:, 1]], -1) + xyz[:, None, :2]
        for j in np.flatnonzero(spec.obstacle_mask):
            ob = spec.obstacles
            z_hi, clear, z_lo = float(ob.z_hi_mm[j]), float(ob.clearance_mm[j]), float(ob.z_lo_mm[j])
            outline = OBSTACLES[j].outline_xy_mm
            hits = [i for i in range(len(xyz)) if bottom[i] < z_hi + clear - 1e-9 and top[i] > z_lo
                    and not _plain_separated(held_xy[i], outline)]
            if hits:
                i = hits[0]
                top_txt = f"top z={z_hi:g} mm" + (f" + {clear:g} mm" if clear else "")
                found.append((i, Rejection(Check.HELD_PART, f"part {spec.part.id} (bottom at z={bottom[i]:.1f} mm) "
                                           f"would hit {ob.names[j]} ({top_txt}) at ({xyz[i, 0]:.1f}, {xyz[i, 1]:.1f}) mm",
                                           kind, float(t_s[i]), float(bottom[i]), z_hi + clear, "mm")))
        if found:
            return k, min(found, key=lambda f: f[0])[1]
    return None


OBSTACLES: list[Obstacle] = []


def _random_case(rng):
    """A chain of random segments (random walks in xyz and base angle) and random obstacles around it."""
    OBSTACLES.clear()
    for j in range(int(rng.integers(1, 12))):
        round_ = bool(rng.random() < 0.4)
        outline = footprint_outline_mm(rng.uniform(10, 40), rng.uniform(10, 40), rng.uniform(-90, 90), round_)
        OBSTACLES.append(Obstacle(f"part o{j}", outline + rng.uniform(-60, 60, 2), -np.inf if rng.random() < 0.7 else
                                  rng.uniform(0, 20), rng.uniform(5, 60), float(rng.choice([0.0, 2.0]))))
    obs = ObstacleSet.of(OBSTACLES)
    n_seg = int(rng.integers(1, 8))
    counts = rng.integers(0, 40, n_seg)
    starts = np.concatenate([[0], np.cumsum(counts)])
    n = int(starts[-1])
    xyz = np.cumsum(rng.normal(0, 4, (n, 3)), axis=0) + [0, 0, 40]
    joints = np.cumsum(rng.normal(0, 0.05, (n, 3)), axis=0)
    kinds = [SimpleNamespace(kind=SimpleNamespace(value=str(rng.choice(["rise", "transfer", "descend"]))))
             for _ in range(n_seg)]
    chain = SimpleNamespace(starts=starts, xyz_mm=xyz, joints_rad=joints, t_s=np.arange(n) * 0.02,
                            durations_s=rng.uniform(0.1, 1.0, n_seg), segments=kinds)
    specs = []
    for k in range(n_seg):
        if rng.random() < 0.25:
            specs.append(None)
            continue
        round_ = bool(rng.random() < 0.4)
        part = SimpleNamespace(id=f"p{k}", height_mm=float(rng.uniform(15, 60)))
        specs.append(HeldSpec(part, part.height_mm - 8.0, 8.0, float(rng.uniform(-1, 1)),
                              None if rng.random() < 0.3 else float(rng.uniform(-30, 10)),
                              footprint_outline_mm(rng.uniform(10, 40), rng.uniform(10, 40), rng.uniform(-90, 90), round_),
                              obs, rng.random(len(obs)) < 0.8))
    return chain, specs


@pytest.mark.parametrize("seed", range(300))
def test_chain_check_equals_plain_loop(seed):
    chain, specs = _random_case(np.random.default_rng(seed))
    assert held_part_failure(chain, specs, 1.5) == _reference(chain, specs, 1.5)


def test_pairwise_test_equals_plain_and_per_obstacle_tests():
    rng = np.random.default_rng(7)
    for _ in range(2000):
        a = footprint_outline_mm(*rng.uniform(5, 40, 2), rng.uniform(-90, 90), bool(rng.random() < 0.4))
        b = footprint_outline_mm(*rng.uniform(5, 40, 2), rng.uniform(-90, 90), bool(rng.random() < 0.4))
        a = a + rng.uniform(-40, 40, 2)
        obs = ObstacleSet.of([Obstacle("o", b, 0.0, 1.0)])
        fast = bool(separated_pairs(a[None], obs.outline_xy_mm, obs.normals_xy)[0])
        assert fast == _plain_separated(a, b) == bool(_separated_xy(a[None], b)[0])
