"""Path primitives and time scaling against outside references: the modern-robotics package
(Lynch & Park, Modern Robotics, 2017, sec. 9.2), Thales' theorem, and circle geometry."""

from __future__ import annotations

import modern_robotics as mr
import numpy as np
import pytest

from gripsight.planning.paths import ArcPath, PathGeometryError, StraightPath, TimeScaling, peak_rate, time_scaling

MR_FUNCTIONS = {"cubic": mr.CubicTimeScaling, "quintic": mr.QuinticTimeScaling}


@pytest.mark.parametrize("kind", ["cubic", "quintic"])
def test_time_scaling_values_match_modern_robotics(kind):
    tf = 2.7
    t = np.linspace(0.0, tf, 1001)
    theirs = np.array([MR_FUNCTIONS[kind](tf, ti) for ti in t])
    ours, _, _ = time_scaling(kind, t / tf)
    np.testing.assert_allclose(ours, theirs, atol=1e-12, rtol=0)


@pytest.mark.parametrize("kind, peak_v, peak_a", [("cubic", 1.5, 6.0), ("quintic", 1.875, 10 / np.sqrt(3))])
def test_peak_velocity_and_acceleration_match_modern_robotics(kind, peak_v, peak_a):
    """modern-robotics gives s(t) only: recover its polynomial exactly from samples (degree 3 or 5,
    so deg + 1 samples determine it), differentiate, and compare peaks with ours to 1e-12."""
    tf = 1.0
    deg = 3 if kind == "cubic" else 5
    nodes = np.linspace(0.0, 1.0, deg + 1)
    coeffs = np.polyfit(nodes, [MR_FUNCTIONS[kind](tf, x) for x in nodes], deg)
    tau = np.linspace(0.0, 1.0, 200_001)
    their_v = np.polyval(np.polyder(coeffs, 1), tau)
    their_a = np.polyval(np.polyder(coeffs, 2), tau)
    _, our_v, our_a = time_scaling(kind, tau)
    np.testing.assert_allclose(our_v, their_v, atol=1e-11)
    np.testing.assert_allclose(our_a, their_a, atol=1e-10)
    assert abs(our_v.max() - their_v.max()) < 1e-12
    assert abs(np.abs(our_a).max() - np.abs(their_a).max()) < 1e-10
    # the textbook peaks (Lynch & Park eq. 9.7-9.12): cubic 1.5 and 6, quintic 15/8 and 10/sqrt(3)
    assert our_v.max() == pytest.approx(peak_v, abs=1e-9)
    assert np.abs(our_a).max() == pytest.approx(peak_a, abs=1e-6)
    assert peak_rate(kind) == pytest.approx(peak_v)


def test_trapezoid_profile():
    """Trapezoidal profile with v T = 1.5 (accelerate a third, cruise, decelerate a third):
    s continuous, s(1) = 1, peak s' = 1.5, |s''| = 4.5 (v^2 / a <= 1 condition of the trapezoid holds)."""
    tau = np.linspace(0, 1, 300_001)
    s, v, a = time_scaling(TimeScaling.TRAPEZOID, tau)
    assert s[0] == 0 and s[-1] == pytest.approx(1.0, abs=1e-15)
    assert np.all(np.diff(s) >= 0)
    assert v.max() == pytest.approx(1.5)
    assert np.abs(a).max() == pytest.approx(4.5)
    # the three phases of the published form: accelerate over tau <= v/a = 1/3, cruise, decelerate
    cruise = (tau > 1 / 3 + 1e-6) & (tau < 2 / 3 - 1e-6)
    assert np.all(a[cruise] == 0) and np.allclose(v[cruise], 1.5)
    np.testing.assert_allclose(a[tau < 1 / 3 - 1e-6], 4.5)
    # integral of v is s (trapezoid rule), and s is continuous at the corners
    np.testing.assert_allclose(np.concatenate([[0], np.cumsum((v[1:] + v[:-1]) / 2 * np.diff(tau))]), s, atol=1e-9)


