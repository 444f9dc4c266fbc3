"""The link checks against brute force: every link of the arm is tested against keep-out zones exactly
(slab and circle intersections of a straight segment), so they must agree with dense points along
the link, and a zone thinner than any spacing of test points is still found."""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest
import yaml

from gripsight.planning.checks import _zone_entry
from gripsight.app.cellfile import parse_cell
from gripsight.planning.picks import Planner
from gripsight.app.partsfile import parse_parts
from tests.conftest import SAMPLE_CELL

ZONES = [SimpleNamespace(shape="cylinder", x=10.0, y=-5.0, radius_mm=30.0, top_mm=20.0, name="post"),
         SimpleNamespace(shape="box", min_mm=(-20.0, -30.0, -10.0), max_mm=(40.0, 10.0, 25.0), name="crate")]


def _dense_inside(zone, pts, n=4001):
    """Brute force: n points along every link, strictly inside the zone."""
    f = np.linspace(0.0, 1.0, n)
    p = [c[:, :-1, None] + f * (c[:, 1:, None] - c[:, :-1, None]) for c in pts]
    if zone.shape == "cylinder":
        inside = ((p[0] - zone.x) ** 2 + (p[1] - zone.y) ** 2 < zone.radius_mm ** 2) & (p[2] < zone.top_mm)
    else:
        inside = np.ones(p[0].shape, bool)
        for c, lo, hi in zip(p, zone.min_mm, zone.max_mm):
            inside &= (c > lo) & (c < hi)
    first = np.where(inside.any(-1), inside.argmax(-1) / (n - 1), np.nan)
    return inside.any(-1), first


@pytest.mark.parametrize("zone", ZONES, ids=lambda z: z.shape)
def test_exact_link_test_agrees_with_dense_points(zone):
    rng = np.random.default_rng(7)
    pts = [rng.uniform(-100, 100, (3000, 4)) for _ in range(3)]
    pts[0][:400, 2], pts[1][:400, 2] = pts[0][:400, 3], pts[1][:400, 3]     # vertical links (tool hanging)
    pts[2][400:800, 1] = pts[2][400:800, 2]                                 # level links
    inside, enter = _zone_entry(zone, pts)
    dense, first = _dense_inside(zone, pts)
    assert inside.sum() > 500                                               # the test is not vacuous
    # a disagreement can only be a graze shorter than the dense spacing, found by the exact test
    missed = dense & ~inside
    assert not missed.any()
    extra = inside & ~dense
    assert extra.sum() <= 2
    # the entry point: within one dense step of the first dense point inside
    np.testing.assert_allclose(enter[dense], first[dense], atol=1.0 / 4000)


def test_a_thin_wall_between_link_test_points_is_found():
    # a 2 mm wall crossed by the forearm while the tool descends to a part behind it: the test of six
    # points per link used before exact intersection let the arm through it (found by a sweep of walls)
    data = yaml.safe_load(SAMPLE_CELL.read_text())
    data["keep_out"].append({"name": "wall", "shape": "box", "min_mm": [140, -60, 120], "max_mm": [142, 60, 150]})
    cell = parse_cell(data)
    plan = Planner(cell).plan(parse_parts([{"id": "a", "class": "red", "x_mm": 180, "y_mm": 0}], cell))
    rej = plan.parts[0].rejection
    assert rej is not None and rej.label == "keep_out:wall" and rej.segment == "descend"
    assert rej.detail.startswith("forearm enters zone 'wall' at (")
    x, y, z = (float(v) for v in rej.detail.split("at (")[1].split(")")[0].split(","))
    assert 140 <= x <= 142 and abs(y) <= 60 and 120 <= z <= 150


def test_a_zone_is_still_tested_when_a_later_sample_cannot_be_reached(sample_cell):
    # an unreachable sample carries NaN joints and tool point; it must not hide the zone the sample
    # before it enters (zones far from every link are skipped by their bounds)
    from gripsight.planning.arm import Arm, Reason
    from gripsight.planning.checks import CheckContext, first_failure
    from gripsight.planning.motion import SampledSegment, Segment, SegmentKind

    arm = Arm.from_config(sample_cell.arm)
    zone = SimpleNamespace(shape="box", min_mm=(190.0, -10.0, 10.0), max_mm=(230.0, 10.0, 40.0), name="jig")
    ctx = CheckContext(arm, 2.0, (zone,), 0.02)
    xyz = np.array([[210.0, 0.0, 20.0], [np.nan, np.nan, np.nan]])
    sol = arm.inverse(xyz[:1])
    q = np.vstack([sol.joints_rad, np.full((1, 3), np.nan)])
    seg = SampledSegment(Segment(SegmentKind.DESCEND, None, xyz[0]), 0.02, np.array([0.0, 0.02]), xyz, q,
                         np.array([Reason.OK, Reason.OUT_OF_REACH], dtype=np.int8))
    rej = first_failure(ctx, seg, t0_s=1.0)
    assert rej.label == "keep_out:jig" and rej.time_s == pytest.approx(1.0)
