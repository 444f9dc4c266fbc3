"""Benchmark: the arm fit from photos of the gripper marker, on rendered stops of a known true arm.

For each linkage: the cell's stops (``plan_stops``), a true arm with known errors (offsets up to +-5 deg,
gains up to +-4 %, base moved 5 mm and turned 2 deg), every stop rendered under its own camera, light,
noise and lens, the marker found with vision's detector, the fit (camera centre refined), and the
tool-point error over the work area before and after, against the true arm. Then the time of the fit
itself for 20 photos, and of detection + fit.

Run:  python -m tests.bench.bench_armfit [--stops 16]   (not part of the test suite; quote the figures)
"""

from __future__ import annotations

import argparse
import statistics
import tempfile
import time
from pathlib import Path

import numpy as np

from gripsight.app.armcal import marker_centre_px, pixel_model
from gripsight.app.cellfile import parse_cell
from gripsight.planning import armfit as af
from gripsight.planning.armposes import plan_stops
from gripsight.planning.picks import Planner
from gripsight.vision.calibration import calibrate
from gripsight.vision.markers import detect_markers
from gripsight.vision.synth.scene import CameraSpec, LightingSpec, SensorSpec
from tests.app.armcal_scenes import GRIPPER, marker_specs, render_photo, true_errors
from tests.conftest import cell_data_with_linkage

LOOKS = {
    "serial": (CameraSpec(centre_mm=[210, 0, 760], k1=-0.12, k2=0.03),
               LightingSpec(), SensorSpec(noise=1.5, jpeg_quality=92)),
    "parallel": (CameraSpec(centre_mm=[195, 10, 800], tilt_deg=3.0, tilt_azimuth_deg=120, k1=-0.05),
                 LightingSpec(brightness=0.7, white_balance=[1.15, 1.0, 0.8], gradient=0.3), SensorSpec(noise=2.5, jpeg_quality=85)),
    "four_bar": (CameraSpec(centre_mm=[220, -15, 720], tilt_deg=2.0, tilt_azimuth_deg=-60, k1=0.04, width_px=960, height_px=720),
                 LightingSpec(brightness=1.2, gradient=0.1, vignette=0.25), SensorSpec(noise=3.0, jpeg_quality=80)),
}


def one_linkage(kind: str, n_stops: int, folder: Path, seed: int) -> dict:
    data = cell_data_with_linkage(kind)
    data["markers"]["on_gripper"] = dict(GRIPPER)
    cell = parse_cell(data)
    planner = Planner(cell)
    arm = planner.arm
    mount = af.MarkerMount(tuple(GRIPPER["offset_mm"]), True)
    seq = plan_stops(planner, cell.work_area, mount, n_stops)
    commanded = np.array([s.joints_deg for s in seq.stops])
    truth = true_errors(np.random.default_rng(seed))
    camera, light, sensor = LOOKS[kind]
    cal_photo = render_photo(folder / f"{kind}-cal.png", cell, camera, light, sensor, seed)
    w, h = camera.width_px, camera.height_px
    cal = calibrate(detect_markers(cal_photo.image_bgr, cell.markers.dictionary), cell, (w, h), "cal")
    images, obs, pos_err = [], [], []
    for k, spec in enumerate(marker_specs(arm, truth, commanded, mount, cell)):
        r = render_photo(folder / f"{kind}-{k:02d}.jpg", cell, camera, light, sensor, seed, spec)
        images.append(r.image_bgr)
        found = [d for d in detect_markers(r.image_bgr, cell.markers.dictionary) if d.id == GRIPPER["id"]]
        uv = marker_centre_px(found[0].corners_px, cal.mapping.lens) if len(found) == 1 else None
        obs.append(af.StopObservation(f"stop{k + 1}", tuple(commanded[k]), None if uv is None else tuple(uv)))
        if uv is not None:
            true_pm = af.PixelModel.raised(cal.mapping.inverse, cal.mapping, r.camera.centre_mm)
            pos_err.append(float(np.linalg.norm(true_pm.back_project(uv[None], np.array([spec.centre_mm[2]]))[0]
                                                - spec.centre_mm[:2])))
    pm = pixel_model(cal)
    fit = af.fit_arm(arm, obs, mount, pm, fit_camera_centre=True, mapping_px=cal.rms_px)
    try:
        plain = af.fit_arm(arm, obs, mount, pm, mapping_px=cal.rms_px)
    except af.ArmFitRefused as exc:
        plain = exc
    grid = af.grid_in_polygon(cell.work_area, 10.0, [20.0, 60.0, 100.0])
    before = af.tool_errors_mm(arm, arm, truth, grid)
    after = af.tool_errors_mm(fit.fitted_arm(arm), arm, truth, grid)
    after_plain = (np.full(len(grid), np.nan) if isinstance(plain, Exception)
                   else af.tool_errors_mm(plain.fitted_arm(arm), arm, truth, grid))
    ok = ~np.isnan(before) & ~np.isnan(after)
    want = truth.vector(arm, False, cal_photo.camera.centre_mm)
    got = np.array([p.value for p in fit.parameters])
    sig = np.array([p.sigma for p in fit.parameters])
    rms = lambda v: float(np.sqrt(np.nanmean(v[ok] ** 2)))  # noqa: E731
    return {"kind": kind, "before_rms": rms(before), "before_max": float(before[ok].max()),
            "after_rms": rms(after), "after_max": float(after[ok].max()),
            "plain_rms": rms(after_plain), "plain_max": float(np.nanmax(after_plain[ok])) if not isinstance(plain, Exception) else np.nan,
            "plain_note": str(plain) if isinstance(plain, Exception) else "",
            "worst_sigma": float(np.max(np.abs(got - want) / sig)), "rms_px": fit.rms_px,
            "worst_servo_sigma": float(np.max(np.abs(got - want)[:8] / sig[:8])),
            "worst_name": fit.parameters[int(np.argmax(np.abs(got - want) / sig))].name,
            "marker_mm_max": max(pos_err), "cal_rms_px": cal.rms_px, "centre_err_mm": float(np.linalg.norm(cal.camera_centre_mm - cal_photo.camera.centre_mm)),
            "images": images, "obs": obs, "cal": cal, "arm": arm, "mount": mount, "cell": cell}


