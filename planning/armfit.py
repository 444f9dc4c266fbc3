"""Servo-map and base calibration from where a marker on the gripper is seen at known commanded poses.

Model (angles in degrees at the edges, radians inside). The cell's servo maps turn a commanded angle
into a pulse; the real arm turns that pulse into a true joint angle that is off by an offset and a gain::

    true_deg = commanded_deg + offset_deg + gain_pct / 100 * commanded_deg        per joint

The arm's base axis stands at ``base_xy_mm`` in the markers' (table) frame. A yaw of the base against
the markers turns the arm about the same axis as the base servo's zero does, so the photos cannot tell
the two apart: one angle, ``base_offset_deg``, holds both (and is written into the base servo's map).
Optionally the upper-arm and forearm lengths are fitted too.

The gripper marker's centre sits at a fixed offset from the tool point, in the tool's frame
(forward along the arm, left, up); with a level mount the offset only turns with the base, with a
tilting mount it also pitches with the forearm's elevation psi. Its table point comes from the commanded
angles through forward kinematics (:class:`planning.arm.Arm`); pixels come from a projection the caller
passes in (:class:`PixelModel`: in gripsight the table mapping and the camera centre, the raised-marker
model ``q = C + (P - C) C_z / (C_z - z)``), so this module never sees an image.

The fit is ``scipy.optimize.least_squares`` on pixel residuals. Uncertainties are the square roots of
the diagonal of ``s^2 (J^T J)^-1`` with ``s^2`` the residual variance (SSR / (m - n)); common practice
for nonlinear least squares (e.g. Press et al., Numerical Recipes, sec. 15.5; from memory).
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from typing import Callable

import numpy as np
from scipy.optimize import least_squares

from gripsight.planning.arm import JOINT_NAMES, Arm
from gripsight.planning.errors import PlanningError
from gripsight.planning.servo import ServoMap

__all__ = ["ArmErrors", "ArmFit", "ArmFitRefused", "MarkerMount", "ParameterEstimate", "PixelModel",
           "StopObservation", "PARAMETER_NAMES", "fit_arm", "marker_points_mm", "parameter_names", "parameter_sigmas",
           "tool_errors_mm", "tool_sigma_mm", "grid_in_polygon"]

_SERVO_BASE = ("base_offset_deg", "base_gain_pct", "shoulder_offset_deg", "shoulder_gain_pct",
               "elbow_offset_deg", "elbow_gain_pct", "base_x_mm", "base_y_mm")
_LENGTHS = ("upper_arm_mm", "forearm_mm")
_CAMERA = ("camera_x_mm", "camera_y_mm", "camera_z_mm")
PARAMETER_NAMES = _SERVO_BASE + _LENGTHS + _CAMERA
# how well each parameter must be determined (1 sigma) at the assumed detector noise, or the fit refuses
_SIGMA_LIMITS = {"deg": 0.5, "%": 1.0, "mm": 2.0}
_CAMERA_SIGMA_LIMIT_MM = 10.0
# marker-centre noise used to judge a set of stops before any photo: on our renders the centre from four
# edge-refined corners is within 0.03-0.06 px; 0.1 px leaves room for real photos (a judgement)
ASSUMED_NOISE_PX = 0.1
_MIN_HEIGHT_SPREAD_MM = 40.0


def _unit(name: str) -> str:
    return {"deg": "deg", "pct": "%"}.get(name.rsplit("_", 1)[1], "mm")


def parameter_names(with_lengths: bool, with_camera: bool = False) -> list[str]:
    """The fitted parameters in order: servos and base, then link lengths and camera centre if fitted."""
    return list(_SERVO_BASE) + (list(_LENGTHS) if with_lengths else []) + (list(_CAMERA) if with_camera else [])


def _sigma_limit(name: str) -> float:
    return _CAMERA_SIGMA_LIMIT_MM if name.startswith("camera") else _SIGMA_LIMITS[_unit(name)]


class ArmFitRefused(PlanningError):
    """The photos cannot determine the parameters (too few, one height, marker missing, ill-conditioned)."""


@dataclass(frozen=True)
class MarkerMount:
    """Where the gripper marker's centre sits: ``offset_mm`` (forward, left, up) from the tool point in
    the tool's frame; ``level`` True if it stays level (turns with the base only), False if it pitches
    with the forearm."""

    offset_mm: tuple[float, float, float] = (0.0, 0.0, 0.0)
    level: bool = True


@dataclass(frozen=True)
class PixelModel:
    """How table points are seen: ``project(xyz_mm (N, 3)) -> uv_px (N, 2)`` and its inverse at known
    heights ``back_project(uv_px (N, 2), z_mm (N,)) -> xy_mm (N, 2)``.

    Build it with :meth:`raised` from a table mapping and a camera centre (then the fit can refine the
    centre), or give any projection."""

    project: Callable[[np.ndarray], np.ndarray]
    back_project: Callable[[np.ndarray, np.ndarray], np.ndarray] | None = None
    pixel_from_table: Callable[[np.ndarray], np.ndarray] | None = None
    camera_centre_mm: tuple[float, float, float] | None = None

    @classmethod
    def raised(cls, pixel_from_table, table_from_pixel, camera_centre_mm) -> "PixelModel":
        """The raised-point model: P at height z is seen at table point ``q = C + (P - C) C_z / (C_z - z)``,
        then ``pixel_from_table(q)``; back, ``P_xy = C + (q - C) (C_z - z) / C_z``."""
        C = tuple(float(v) for v in camera_centre_mm)

        def back_project(uv_px, z_mm):
            q = table_from_pixel(np.asarray(uv_px, float).reshape(-1, 2))
            k = C[2] / (C[2] - np.asarray(z_mm, float))
            return np.asarray(C[:2]) + (q - np.asarray(C[:2])) / k[:, None]

        return cls(_raised_projection(pixel_from_table, C), None if table_from_pixel is None else back_project,
                   pixel_from_table, C)


def _raised_projection(pixel_from_table, centre_mm):
    C = np.asarray(centre_mm, float)

    def project(xyz_mm):
        p = np.asarray(xyz_mm, float).reshape(-1, 3)
        k = C[2] / (C[2] - p[:, 2])
        return pixel_from_table(C[:2] + (p[:, :2] - C[:2]) * k[:, None])

    return project


@dataclass(frozen=True)
class StopObservation:
    """One photo of one stop: its name (photo or stop), the commanded angles (3,) deg, and the marker
    centre seen in it (2,) px, or None where the marker was not found."""

    name: str
    commanded_deg: tuple[float, float, float]
    uv_px: tuple[float, float] | None


@dataclass(frozen=True)
class ArmErrors:
    """The parameters: per joint offset (deg) and gain (%), base position (mm), link lengths (mm, None:
    the cell's)."""

    offset_deg: tuple[float, float, float] = (0.0, 0.0, 0.0)
    gain_pct: tuple[float, float, float] = (0.0, 0.0, 0.0)
    base_xy_mm: tuple[float, float] = (0.0, 0.0)
    upper_arm_mm: float | None = None
    forearm_mm: float | None = None
    camera_centre_mm: tuple[float, float, float] | None = None     # refined by the fit (None: not fitted)

    def vector(self, arm: Arm, with_lengths: bool, camera_centre_mm=None) -> np.ndarray:
        """The parameters in :func:`parameter_names` order (the camera centre appended if given here
        or held)."""
        v = [self.offset_deg[0], self.gain_pct[0], self.offset_deg[1], self.gain_pct[1], self.offset_deg[2],
             self.gain_pct[2], *self.base_xy_mm]
        if with_lengths:
            v += [self.upper_arm_mm or arm.upper_arm_mm, self.forearm_mm or arm.forearm_mm]
        centre = self.camera_centre_mm if self.camera_centre_mm is not None else camera_centre_mm
        if centre is not None:
            v += list(centre)
        return np.array(v, float)

    @classmethod
    def from_vector(cls, p, with_lengths: bool | None = None, with_camera: bool = False) -> "ArmErrors":
        p = [float(v) for v in p]
        if with_lengths is None:
            with_lengths = len(p) - (3 if with_camera else 0) > 8
        lengths = (p[8], p[9]) if with_lengths else (None, None)
        camera = tuple(p[-3:]) if with_camera else None
        return cls((p[0], p[2], p[4]), (p[1], p[3], p[5]), (p[6], p[7]), *lengths, camera)

    def true_deg(self, commanded_deg) -> np.ndarray:
        """True joint angles (N, 3) deg for commanded ones (N, 3) deg."""
        c = np.asarray(commanded_deg, float).reshape(-1, 3)
        return c + np.asarray(self.offset_deg) + np.asarray(self.gain_pct) / 100.0 * c

    def arm(self, nominal: Arm) -> Arm:
        """The nominal arm's geometry with this base position and these link lengths (servo maps untouched)."""
        changes = {"base_xy_mm": (float(self.base_xy_mm[0]), float(self.base_xy_mm[1]))}
        if self.upper_arm_mm is not None:
            changes["upper_arm_mm"] = float(self.upper_arm_mm)
            if nominal.four_bar is not None:
                changes["four_bar"] = dataclasses.replace(nominal.four_bar, upper_arm_mm=float(self.upper_arm_mm))
        if self.forearm_mm is not None:
            changes["forearm_mm"] = float(self.forearm_mm)
        return dataclasses.replace(nominal, **changes)

    def servo_maps(self, nominal: Arm) -> tuple[ServoMap, ...]:
        """Servo maps that send a true angle to the pulse this arm needs for it: each map's two points keep
        their pulses, their angles become the true angles those pulses give."""
        out = []
        for j, s in enumerate(nominal.servos):
            angles = np.asarray(s.angle_deg, float)
            true = angles + self.offset_deg[j] + self.gain_pct[j] / 100.0 * angles
            out.append(dataclasses.replace(s, angle_deg=(float(true[0]), float(true[1]))))
        return tuple(out)

    def fitted_arm(self, nominal: Arm) -> Arm:
        """The arm to plan with: this geometry and servo maps that correct the servos."""
        return dataclasses.replace(self.arm(nominal), servos=self.servo_maps(nominal))


def marker_points_mm(nominal: Arm, errors: ArmErrors, commanded_deg, mount: MarkerMount) -> np.ndarray:
    """Table points (N, 3) mm of the gripper marker's centre when the joints are commanded to
    ``commanded_deg`` (N, 3) and the arm has ``errors``."""
    q = np.radians(errors.true_deg(commanded_deg))
    arm = errors.arm(nominal)
    tool = arm.forward(q)
    f, left, up = mount.offset_mm
    if mount.level:
        radial, z = np.full(len(q), f), np.full(len(q), up)
    else:
        psi = arm.forearm_rad(q[:, 1], q[:, 2])
        radial, z = f * np.cos(psi) - up * np.sin(psi), f * np.sin(psi) + up * np.cos(psi)
    c, s = np.cos(q[:, 0]), np.sin(q[:, 0])
    return tool + np.column_stack([radial * c - left * s, radial * s + left * c, z])


def _residual_fn(nominal, mount, commanded, uv, project, with_lengths, pixel_from_table=None):
    """Pixel residuals (2N,) as a function of the parameter vector; with ``pixel_from_table`` the last
    three parameters are the camera centre of the raised-point model."""
    with_camera = pixel_from_table is not None

    def residual(p):
        e = ArmErrors.from_vector(p, with_lengths, with_camera)
        pts = marker_points_mm(nominal, e, commanded, mount)
        proj = _raised_projection(pixel_from_table, e.camera_centre_mm) if with_camera else project
        return (proj(pts) - uv).ravel()
    return residual


def _jacobian(fn, p, step=None) -> np.ndarray:
    """Central-difference Jacobian of a vector function (steps 1e-3 of a degree, percent or mm)."""
    step = np.full(len(p), 1e-3) if step is None else step
    cols = []
    for i in range(len(p)):
        d = np.zeros(len(p))
        d[i] = step[i]
        cols.append((fn(p + d) - fn(p - d)) / (2 * step[i]))
    return np.column_stack(cols)


def parameter_sigmas(nominal: Arm, commanded_deg, mount: MarkerMount, project, noise_px: float = ASSUMED_NOISE_PX,
                     fit_lengths: bool = False, errors: ArmErrors | None = None) -> np.ndarray:
    """1-sigma uncertainty of each parameter a fit from these stops would have at ``noise_px`` pixel noise
    (``inf`` where the stops cannot determine a parameter at all)."""
    errors = errors or ArmErrors()
    c = np.asarray(commanded_deg, float).reshape(-1, 3)
    p0 = errors.vector(nominal, fit_lengths)
    fn = _residual_fn(nominal, mount, c, 0.0, project, fit_lengths)
    return _sigmas(_jacobian(fn, p0), noise_px)


def _sigmas(J: np.ndarray, noise_px: float) -> np.ndarray:
    jtj = J.T @ J
    scale = np.sqrt(np.maximum(np.diag(jtj), 1e-300))
    norm = jtj / np.outer(scale, scale)
    w, v = np.linalg.eigh(norm)
    if w.min() <= 1e-10 * w.max():
        out = np.full(len(jtj), np.inf)
        weak = np.abs(v[:, 0]) > 0.2           # the parameters in the undetermined direction
        good = ~weak
        if good.any():
            sub = np.linalg.inv(norm[np.ix_(good, good)])
            out[good] = noise_px * np.sqrt(np.diag(sub)) / scale[good]
        return out
    return noise_px * np.sqrt(np.diag(np.linalg.inv(norm))) / scale


@dataclass(frozen=True)
class ParameterEstimate:
    name: str
    unit: str
    start: float
    value: float
    sigma: float


@dataclass(frozen=True)
class ArmFit:
    """The fit's result: the parameters with uncertainties and the residuals per stop before and after."""

    errors: ArmErrors
    parameters: list[ParameterEstimate]
    covariance: np.ndarray
    names: list[str]
    residual_before_px: np.ndarray       # (N,) distance between seen and predicted marker centre
    residual_after_px: np.ndarray
    residual_before_mm: np.ndarray       # (N,) the same at the marker's height in the table frame
    residual_after_mm: np.ndarray
    rms_px: float
    with_lengths: bool
    with_camera: bool = False

    def fitted_arm(self, nominal: Arm) -> Arm:
        return self.errors.fitted_arm(nominal)


def _refuse_if_undetermined(obs, c, z_mm, n_params, allow_missing):
    missing = [o.name for o in obs if o.uv_px is None]
    if missing and not allow_missing:
        raise ArmFitRefused(f"gripper marker not found in {len(missing)} photo(s): {', '.join(missing)}; "
                            "retake them (marker in view, in focus, not covered) or leave them out")
    need = max(8, n_params)
    if len(c) < need:
        raise ArmFitRefused(f"{len(c)} photos with the gripper marker: at least {need} are needed to fit "
                            f"{n_params} parameters; take a photo at every stop of `gripsight arm-poses`")
    spread = float(np.ptp(z_mm))
    if spread < _MIN_HEIGHT_SPREAD_MM:
        raise ArmFitRefused(f"all stops at one height (marker at z {z_mm.min():.0f}-{z_mm.max():.0f} mm): shoulder "
                            f"and elbow cannot be told apart; use stops at least {_MIN_HEIGHT_SPREAD_MM:g} mm apart "
                            "in height (`gripsight arm-poses`)")


def fit_arm(nominal: Arm, observations: list[StopObservation], mount: MarkerMount, pixels: PixelModel,
            fit_lengths: bool = False, allow_missing: bool = False,
            noise_px: float = ASSUMED_NOISE_PX, fit_camera_centre: bool = False,
            mapping_px: float = 0.0) -> ArmFit:
    """Fit servo offsets and gains, base position (and optionally link lengths) to marker sightings.

    Parameters
    ----------
    nominal : Arm
        The arm as the cell file describes it (its servo maps define the commanded angles).
    observations : list of StopObservation
        One per photo: commanded angles (deg) and the marker centre seen (px) or None.
    mount : MarkerMount
    pixels : PixelModel
        Table points -> pixels (and back at a known height, for residuals in mm).
    fit_lengths : bool
        Also fit the upper-arm and forearm lengths.
    allow_missing : bool
        Fit with the photos where the marker was found instead of refusing.
    noise_px : float
        Pixel noise assumed when judging whether the stops determine every parameter.
    fit_camera_centre : bool
        Also refine the camera centre of a :meth:`PixelModel.raised` model: the marker seen at many
        heights measures it far better than a raised table marker does (an error of a few mm in the
        centre's height biases the servo fit by tenths of a degree).
    mapping_px : float
        How far off the table mapping itself may put a point, px (the calibration's marker residual RMS):
        an error that does not average out over the photos, added to the residual variance in the
        reported uncertainties.

    Raises
    ------
    ArmFitRefused
        Marker missing in some photos (named), too few photos, all at one height, or a parameter the
        stops cannot determine (named).
    """
    if fit_camera_centre and pixels.camera_centre_mm is None:
        raise ValueError("fit_camera_centre needs a PixelModel.raised model")
    names = parameter_names(fit_lengths, fit_camera_centre)
    n_params = len(names)
    seen = [o for o in observations if o.uv_px is not None]
    c = np.array([o.commanded_deg for o in seen], float).reshape(-1, 3)
    uv = np.array([o.uv_px for o in seen], float).reshape(-1, 2)
    start = ArmErrors()
    z_mm = marker_points_mm(nominal, start, c, mount)[:, 2] if len(c) else np.zeros(0)
    _refuse_if_undetermined(observations, c, z_mm, min(n_params, 8), allow_missing)
    centre0 = pixels.camera_centre_mm if fit_camera_centre else None
    p0 = start.vector(nominal, fit_lengths, centre0)
    ptable = pixels.pixel_from_table if fit_camera_centre else None
    fn = _residual_fn(nominal, mount, c, uv, pixels.project, fit_lengths, ptable)
    model = _residual_fn(nominal, mount, c, 0.0, pixels.project, fit_lengths, ptable)
    sig0 = _sigmas(_jacobian(model, p0), noise_px)
    bad = [(names[i], sig0[i]) for i in range(n_params) if not sig0[i] <= _sigma_limit(names[i])]
    if bad:
        text = ", ".join(f"{n} (+-{s:.2g} {_unit(n)})" if np.isfinite(s) else f"{n} (not at all)"
                         for n, s in bad)
        raise ArmFitRefused(f"these stops cannot determine {text}; spread the stops over the work area and "
                            "heights (`gripsight arm-poses` chooses such stops)")
    before = fn(p0).reshape(-1, 2)
    result = least_squares(fn, p0, method="lm", x_scale=np.ones(n_params), xtol=1e-12, ftol=1e-12)
    p = result.x
    after = result.fun.reshape(-1, 2)
    J = _jacobian(fn, p)
    dof = max(len(result.fun) - n_params, 1)
    s2_fit = float(result.fun @ result.fun) / dof
    s2 = s2_fit + mapping_px ** 2
    cov = s2 * np.linalg.inv(J.T @ J)
    sigma = np.sqrt(np.diag(cov))
    loose = [f"{names[i]} +-{sigma[i]:.2g} {_unit(names[i])}" for i in range(n_params) if not sigma[i] <= _sigma_limit(names[i])]
    if loose:
        raise ArmFitRefused(f"the photos leave {', '.join(loose)} (residual {np.sqrt(s2):.2f} px RMS): too uncertain "
                            "to write; check that each photo shows its stop, sharp, and the calibration is current")
    errors = ArmErrors.from_vector(p, fit_lengths, fit_camera_centre)
    params = [ParameterEstimate(names[i], _unit(names[i]), float(p0[i]), float(p[i]), float(sigma[i]))
              for i in range(n_params)]
    mm_before = _mm_residuals(nominal, start, c, uv, mount, pixels, before)
    after_pixels = pixels if not fit_camera_centre else PixelModel.raised(
        pixels.pixel_from_table, _table_from_pixel_of(pixels), errors.camera_centre_mm)
    mm_after = _mm_residuals(nominal, errors, c, uv, mount, after_pixels, after)
    return ArmFit(errors, params, cov, [o.name for o in seen], np.linalg.norm(before, axis=1),
                  np.linalg.norm(after, axis=1), mm_before, mm_after, float(np.sqrt(s2_fit)), fit_lengths,
                  fit_camera_centre)


def _table_from_pixel_of(pixels: PixelModel):
    """The table mapping of a raised model, recovered from its back projection at height 0."""
    if pixels.back_project is None:
        return None
    return lambda uv: pixels.back_project(uv, np.zeros(len(np.asarray(uv).reshape(-1, 2))))


def _mm_residuals(nominal, errors, c, uv, mount, pixels, res_px):
    """Seen minus predicted marker centre in the table frame at the predicted height, mm per stop; from
    the pixel residual and the local scale when no back projection is given."""
    pts = marker_points_mm(nominal, errors, c, mount)
    if pixels.back_project is not None:
        xy = pixels.back_project(uv, pts[:, 2])
        return np.linalg.norm(xy - pts[:, :2], axis=1)
    d = 0.5
    du = pixels.project(pts + [d, 0, 0]) - pixels.project(pts - [d, 0, 0])
    dv = pixels.project(pts + [0, d, 0]) - pixels.project(pts - [0, d, 0])
    px_per_mm = np.sqrt(np.abs(du[:, 0] * dv[:, 1] - du[:, 1] * dv[:, 0])) / (2 * d)
    return np.linalg.norm(res_px, axis=1) / px_per_mm


# ------------------------------------------------------------------ how far the tool is off
def grid_in_polygon(polygon_xy, step_mm: float, heights_mm) -> np.ndarray:
    """Grid points (N, 3) inside a table polygon (even-odd rule), at every height."""
    poly = np.asarray(polygon_xy, float)
    lo, hi = poly.min(axis=0), poly.max(axis=0)
    xs = np.arange(lo[0] + step_mm / 2, hi[0], step_mm)
    ys = np.arange(lo[1] + step_mm / 2, hi[1], step_mm)
    gx, gy = np.meshgrid(xs, ys)
    x, y = gx.ravel(), gy.ravel()
    inside = np.zeros(len(x), bool)
    a, b = poly, np.roll(poly, -1, axis=0)
    for (x0, y0), (x1, y1) in zip(a, b):
        cross = (y0 > y) != (y1 > y)
        with np.errstate(divide="ignore", invalid="ignore"):
            xc = x0 + (y - y0) * (x1 - x0) / (y1 - y0)
        inside ^= cross & (x < xc)
    xy = np.column_stack([x[inside], y[inside]])
    return np.concatenate([np.column_stack([xy, np.full(len(xy), z)]) for z in heights_mm])


def tool_errors_mm(plan_arm: Arm, nominal: Arm, truth: ArmErrors, targets_mm) -> np.ndarray:
    """Where the tool really goes when ``plan_arm`` plans for ``targets_mm`` (N, 3): IK and pulses from
    ``plan_arm``, the nominal servo maps turn the pulses into commanded angles, ``truth`` into true
    angles and the true geometry into a tool point. Returns the distance to the target (N,) mm; NaN
    where ``plan_arm`` cannot reach the target."""
    t = np.asarray(targets_mm, float).reshape(-1, 3)
    sol = plan_arm.inverse(t)
    pulses = plan_arm.pulses_us(sol.joints_rad, check=False)
    commanded = np.column_stack([s.deg_from_pulse_us(pulses[:, j]) for j, s in enumerate(nominal.servos)])
    true = np.radians(truth.true_deg(commanded))
    got = truth.arm(nominal).forward(true)
    err = np.linalg.norm(got - t, axis=1)
    return np.where(sol.ok, err, np.nan)


def tool_sigma_mm(fit: ArmFit, nominal: Arm, targets_mm) -> np.ndarray:
    """Predicted 1-sigma tool-point error (N,) mm left after the fit: the parameters' covariance carried
    to the tool point (it is the only error the fitted cell still has, if the model holds)."""
    t = np.asarray(targets_mm, float).reshape(-1, 3)
    p = fit.errors.vector(nominal, fit.with_lengths)
    plan = fit.fitted_arm(nominal)
    sol = plan.inverse(t)
    pulses = plan.pulses_us(sol.joints_rad, check=False)
    commanded = np.column_stack([s.deg_from_pulse_us(pulses[:, j]) for j, s in enumerate(nominal.servos)])

    def where(pv):
        e = ArmErrors.from_vector(pv, fit.with_lengths, fit.with_camera)
        return e.arm(nominal).forward(np.radians(e.true_deg(commanded))).ravel()

    J = _jacobian(where, p).reshape(len(t), 3, -1)
    var = np.einsum("nip,pq,niq->n", J, fit.covariance, J)
    return np.where(sol.ok, np.sqrt(np.maximum(var, 0.0)), np.nan)


def joint_index(name: str) -> int:
    return JOINT_NAMES.index(name)
