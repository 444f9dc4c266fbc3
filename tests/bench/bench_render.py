"""Benchmark: rendering one 1280x960 photo (scene to JPEG bytes), median of several renders.

Run:  python -m tests.bench.bench_render
"""

from __future__ import annotations

import time

import numpy as np

from gripsight.app.cellfile import load_cell
from tests.conftest import SAMPLE_CELL
from gripsight.vision.synth.render import encode_photo, render_scene
from gripsight.vision.synth.scene import CameraSpec, random_scene


def main(repeats: int = 8) -> None:
    cell = load_cell(SAMPLE_CELL)
    rng = np.random.default_rng(0)
    for label, cam in (("no distortion", CameraSpec()), ("k1=-0.15, tilt 2 deg", CameraSpec(k1=-0.15, k2=0.03, tilt_deg=2))):
        scenes = [random_scene(cell, rng, touching=True, camera=cam) for _ in range(repeats)]
        render_scene(cell, scenes[0])   # warm up (imports, OpenCV's first calls)
        times = []
        for sc in scenes:
            t0 = time.perf_counter()
            encode_photo(render_scene(cell, sc).image_bgr, ".jpg", sc.sensor.jpeg_quality)
            times.append(time.perf_counter() - t0)
        print(f"render 1280x960 ({label}): median {np.median(times) * 1e3:.0f} ms, "
              f"max {max(times) * 1e3:.0f} ms over {repeats} scenes")


if __name__ == "__main__":
    main()
