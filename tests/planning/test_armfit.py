"""Servo and base calibration from a gripper marker, against a known true arm.

The photos here are pixel sightings made by a pinhole camera written in this file (numpy, with lens
distortion, tilt and Gaussian pixel noise); rendered photos are in tests/app/test_armfit_cli.py.
The outside reference is a plain ``scipy.optimize.least_squares`` over the same model written out
separately below (forward kinematics by hand in the arm's vertical plane)."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from scipy.optimize import least_squares

from gripsight.app.cellfile import parse_cell
from gripsight.planning import armfit as af
from gripsight.planning.armposes import plan_stops
from gripsight.planning.arm import Arm
from gripsight.planning.checks import first_failing_segment
from gripsight.planning.motion import SegmentKind
from gripsight.planning.picks import Planner
from tests.conftest import cell_data_with_linkage

LINKAGES = ["serial", "parallel", "four_bar"]


class PinholeCamera:
    """A test-side camera: centre C (mm), tilt about the table's y axis, focal f (px), radial k1."""

    def __init__(self, centre_mm, tilt_deg=0.0, focal_px=1100.0, k1=0.0, size=(1280, 960)):
        self.C = np.asarray(centre_mm, float)
        t = np.radians(tilt_deg)
        nadir = np.array([[0.0, -1.0, 0.0], [-1.0, 0.0, 0.0], [0.0, 0.0, -1.0]])
        tilt = np.array([[np.cos(t), 0, np.sin(t)], [0, 1, 0], [-np.sin(t), 0, np.cos(t)]])
        self.R = nadir @ tilt.T
        self.f, self.k1 = focal_px, k1
        self.c = np.array([(size[0] - 1) / 2, (size[1] - 1) / 2])

    def project(self, P):
        pc = (np.asarray(P, float) - self.C) @ self.R.T
        xn = pc[:, :2] / pc[:, 2:3]
        r2 = (xn ** 2).sum(axis=1, keepdims=True)
        return self.f * xn * (1 + self.k1 * r2) + self.c


def true_errors(rng, base_shift_mm=5.0, base_yaw_deg=2.0) -> af.ArmErrors:
    """Offsets up to +-5 deg, gains up to +-4 %, the base moved 5 mm and turned 2 deg (the yaw joins the
    base servo's offset: they turn the arm about the same axis)."""
    off = rng.uniform(-5, 5, 3)
    off[0] += base_yaw_deg * rng.choice([-1, 1])
    gain = rng.uniform(-4, 4, 3)
    a = rng.uniform(0, 2 * np.pi)
    return af.ArmErrors(tuple(off), tuple(gain), (base_shift_mm * np.cos(a), base_shift_mm * np.sin(a)))


def setup(kind, level=True, seed=0, n=16, mount=af.MarkerMount((0.0, 0.0, 20.0), True), fit_lengths=False):
    data = cell_data_with_linkage(kind, level)
    cell = parse_cell(data)
    planner = Planner(cell)
    seq = plan_stops(planner, cell.work_area, mount, n, fit_lengths=fit_lengths)
    commanded = np.array([s.joints_deg for s in seq.stops])
    return cell, planner.arm, seq, commanded


def sightings(arm, truth, commanded, mount, camera, rng, noise_px=0.15, names=None):
    uv = camera.project(af.marker_points_mm(arm, truth, commanded, mount)) + rng.normal(0, noise_px, (len(commanded), 2))
    names = names or [f"stop{i + 1}" for i in range(len(commanded))]
    return [af.StopObservation(n, tuple(c), tuple(u)) for n, c, u in zip(names, commanded, uv)]


# ------------------------------------------------------------------ the outside reference
def reference_marker_points(arm: Arm, p, commanded_deg, mount) -> np.ndarray:
    """The model written out again: true angles, FK by hand in the arm's plane, the marker offset."""
    off, gain, bxy = p[[0, 2, 4]], p[[1, 3, 5]], p[6:8]
    q = np.radians(commanded_deg + off + gain / 100 * commanded_deg)
    b, s = q[:, 0], q[:, 1]
    psi = arm.forearm_rad(s, q[:, 2])          # the linkage (tested against its own references in test_arm)
    if arm.tool_level:
        tr, tz = np.full_like(psi, arm.tool_reach_mm), np.full_like(psi, -arm.tool_drop_mm)
    else:
        tr = arm.tool_reach_mm * np.cos(psi) + arm.tool_drop_mm * np.sin(psi)
        tz = arm.tool_reach_mm * np.sin(psi) - arm.tool_drop_mm * np.cos(psi)
    f, left, up = mount.offset_mm
    if mount.level:
        mr, mz = f, up
    else:
        mr, mz = f * np.cos(psi) - up * np.sin(psi), f * np.sin(psi) + up * np.cos(psi)
    r = arm.shoulder_offset_mm + arm.upper_arm_mm * np.cos(s) + arm.forearm_mm * np.cos(psi) + tr + mr
    z = arm.base_height_mm + arm.upper_arm_mm * np.sin(s) + arm.forearm_mm * np.sin(psi) + tz + mz
    x = bxy[0] + r * np.cos(b) - left * np.sin(b)
    y = bxy[1] + r * np.sin(b) + left * np.cos(b)
    return np.column_stack([x, y, z])