def timing(case: dict, n_photos: int = 20, repeats: int = 15) -> tuple[float, float]:
    """Median seconds of (the fit alone, detection in every photo + the fit) for ``n_photos`` photos."""
    obs = (case["obs"] * 2)[:n_photos]
    images = (case["images"] * 2)[:n_photos]
    pm = pixel_model(case["cal"])
    fit_s, all_s = [], []
    for _ in range(repeats):
        t0 = time.perf_counter()
        af.fit_arm(case["arm"], obs, case["mount"], pm, fit_camera_centre=True)
        fit_s.append(time.perf_counter() - t0)
    for _ in range(3):
        t0 = time.perf_counter()
        for im in images:
            [d for d in detect_markers(im, case["cell"].markers.dictionary) if d.id == GRIPPER["id"]]
        af.fit_arm(case["arm"], obs, case["mount"], pm, fit_camera_centre=True)
        all_s.append(time.perf_counter() - t0)
    return statistics.median(fit_s), statistics.median(all_s)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--stops", type=int, default=16)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        cases = [one_linkage(kind, args.stops, Path(tmp), seed) for seed, kind in enumerate(LOOKS, 31)]
    print(f"{args.stops} rendered stops per linkage; tool-point error over the work area (z 20/60/100 mm, "
          "10 mm grid) against the true arm")
    for c in cases:
        print(f"  {c['kind']:<9} before {c['before_rms']:6.2f} RMS / {c['before_max']:6.2f} max mm -> after "
              f"{c['after_rms']:.3f} / {c['after_max']:.3f} mm (centre kept from the riser: {c['plain_rms']:.3f} / "
              f"{c['plain_max']:.3f}{' refused' if c['plain_note'] else ''}); residual {c['rms_px']:.3f} px (calibration {c['cal_rms_px']:.3f} px); worst parameter {c['worst_name']} {c['worst_sigma']:.2f} sigma "
              f"from truth (servos and base: {c['worst_servo_sigma']:.2f}); marker xy from a photo (true centre) max {c['marker_mm_max']:.3f} mm; riser centre "
              f"{c['centre_err_mm']:.1f} mm off")
    fit_s, all_s = timing(cases[1])
    print(f"20 photos: the fit {fit_s * 1000:.0f} ms, detection + fit {all_s * 1000:.0f} ms (medians)")


if __name__ == "__main__":
    main()