def test_unknown_time_scaling_is_rejected():
    with pytest.raises(ValueError):
        time_scaling("linear", [0.5])


def test_thales_right_triangle_circumcentre_is_hypotenuse_midpoint():
    # Thales: the hypotenuse of a right triangle is a diameter of its circumcircle
    a, b, c = np.array([0.0, 0.0, 10.0]), np.array([30.0, 0.0, 10.0]), np.array([30.0, 40.0, 10.0])
    arc = ArcPath(a, b, c)
    np.testing.assert_allclose(arc.centre, (a + c) / 2, atol=1e-12)
    assert arc.radius_mm == pytest.approx(25.0, abs=1e-12)
    assert arc.sweep_rad == pytest.approx(np.pi, abs=1e-12)   # a and c are antipodal


def _random_arc(rng):
    centre = rng.uniform(-200, 200, 3)
    radius = rng.uniform(5, 300)
    n = rng.normal(size=3)
    n /= np.linalg.norm(n)
    e1 = np.cross(n, rng.normal(size=3))
    e1 /= np.linalg.norm(e1)
    e2 = np.cross(n, e1)
    sweep = rng.uniform(0.05, 2 * np.pi - 0.05)
    via_angle = rng.uniform(0.02, 0.98) * sweep
    point = lambda ang: centre + radius * (np.cos(ang) * e1 + np.sin(ang) * e2)  # noqa: E731
    return centre, radius, sweep, point(0.0), point(via_angle), point(sweep)


def test_random_arcs_pass_through_points_stay_on_circle_and_sweep_the_via_side():
    rng = np.random.default_rng(0)
    big = 0
    for _ in range(500):
        centre, radius, sweep, p0, via, p1 = _random_arc(rng)
        arc = ArcPath(p0, via, p1)
        s = np.linspace(0, 1, 2001)
        pts = arc.points(s)
        np.testing.assert_allclose(pts[0], p0, atol=1e-9)
        np.testing.assert_allclose(pts[-1], p1, atol=1e-9)
        assert np.linalg.norm(pts - via, axis=1).min() < radius * (arc.sweep_rad / 2000) + 1e-9
        np.testing.assert_allclose(np.linalg.norm(pts - centre, axis=1), radius, atol=1e-9)
        assert arc.sweep_rad == pytest.approx(sweep, abs=1e-9)
        assert arc.length_mm == pytest.approx(radius * sweep, rel=1e-9)
        big += sweep > np.pi
    assert big > 100   # sweeps over 180 degrees were exercised


@pytest.mark.parametrize("pts, message", [
    (([0, 0, 0], [1, 1, 1], [2, 2, 2]), r"arc: p0 \(0.000, 0.000, 0.000\), via \(1.000, 1.000, 1.000\) and p1 \(2.000, 2.000, 2.000\) are collinear"),
    (([0, 0, 0], [0, 0, 0], [1, 0, 0]), r"arc: p0 \(0.000, 0.000, 0.000\) and via \(0.000, 0.000, 0.000\) coincide"),
    (([5, 0, 0], [0, 3, 0], [5, 0, 0]), r"arc: p0 \(5.000, 0.000, 0.000\) and p1 \(5.000, 0.000, 0.000\) coincide"),
])
def test_degenerate_arcs_raise_naming_the_points(pts, message):
    with pytest.raises(PathGeometryError, match=message):
        ArcPath(*pts)


def test_straight_path_and_shape_errors():
    path = StraightPath([0, 0, 100], [0, 0, 20])
    np.testing.assert_allclose(path.points(np.array([0, 0.25, 1])), [[0, 0, 100], [0, 0, 80], [0, 0, 20]])
    assert path.length_mm == 80
    with pytest.raises(ValueError, match=r"p1: expected shape \(3,\)"):
        StraightPath([0, 0, 0], [1, 2])
    with pytest.raises(ValueError, match="p0: must be finite"):
        StraightPath([np.nan, 0, 0], [1, 2, 3])