def reference_fit(arm, obs, mount, camera) -> np.ndarray:
    c = np.array([o.commanded_deg for o in obs])
    uv = np.array([o.uv_px for o in obs])
    res = least_squares(lambda p: (camera.project(reference_marker_points(arm, p, c, mount)) - uv).ravel(),
                        np.zeros(8), method="trf", xtol=1e-14, ftol=1e-14, gtol=1e-14)
    return res.x


# ------------------------------------------------------------------ the fit against the truth
CAMERAS = {
    "serial": PinholeCamera([210, 5, 760], tilt_deg=0.0, k1=0.0),
    "parallel": PinholeCamera([190, -15, 820], tilt_deg=3.0, k1=-0.08),
    "four_bar": PinholeCamera([230, 20, 700], tilt_deg=-2.0, focal_px=1000, k1=0.05),
}


@pytest.mark.parametrize("kind", LINKAGES)
def test_fit_recovers_the_true_arm_within_its_uncertainty(kind):
    rng = np.random.default_rng({"serial": 1, "parallel": 2, "four_bar": 3}[kind])
    mount = af.MarkerMount((0.0, 0.0, 20.0), True)
    cell, arm, seq, commanded = setup(kind, mount=mount)
    truth = true_errors(rng)
    camera = CAMERAS[kind]
    obs = sightings(arm, truth, commanded, mount, camera, rng)
    fit = af.fit_arm(arm, obs, mount, af.PixelModel(camera.project))
    want = truth.vector(arm, False)
    got = np.array([p.value for p in fit.parameters])
    sigma = np.array([p.sigma for p in fit.parameters])
    # within 3 sigma (a common practice bound for a 99.7 % interval)
    assert np.all(np.abs(got - want) <= 3 * sigma), np.c_[want, got, sigma]
    assert fit.residual_before_mm.max() > 5.0
    assert np.sqrt(np.mean(fit.residual_after_mm ** 2)) < 0.3

    # the outside reference: a plain scipy least_squares over the model written separately
    ref = reference_fit(arm, obs, mount, camera)
    np.testing.assert_allclose(got, ref, atol=1e-4 + 0.01 * sigma.max())

    # tool-point error over the work area (grip to safe height), against the true arm
    targets = af.grid_in_polygon(cell.work_area, 10.0, [20.0, 60.0, 100.0])
    before = af.tool_errors_mm(arm, arm, truth, targets)
    after = af.tool_errors_mm(fit.fitted_arm(arm), arm, truth, targets)
    ok = ~np.isnan(after) & ~np.isnan(before)
    assert ok.mean() > 0.8              # the four-bar reaches a little less of the work area
    rms_before = np.sqrt(np.mean(before[ok] ** 2))
    assert 5.0 <= rms_before <= 40.0
    assert np.sqrt(np.mean(after[ok] ** 2)) <= 0.8
    assert after[ok].max() <= 1.5
    # the predicted remaining error is of the size of the real one
    predicted = af.tool_sigma_mm(fit, arm, targets)
    assert np.nanmax(predicted) < 1.0


def test_tilting_marker_on_a_forearm_tool_with_link_lengths():
    rng = np.random.default_rng(7)
    mount = af.MarkerMount((10.0, -5.0, 15.0), False)
    cell, arm, seq, commanded = setup("serial", level=False, mount=mount, n=20, fit_lengths=True)
    truth = dataclasses.replace(true_errors(rng), upper_arm_mm=arm.upper_arm_mm + 1.5, forearm_mm=arm.forearm_mm - 1.0)
    camera = CAMERAS["parallel"]
    obs = sightings(arm, truth, commanded, mount, camera, rng, noise_px=0.1)
    fit = af.fit_arm(arm, obs, mount, af.PixelModel(camera.project), fit_lengths=True)
    got = np.array([p.value for p in fit.parameters])
    sigma = np.array([p.sigma for p in fit.parameters])
    assert len(got) == 10
    assert np.all(np.abs(got - truth.vector(arm, True)) <= 3 * sigma)


