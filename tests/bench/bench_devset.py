"""Benchmark: detection on the outside photo set (``../shared/devset``, another renderer) and on
gripsight's own renders (``sample_images/batch``), scored against their truth files.

Each photo is calibrated from its own calibration photo (the truth's ``calib_image``) and analysed the
way ``run`` and ``batch`` do (markers, drift check against that calibration, detection) with the set's
own ``cell.yaml``. Per set it prints recall, false parts, pick-point RMS, p95 and max error and the mean
error vector (scoring: :mod:`tests.bench.devset_truth`); hard photos are also split by whether they show
the raised marker. Then: are the bumped photos reported moved against the nominal calibration, and the
nominal ones not?

The outside set is for measuring only: nothing of it is copied into the repository and no constant is
tuned to it.

Run:  python -m tests.bench.bench_devset [--set nominal|hard|bumped|own] [--devset PATH] [-v]
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
from pathlib import Path

from gripsight.app.calfile import read_calibration, write_calibration
from gripsight.app.cellfile import load_cell
from gripsight.app.pipeline import analyse_photo
from gripsight.vision.photo import read_photo
from gripsight.vision.tonecurve import calibrate_photo
from tests.bench.devset_truth import Score, read_render_truth, read_scene_truth, score_photo
from tests.conftest import ROOT, SAMPLE_CELL

DEFAULT_DEVSET = Path(os.environ.get("GRIPSIGHT_DEVSET", ROOT.parent / "shared" / "devset"))
SETS = ("nominal", "hard", "bumped")


class _Calibrations:
    """Calibration photos calibrated once each, stored and read back as ``run`` reads them."""

    def __init__(self, cell, folder: Path):
        self.cell, self.folder, self.cache = cell, folder, {}

    def __call__(self, photo: Path):
        photo = Path(photo).resolve()
        if photo not in self.cache:
            image = read_photo(photo)
            cal, _ = calibrate_photo(image, self.cell, str(photo))      # as `gripsight calibrate` does
            path = self.folder / f"{photo.stem}.calibration.yaml"
            write_calibration(path, cal, self.cell, photo)
            self.cache[photo] = read_calibration(path)
        return self.cache[photo]


def _status(d) -> str:
    return str(getattr(d.status, "value", d.status))


def _verdict(analysis) -> str:
    drift = analysis.registration.drift
    return "?" if drift is None else str(getattr(drift.verdict, "value", drift.verdict))


def _line(label: str, s: Score) -> str:
    f = s.figures()
    return (f"{label:<22} parts {f['expected']:3d}  recall {f['recall']:.3f}  false {f['false_parts']:2d}  "
            f"RMS {f['rms_mm']:.3f}  p95 {f['p95_mm']:.3f}  max {f['max_mm']:.3f} mm  "
            f"mean ({f['mean_mm'][0]:+.3f}, {f['mean_mm'][1]:+.3f}) mm")


def _details(s: Score) -> None:
    for m in s.misses:
        print(f"    missed {m[0]} part {m[1]} ({m[2]}); reported there: {', '.join(m[3]) or 'nothing'}")
    for f in s.falses:
        print(f"    false  {f[0]} {f[1]} at {f[2]}")


def run_devset(devset: Path, which: list[str], verbose: bool) -> None:
    cell = load_cell(devset / "cell.yaml")
    with tempfile.TemporaryDirectory() as tmp:
        cals = _Calibrations(cell, Path(tmp))
        for name in which:
            total, with_riser, without = Score(), Score(), Score()
            for truth_path in sorted((devset / name).glob("*.truth.yaml")):
                truth = read_scene_truth(truth_path, cell)
                analysis = analyse_photo(truth.photo, cell, cals(truth.calib_photo))
                parts = [] if analysis.detection is None else analysis.detection.parts
                s = score_photo(parts, truth)
                total = total.add(s)
                if truth.has_riser:
                    with_riser = with_riser.add(s)
                else:
                    without = without.add(s)
            print(_line(name, total))
            if name == "hard":
                print(_line("  hard, raised marker", with_riser))
                print(_line("  hard, none", without))
            if verbose:
                _details(total)
        nominal = cals(devset / "calib" / "calib_nominal.jpg")
        verdicts = {}
        for name in ("nominal", "bumped"):
            photos = sorted((devset / name).glob("*.jpg"))
            verdicts[name] = [_verdict(analyse_photo(p, cell, nominal)) for p in photos]
        moved = sum(v == "moved" for v in verdicts["bumped"])
        still = sum(v == "ok" for v in verdicts["nominal"])
        print(f"against the nominal calibration: bumped reported moved {moved}/{len(verdicts['bumped'])}, "
              f"nominal reported not moved {still}/{len(verdicts['nominal'])}")


def run_own(verbose: bool) -> None:
    cell = load_cell(SAMPLE_CELL)
    with tempfile.TemporaryDirectory() as tmp:
        stored = _Calibrations(cell, Path(tmp))(ROOT / "sample_images" / "calibration.jpg")
        total = Score()
        for truth_path in sorted((ROOT / "sample_images" / "batch").glob("*.truth.yaml")):
            truth = read_render_truth(truth_path, cell)
            analysis = analyse_photo(truth.photo, cell, stored)
            total = total.add(score_photo([] if analysis.detection is None else analysis.detection.parts, truth))
        print(_line("own renders (batch)", total))
        if verbose:
            _details(total)


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--set", choices=(*SETS, "own"), action="append", help="one set (repeatable); default all")
    ap.add_argument("--devset", type=Path, default=DEFAULT_DEVSET)
    ap.add_argument("-v", "--verbose", action="store_true", help="list every miss and false part")
    args = ap.parse_args(argv)
    which = args.set or [*SETS, "own"]
    outside = [s for s in which if s in SETS]
    if outside:
        if not (args.devset / "cell.yaml").is_file():
            sys.exit(f"{args.devset}: no outside photo set here (cell.yaml missing); give --devset PATH")
        run_devset(args.devset, outside, args.verbose)
    if "own" in which:
        run_own(args.verbose)


if __name__ == "__main__":
    main()
