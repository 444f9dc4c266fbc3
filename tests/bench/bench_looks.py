"""Benchmark: detection on photos of a different look, one thing varied at a time, far outside what the
sample set renders (table surface, light colour, exposure, vignetting, lens, resolution, JPEG, marker
size and dictionary, part colours). Our own renderer, so every photo has its truth.

Each condition changes one thing of the base look (the demo cell and camera, neutral light, plywood),
renders one calibration photo (markers only) and ``--scenes`` photos of 4-8 parts with that look,
calibrates from the first and analyses the others as ``run`` does. Per condition it prints recall, false
parts, pick-point RMS / max, markers found / expected (the table markers in view in the photos, which
are tracked; and every marker of the layout in the calibration photo), every refusal with its message
(a failed calibration, a refused registration) and every warning (the photo's warnings and the
detection's notes). A part verdict other than ``ok`` on a part the truth expects counts in recall.

Run:  python -m tests.bench.bench_looks [--scenes 8] [--only NAME ...] [--keep DIR] [-v]
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import numpy as np
import yaml

from gripsight.app.calfile import read_calibration, write_calibration
from gripsight.app.cellfile import load_cell
from gripsight.app.errors import GripsightError
from gripsight.app.photoset import demo_camera_spec, write_photo
from gripsight.app.pipeline import analyse_photo
from gripsight.vision.errors import VisionError
from gripsight.vision.tonecurve import calibrate_photo
from gripsight.vision.photo import read_photo
from gripsight.vision.synth.render import render_scene
from gripsight.vision.synth.scene import LightingSpec, SensorSpec, make_camera, random_scene
from gripsight.vision.synth.surfaces import Surface
from tests.bench.devset_truth import Score, read_render_truth, score_photo
from tests.conftest import SAMPLE_CELL


# ------------------------------------------------------------------ the looks
# A condition: name -> dict of changes. Keys: table_lab, surface, lighting (LightingSpec fields), sensor
# (SensorSpec fields), camera (CameraSpec fields; "focal_scale" scales the fitted focal length), cell
# (a function changing the cell file's dict).
def _classes(labs: dict):
    def change(cell: dict) -> dict:
        for name, lab in labs.items():
            cell["parts"][name]["lab"] = list(lab)
        return cell
    return change


def _markers(**changes):
    def change(cell: dict) -> dict:
        cell["markers"].update(changes)
        return cell
    return change


CONDITIONS: dict[str, dict] = {
    "base": {},
    # table surface
    "table white": {"table_lab": (93.0, 0.0, 1.0)},
    "table black": {"table_lab": (16.0, 0.0, 0.0)},
    "table mid-grey": {"table_lab": (50.0, 0.0, 0.0)},
    "cloth teal": {"table_lab": (50.0, -35.0, -15.0)},
    "cloth magenta": {"table_lab": (45.0, 55.0, -20.0)},
    "cloth orange": {"table_lab": (65.0, 35.0, 60.0)},
    "checker cloth": {"surface": Surface.CHECKER_CLOTH},
    "printed text": {"surface": Surface.PRINTED_TEXT},
    "cutting mat": {"surface": Surface.CUTTING_MAT},
    # light colour (white-balance error) and exposure
    "warm 2700K": {"lighting": {"white_balance": [1.4, 1.0, 0.7]}},
    "cool 6500K": {"lighting": {"white_balance": [0.75, 1.0, 1.35]}},
    "green cast": {"lighting": {"white_balance": [0.8, 1.3, 0.8]}},
    "under 0.4x": {"lighting": {"brightness": 0.4}},
    "over 1.8x": {"lighting": {"brightness": 1.8}},
    "vignette 40%": {"lighting": {"vignette": 0.5}},
    "hard shadows": {"lighting": {"light_elevation_deg": 25.0, "shadow": 0.8, "shadow_blur_mm": 0.3, "ambient": 0.15}},
    "spot light": {"lighting": {"spot_radius_mm": 200.0, "spot_centre_mm": [150.0, 120.0], "spot_floor": 0.35}},
    "hard shadows, orange": {"table_lab": (65.0, 35.0, 60.0),
                             "lighting": {"light_elevation_deg": 25.0, "shadow": 0.8, "shadow_blur_mm": 0.3}},
    # lens and sensor
    "barrel k1 -0.3": {"camera": {"k1": -0.3, "k2": 0.0}},
    "pincushion k1 +0.2": {"camera": {"k1": 0.2, "k2": 0.0, "focal_scale": 0.85}},
    "1280x720": {"camera": {"width_px": 1280, "height_px": 720}},
    "4000x3000": {"camera": {"width_px": 4000, "height_px": 3000}},
    "600x450": {"camera": {"width_px": 600, "height_px": 450}},
    "jpeg 40": {"sensor": {"jpeg_quality": 40}},
    "noise 8, blur 1.2": {"sensor": {"noise": 8.0, "blur_px": 1.2}},
    "tilt 6 deg": {"camera": {"tilt_deg": 6.0, "tilt_azimuth_deg": 200.0}},
    "camera 620 mm": {"camera": {"centre_mm": [202.5, 0.0, 620.0]}},
    "camera 950 mm": {"camera": {"centre_mm": [202.5, 0.0, 950.0]}},
    # markers
    "markers 25 mm": {"cell": _markers(size_mm=25)},
    "markers 60 mm": {"cell": _markers(size_mm=60)},
    "dict 6x6_250": {"cell": _markers(dictionary="aruco_6x6_250")},
    "apriltag 36h11": {"cell": _markers(dictionary="apriltag_36h11")},
    # part colours
    "parts near table": {"cell": _classes({"yellow": (78.0, 4.0, 22.0)})},
    "table near a part": {"table_lab": (62.0, -30.0, 25.0)},
    "dark parts": {"cell": _classes({"blue": (22.0, 8.0, -30.0), "red": (18.0, 1.0, 1.0)})},
    "pale parts": {"cell": _classes({"yellow": (93.0, -1.0, 3.0), "green": (86.0, -10.0, 8.0),
                                     "red": (84.0, 14.0, 6.0), "blue": (84.0, -2.0, -16.0)})},
}


def _cell_for(look: dict, folder: Path):
    if "cell" not in look:
        return load_cell(SAMPLE_CELL)
    data = yaml.safe_load(Path(SAMPLE_CELL).read_text())
    path = folder / "cell.yaml"
    path.write_text(yaml.safe_dump(look["cell"](data), sort_keys=False))
    return load_cell(path)


def _scenes(cell, look: dict, n: int, seed: int):
    rng = np.random.default_rng(seed)
    cam = dict(look.get("camera", {}))
    scale = cam.pop("focal_scale", None)
    camera = demo_camera_spec(cell, **cam)
    if scale is not None:
        plain = camera.model_copy(update={"k1": 0.0, "k2": 0.0})
        camera = camera.model_copy(update={"focal_px": scale * float(make_camera(plain, cell).K[0, 0])})
    lighting = LightingSpec(**look.get("lighting", {}))
    sensor = SensorSpec(**look.get("sensor", {}))
    surface = look.get("surface", Surface.PLYWOOD)
    out = []
    for _ in range(n):
        s = random_scene(cell, rng, (4, 8), camera=camera, lighting=lighting, sensor=sensor, surface=surface)
        if "table_lab" in look:
            s = s.model_copy(update={"table_lab": list(look["table_lab"])})
        out.append(s)
    calib = out[0].model_copy(update={"parts": []})
    return calib, out


class _Result:
    def __init__(self):
        self.score, self.markers_found, self.markers_expected, self.refusals = Score(), 0, 0, []
        self.statuses: dict[str, int] = {}
        self.calib_markers = "-"
        self.set_aside: list[str] = []               # the calibration's reasons for table markers it left out
        self.warnings: dict[str, int] = {}           # warning or note -> photos


def run_look(name: str, look: dict, n: int, seed: int, folder: Path) -> _Result:
    folder.mkdir(parents=True, exist_ok=True)
    cell = _cell_for(look, folder)
    calib_scene, scenes = _scenes(cell, look, n, seed)
    res = _Result()
    quality = calib_scene.sensor.jpeg_quality
    calib_photo = write_photo(folder / "calibration.jpg", render_scene(cell, calib_scene), quality)
    try:
        image = read_photo(calib_photo)
        cal, seen = calibrate_photo(image, cell, str(calib_photo))       # as `gripsight calibrate` does
        res.calib_markers = f"{len(seen)}/{len(cell.markers.layout)}, " + (
            "sRGB" if cal.tone_power is None else f"code^{cal.tone_power:g}")        # the grey-to-light curve found
        aside = [f"{m.id} {m.role.value}" for m in cal.markers if not m.used and m.role.value != "raised"]
        if aside:                                                         # table markers the calibration left out
            res.calib_markers += ", set aside " + ", ".join(aside)
            res.set_aside = [f"marker {m.id}: {m.reason}" for m in cal.markers if not m.used and m.role.value != "raised"]
        path = folder / "calibration.yaml"
        write_calibration(path, cal, cell, calib_photo)
        stored = read_calibration(path)
    except (VisionError, GripsightError) as e:
        res.refusals.append(f"calibration: {e}")
        return res
    if str(getattr(stored.verdict, "value", stored.verdict)) != "good":
        res.refusals.append(f"calibration verdict {stored.verdict}")
    for k, scene in enumerate(scenes):
        photo = write_photo(folder / f"look_{k:02d}.jpg", render_scene(cell, scene), quality)
        truth = read_render_truth(photo.with_name(photo.stem + ".truth.yaml"), cell)
        raw = yaml.safe_load(photo.with_name(photo.stem + ".truth.yaml").read_text())
        ground = {m["id"] for m in raw["markers"] if m["in_view"] and m["z_mm"] == 0}
        res.markers_expected += len(ground)
        try:
            analysis = analyse_photo(photo, cell, stored)
        except (VisionError, GripsightError) as e:
            res.refusals.append(f"{photo.name}: {e}")
            res.score = res.score.add(score_photo([], truth))
            continue
        res.markers_found += len(ground & {m.id for m in analysis.markers})
        if analysis.detection is None:
            res.refusals.append(f"{photo.name}: registration {analysis.registration.action}: "
                                f"{analysis.registration.message}")
            res.score = res.score.add(score_photo([], truth))
            continue
        for w in [*analysis.warnings, *analysis.detection.notes]:
            res.warnings[w] = res.warnings.get(w, 0) + 1
        for d in analysis.detection.parts:
            key = str(d.status)
            res.statuses[key] = res.statuses.get(key, 0) + 1
        res.score = res.score.add(score_photo(analysis.detection.parts, truth))
    return res


def _line(name: str, r: _Result) -> str:
    f = r.score.figures()
    return (f"{name:<20} parts {f['expected']:3d}  recall {f['recall']:.3f}  false {f['false_parts']:2d}  "
            f"RMS {f['rms_mm']:.3f}  max {f['max_mm']:.3f} mm  markers {r.markers_found}/{r.markers_expected} "
            f"(calibration {r.calib_markers})  "
            f"refusals {len(r.refusals)}  warned {sum(r.warnings.values())}")


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--scenes", type=int, default=8)
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--only", action="append", help="a condition's name (repeatable); default all")
    ap.add_argument("--keep", type=Path, help="keep the photos in this folder (one subfolder a condition)")
    ap.add_argument("-v", "--verbose", action="store_true", help="list misses, false parts, verdicts")
    args = ap.parse_args(argv)
    names = args.only or list(CONDITIONS)
    with tempfile.TemporaryDirectory() as tmp:
        root = args.keep or Path(tmp)
        for name in names:
            t0 = time.perf_counter()
            r = run_look(name, CONDITIONS[name], args.scenes, args.seed, root / name.replace(" ", "_"))
            print(_line(name, r) + f"  ({time.perf_counter() - t0:.0f} s)", flush=True)
            for msg in r.refusals[:6]:
                print(f"    refusal: {msg}")
            for msg, n in sorted(r.warnings.items(), key=lambda kv: -kv[1])[:4]:
                print(f"    warning ({n} photos): {msg}")
            if args.verbose:
                for msg in r.set_aside:
                    print(f"    calibration: {msg}")
                print(f"    verdicts: {r.statuses}")
                for m in r.score.misses:
                    print(f"    missed {m[0]} part {m[1]} ({m[2]}); reported there: {', '.join(m[3]) or 'nothing'}")
                for f in r.score.falses:
                    print(f"    false  {f[0]} {f[1]} at {f[2]}")


if __name__ == "__main__":
    main()