def test_fitted_servo_maps_send_the_true_angle_to_the_pulse_that_reaches_it():
    cell = parse_cell(cell_data_with_linkage("parallel"))
    arm = Arm.from_config(cell.arm)
    truth = af.ArmErrors((3.0, -2.0, 1.0), (2.0, -1.0, 4.0), (0.0, 0.0))
    fitted = truth.fitted_arm(arm)
    want_deg = np.array([[20.0, 70.0, -10.0]])
    pulses = fitted.pulses_us(np.radians(want_deg))
    commanded = np.column_stack([s.deg_from_pulse_us(pulses[:, j]) for j, s in enumerate(arm.servos)])
    np.testing.assert_allclose(truth.true_deg(commanded), want_deg, atol=1e-9)
    # and a perfect arm planned with its own maps has no tool error
    pts = af.grid_in_polygon(cell.work_area, 50.0, [50.0])
    assert np.nanmax(af.tool_errors_mm(arm, arm, af.ArmErrors(), pts)) < 1e-9


def test_base_away_from_the_origin_round_trips():
    cell = parse_cell(cell_data_with_linkage("four_bar"))
    arm = dataclasses.replace(Arm.from_config(cell.arm), base_xy_mm=(4.0, -3.0))
    pts = af.grid_in_polygon(cell.work_area, 40.0, [30.0, 90.0])
    sol = arm.inverse(pts)
    assert sol.ok.mean() > 0.8
    assert np.abs(arm.forward(sol.joints_rad[sol.ok]) - pts[sol.ok]).max() < 1e-6
    moved = Arm.from_config(cell.arm).inverse(pts - [4.0, -3.0, 0.0])
    np.testing.assert_allclose(sol.joints_rad[sol.ok], moved.joints_rad[sol.ok], atol=1e-12)


# ------------------------------------------------------------------ refusals
def _obs(kind="parallel", **kw):
    rng = np.random.default_rng(4)
    mount = af.MarkerMount((0.0, 0.0, 20.0), True)
    cell, arm, seq, commanded = setup(kind, mount=mount)
    return arm, mount, sightings(arm, true_errors(rng), commanded, mount, CAMERAS["serial"], rng)


def test_refuses_when_the_marker_is_missing_and_names_the_photos():
    arm, mount, obs = _obs()
    obs[3] = dataclasses.replace(obs[3], uv_px=None)
    obs[9] = dataclasses.replace(obs[9], uv_px=None)
    with pytest.raises(af.ArmFitRefused, match=r"not found in 2 photo\(s\): stop4, stop10"):
        af.fit_arm(arm, obs, mount, af.PixelModel(CAMERAS["serial"].project))
    fit = af.fit_arm(arm, obs, mount, af.PixelModel(CAMERAS["serial"].project), allow_missing=True)
    assert len(fit.names) == 14


def test_refuses_too_few_photos():
    arm, mount, obs = _obs()
    with pytest.raises(af.ArmFitRefused, match="7 photos with the gripper marker: at least 8"):
        af.fit_arm(arm, obs[:7], mount, af.PixelModel(CAMERAS["serial"].project))


def test_refuses_stops_all_at_one_height():
    cell = parse_cell(cell_data_with_linkage("parallel"))
    arm = Arm.from_config(cell.arm)
    pts = af.grid_in_polygon(cell.work_area, 60.0, [60.0])
    commanded = arm.inverse(pts).joints_deg[:12]
    mount = af.MarkerMount((0.0, 0.0, 20.0), True)
    obs = sightings(arm, af.ArmErrors(), commanded, mount, CAMERAS["serial"], np.random.default_rng(0))
    with pytest.raises(af.ArmFitRefused, match="all stops at one height"):
        af.fit_arm(arm, obs, mount, af.PixelModel(CAMERAS["serial"].project))


def test_refuses_when_the_base_never_turns_and_names_the_parameter():
    cell = parse_cell(cell_data_with_linkage("parallel"))
    arm = Arm.from_config(cell.arm)
    r = np.linspace(120, 330, 6)
    pts = np.concatenate([np.column_stack([r, np.zeros(6), np.full(6, z)]) for z in (30.0, 90.0, 150.0)])
    commanded = arm.inverse(pts).joints_deg
    mount = af.MarkerMount((0.0, 0.0, 20.0), True)
    obs = sightings(arm, af.ArmErrors(), commanded, mount, CAMERAS["serial"], np.random.default_rng(0))
    with pytest.raises(af.ArmFitRefused, match="cannot determine base_gain_pct"):
        af.fit_arm(arm, obs, mount, af.PixelModel(CAMERAS["serial"].project))


# ------------------------------------------------------------------ the stops
@pytest.mark.parametrize("kind", LINKAGES)
def test_stops_are_checked_held_and_spread(kind):
    cell, arm, seq, commanded = setup(kind)
    assert len(seq.stops) == 16
    planner = Planner(cell)
    # every sample of the sequence passes the planner's checks again
    holds = [s for s, _ in seq.plan.segments if s.segment.kind is SegmentKind.HOLD]
    assert len(holds) == 16
    assert all(h.duration_s >= 2.0 for h in holds)
    assert all(np.ptp(h.joints_rad, axis=0).max() == 0.0 for h in holds)
    from gripsight.planning.motion import SampledChain
    segs = [s for s, _ in seq.plan.segments]
    starts = np.concatenate([[0], np.cumsum([len(s.t_s) for s in segs])])
    chain = SampledChain([s.segment for s in segs], [s.duration_s for s in segs], starts,
                         np.concatenate([s.t_s for s in segs]), np.concatenate([s.xyz_mm for s in segs]),
                         np.concatenate([s.joints_rad for s in segs]), np.concatenate([s.reason for s in segs]))
    assert first_failing_segment(planner.ctx, chain) is None
    tool = np.array([s.tool_mm for s in seq.stops])
    assert np.ptp(tool[:, 2]) >= 100.0                       # over heights
    assert np.ptp(tool[:, 1]) >= 300.0 and np.ptp(tool[:, 0]) >= 150.0    # over the work area
    assert np.all(seq.predicted_sigma[:6] < 0.3)
    # pulses are the cell's maps of the commanded angles
    np.testing.assert_allclose([s.pulses_us for s in seq.stops], arm.pulses_us(np.radians(commanded)))


def test_stops_at_reduced_speed_take_longer():
    cell = parse_cell(cell_data_with_linkage("parallel"))
    mount = af.MarkerMount()
    full = plan_stops(Planner(cell), cell.work_area, mount, 12)
    slow = plan_stops(Planner(cell, speed_scale=0.5), cell.work_area, mount, 12)
    moving_full = full.plan.cycle_s - 12 * 2.0
    moving_slow = slow.plan.cycle_s - 12 * 2.0
    assert moving_slow > 1.8 * moving_full


def test_camera_centre_refined_with_the_arm():
    """A camera centre 10 mm off in height (as one low raised marker can leave it) biases the servo fit;
    refined with the arm, it comes back within its uncertainty and so do the servos. For a pinhole the
    raised-point model is exact: P is seen where the ray from C through P meets the table."""
    rng = np.random.default_rng(5)
    mount = af.MarkerMount((0.0, 0.0, 20.0), True)
    cell, arm, seq, commanded = setup("parallel", mount=mount)
    truth = true_errors(rng)
    camera = CAMERAS["parallel"]
    obs = sightings(arm, truth, commanded, mount, camera, rng, noise_px=0.05)
    to_pixel = lambda q: camera.project(np.column_stack([q, np.zeros(len(q))]))  # noqa: E731
    wrong = camera.C + [3.0, -2.0, 10.0]
    plain = af.fit_arm(arm, obs, mount, af.PixelModel.raised(to_pixel, None, wrong))
    refined = af.fit_arm(arm, obs, mount, af.PixelModel.raised(to_pixel, None, wrong), fit_camera_centre=True)
    want = truth.vector(arm, False, camera.C)
    got = np.array([p.value for p in refined.parameters])
    sigma = np.array([p.sigma for p in refined.parameters])
    assert [p.name for p in refined.parameters][-3:] == ["camera_x_mm", "camera_y_mm", "camera_z_mm"]
    assert np.all(np.abs(got - want) <= 3 * sigma), np.c_[want, got, sigma]
    assert refined.rms_px < 0.1 < plain.rms_px
    targets = af.grid_in_polygon(cell.work_area, 10.0, [20.0, 100.0])
    after = af.tool_errors_mm(refined.fitted_arm(arm), arm, truth, targets)
    assert np.nanmax(after) < 0.3
