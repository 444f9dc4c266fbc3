"""Pictures that cost what they are worth: the OpenCV charts (ticks, scales, what they show), joints.csv
written row-vectorised exactly as Python's csv module writes it, and a batch's picture policy."""

from __future__ import annotations

import csv
import io
import shutil
from types import SimpleNamespace

import cv2
import numpy as np
import pytest
import yaml

from gripsight.app.batch import SAMPLE_EVERY, Pictures, _wants_pictures, BatchJob
from gripsight.app.chart import Chart, nice_ticks
from gripsight.app.cli import main
from gripsight.app.export import CSV_COLUMNS, _sample_rows
from gripsight.app.plan_plot import joint_plot_png, path_plot_png
from tests.conftest import ROOT, sample_cell_data

SAMPLES = ROOT / "sample_images"


@pytest.mark.parametrize("lo, hi", [(0.0, 37.38), (-72.3, 95.1), (780.0, 2230.0), (-0.013, 0.021), (150.0, 330.0)])
def test_ticks_match_matplotlibs_locator_on_the_same_steps(lo, hi):
    # matplotlib's MaxNLocator with steps 1, 2, 2.5, 5, 10 is the reference for "nice" 1-2-5 ticks
    from matplotlib.ticker import MaxNLocator

    ours = nice_ticks(lo, hi, target=7)
    ref = MaxNLocator(nbins=6, steps=[1, 2, 2.5, 5, 10]).tick_values(lo, hi)
    ref = ref[(ref >= lo - 1e-9) & (ref <= hi + 1e-9)]
    step_ours, step_ref = np.diff(ours)[0], np.diff(ref)[0]
    assert step_ours in (step_ref, step_ref / 2, step_ref * 2)   # the same 1-2-5 family, within one notch
    assert ours[0] >= lo - 1e-9 and ours[-1] <= hi + 1e-9
    assert np.allclose(np.diff(ours), step_ours)
    assert np.allclose(ours / step_ours, np.round(ours / step_ours))  # ticks on whole multiples of the step


def test_equal_aspect_panel_keeps_one_scale_and_inverts_x():
    chart = Chart(600, 300)
    panel = chart.panel((50, 20, 550, 280), (0, 100), (0, 100), equal=True, invert_x=True)
    uv = panel.to_px([0, 10, 0], [0, 0, 10])
    dx, dy = abs(uv[1, 0] - uv[0, 0]), abs(uv[2, 1] - uv[0, 1])
    assert dx == pytest.approx(dy)                       # 10 mm is as long across as up
    assert uv[1, 0] < uv[0, 0]                           # +x to the left when inverted
    assert uv[2, 1] < uv[0, 1]                           # +y up
    assert panel.to_px([50], [50])[0] == pytest.approx([300, 150])    # the box centre shows the range centre


def _rows_by_csv_module(t, kinds, parts, xyz, q, closed, pulses, grip_us):
    out = io.StringIO()
    w = csv.writer(out, lineterminator="\n")
    for i in range(len(t)):
        w.writerow([f"{t[i]:.4f}", kinds[i], parts[i], f"{xyz[i, 0]:.4f}", f"{xyz[i, 1]:.4f}", f"{xyz[i, 2]:.4f}",
                    f"{q[i, 0]:.6f}", f"{q[i, 1]:.6f}", f"{q[i, 2]:.6f}", "closed" if closed[i] else "open",
                    f"{pulses[i, 0]:.1f}", f"{pulses[i, 1]:.1f}", f"{pulses[i, 2]:.1f}", f"{grip_us[i]:.0f}"])
    return out.getvalue()


def test_joint_rows_are_what_the_csv_module_writes_even_for_awkward_ids():
    # reference: Python's csv.writer, row by row, as joints.csv was written before
    rng = np.random.default_rng(0)
    n = 200
    t = np.arange(n) * 0.02
    kinds = [str(k) for k in rng.choice(["start", "lower", "grip", "transfer"], n)]
    parts = [str(p) for p in rng.choice(["", "p1", "a,b", 'say "x"', "two words", "ünï"], n)]
    xyz = rng.normal(0, 200, (n, 3))
    xyz[0] = -0.0                                         # negative zero formats as csv.writer's f-string does
    q = rng.normal(0, 60, (n, 3))
    closed = rng.random(n) > 0.5
    pulses = rng.uniform(500, 2500, (n, 3))
    grip_us = np.where(closed, 1850, 1000)
    s = SimpleNamespace(t_s=t, segment_kind=kinds, part_id=parts, xyz_mm=xyz, gripper_closed=closed)
    assert _sample_rows(s, q, pulses, grip_us) == _rows_by_csv_module(t, kinds, parts, xyz, q, closed, pulses, grip_us)
    parsed = list(csv.reader(io.StringIO(_sample_rows(s, q, pulses, grip_us))))
    assert [r[2] for r in parsed] == parts and all(len(r) == len(CSV_COLUMNS) for r in parsed)


@pytest.fixture(scope="module")
def demo_plan():
    from gripsight.app.cellfile import load_cell
    from gripsight.app.partsfile import parse_parts
    from gripsight.planning.picks import Planner

    cell = load_cell(SAMPLES / "cell.yaml")
    planner = Planner(cell)
    parts = parse_parts([{"id": "r1", "class": "red", "x_mm": 200, "y_mm": 0},
                         {"id": "b1", "class": "blue", "x_mm": 250, "y_mm": -100, "yaw_deg": 30},
                         {"id": "far", "class": "blue", "x_mm": 335, "y_mm": -190}], cell)
    return cell, planner.arm, planner.plan(parts)


def _pixels_near(image, bgr, tol=40):
    return int(np.count_nonzero(np.abs(image.astype(int) - bgr).max(axis=2) < tol))


def test_joint_plot_shows_each_joint_and_the_gripper(demo_plan):
    cell, arm, plan = demo_plan
    image = cv2.imdecode(np.frombuffer(joint_plot_png(plan, cell, arm), np.uint8), cv2.IMREAD_COLOR)
    assert image.shape == (700, 1200, 3)
    for bgr in [(119, 158, 27), (2, 95, 217), (179, 112, 117)]:        # base, shoulder, elbow (legend colours)
        assert _pixels_near(image, bgr) > 1500                          # a curve in each panel, not just the legend


def test_path_plot_marks_the_rejected_part_and_the_carry(demo_plan):
    cell, arm, plan = demo_plan
    assert [o.part.id for o in plan.parts if o.rejection is not None] == ["far"]
    image = cv2.imdecode(np.frombuffer(path_plot_png(plan, cell, arm), np.uint8), cv2.IMREAD_COLOR)
    assert image.shape == (620, 1300, 3)
    assert _pixels_near(image, (40, 39, 214)) > 60                      # the red cross and its label
    assert _pixels_near(image, (14, 127, 255)) > 800                    # orange: carrying a part


def test_picture_policy_flags_rejections_refusals_and_a_sample():
    def job(i, pictures=Pictures.SOME):
        return BatchJob("p.jpg", "cell.yaml", None, "out", pictures=pictures, index=i)

    plain = {"status": "ok", "rejected": {}, "registration": "calibrated"}
    assert _wants_pictures(job(0), plain) and _wants_pictures(job(SAMPLE_EVERY), plain)
    assert not _wants_pictures(job(1), plain)
    assert _wants_pictures(job(1), {**plain, "rejected": {"out_of_reach": 1}})
    assert _wants_pictures(job(1), {**plain, "status": "refused"})
    assert _wants_pictures(job(1, Pictures.ALL), plain) and not _wants_pictures(job(0, Pictures.NONE), plain)


@pytest.mark.slow
def test_batch_draws_pictures_where_they_are_worth_it_and_keeps_every_thumbnail(tmp_path, capsys):
    folder = tmp_path / "photos"
    folder.mkdir()
    for name in ("batch_01", "batch_02", "batch_21"):       # batch_21: one part rejected (elbow_interior)
        shutil.copy(SAMPLES / "batch" / f"{name}.jpg", folder / f"{name}.jpg")
    (tmp_path / "cell.yaml").write_text(yaml.safe_dump(sample_cell_data(), sort_keys=False))
    shutil.copy(SAMPLES / "calibration.jpg", tmp_path / "calibration.jpg")
    out = tmp_path / "out"
    assert main(["batch", str(folder), "--workers", "1", "--out", str(out)]) == 0
    capsys.readouterr()
    have = {p: sorted(f.name for f in (out / p).glob("*.png")) for p in ("batch_01.jpg", "batch_02.jpg", "batch_21.jpg")}
    assert have["batch_01.jpg"] == have["batch_21.jpg"] == ["joints.png", "overlay.png", "path.png"]
    assert have["batch_02.jpg"] == []                        # not sampled, nothing rejected
    assert (out / "batch_02.jpg" / "joints.csv").is_file()
    report = (out / "report.html").read_text()
    assert report.count('src="data:image/jpeg;base64,') == 3
    assert 'href="batch_21.jpg/overlay.png"' in report and 'href="batch_02.jpg/overlay.png"' not in report
    assert main(["batch", str(folder), "--workers", "1", "--out", str(out), "--pictures", "all"]) == 0
    capsys.readouterr()
    assert (out / "batch_02.jpg" / "overlay.png").is_file()
    assert main(["batch", str(folder), "--out", str(out), "--pictures", "many"]) == 2      # a usage error (DEVELOPERS.md, exit codes)
    assert "--pictures: expected some, all or none, got 'many'" in capsys.readouterr().err


def test_a_thumbnail_marks_every_part_found_where_the_full_overlay_does():
    # the report's thumbnail of a photo without overlay.png is drawn at its own size: each part's pick
    # cross lies where the full overlay's cross lies, scaled (pixel centres: (u + 0.5) s - 0.5), and the
    # rest is the photo shrunk as before (INTER_AREA)
    from gripsight.app.cellfile import load_cell
    from gripsight.app.pipeline import analyse_photo, load_or_make_calibration
    from gripsight.vision.overlay import detection_thumbnail, shrink, top_centre_px

    cell = load_cell(SAMPLES / "cell.yaml")
    a = analyse_photo(SAMPLES / "batch" / "batch_03.jpg", cell, load_or_make_calibration(cell, None))
    reg = a.registration
    small = detection_thumbnail(a.image, a.detection, reg.mapping, reg.camera_centre_mm, cell, 240)
    plain = shrink(a.image, 240)
    assert small.shape == plain.shape == (180, 240, 3)
    assert len(a.detection.parts) == 8
    for p in a.detection.parts:
        uv = (top_centre_px(reg.mapping, reg.camera_centre_mm, p.xy_mm, p.height_mm) + 0.5) * 240 / 1280 - 0.5
        u, v = np.round(uv).astype(int)
        assert (small[v, u] == 255).all() and (small[v, u + 2] == 255).all()      # the white cross, 5 px
    drawn = np.any(small != plain, axis=2)
    assert 0.02 < drawn.mean() < 0.12                # the work area, outlines and crosses; the photo elsewhere


@pytest.mark.parametrize("height, width", [(960, 1280), (1, 1), (7, 333), (700, 1200)])
def test_png_files_decode_to_the_image_with_and_without_isal(height, width, monkeypatch):
    # the PNG writer (filter "up", ISA-L's deflate) against OpenCV's decoder (the reference); without
    # the isal package OpenCV encodes, and the file decodes to the same image
    import builtins

    from gripsight.app.chart import png_bytes

    rng = np.random.default_rng(height)
    image = rng.integers(0, 256, (height, width, 3), dtype=np.uint8)
    image[: height // 2] = image[: height // 2] // 64 * 64          # flat areas as well as noise
    fast = png_bytes(image)
    assert fast[:8] == b"\x89PNG\r\n\x1a\n"
    assert np.array_equal(cv2.imdecode(np.frombuffer(fast, np.uint8), cv2.IMREAD_UNCHANGED), image)
    real_import = builtins.__import__

    def no_isal(name, *args, **kwargs):
        if name == "isal":
            raise ImportError("no isal here")
        return real_import(name, *args, **kwargs)

    monkeypatch.setattr(builtins, "__import__", no_isal)
    slow = png_bytes(image)
    assert slow != fast
    assert np.array_equal(cv2.imdecode(np.frombuffer(slow, np.uint8), cv2.IMREAD_UNCHANGED), image)


def test_a_simplified_curve_stays_within_a_quarter_pixel_of_every_sample():
    # Douglas-Peucker (OpenCV's approxPolyDP) on a dense joint curve: ends kept, far fewer points, and
    # every sample within 0.25 px (4 sixteenths) of the drawn polyline, measured here point to segment
    from gripsight.app.chart import _simplified

    t = np.linspace(0, 40, 2400)
    uv = np.column_stack([30 + t * 27.0, 300 + 120 * np.sin(t / 3) * (t % 7 < 5)])
    fixed = np.round(uv * 16).astype(np.int32)
    kept = _simplified(fixed)
    assert (kept[0] == fixed[0]).all() and (kept[-1] == fixed[-1]).all()
    assert len(kept) < len(fixed) / 5
    a, b = kept[:-1].astype(float), kept[1:].astype(float)
    d = b - a
    s = np.clip(((fixed[:, None, :] - a) * d).sum(axis=2) / np.maximum((d * d).sum(axis=1), 1e-9), 0, 1)
    gap = np.linalg.norm(fixed[:, None, :] - (a + s[..., None] * d), axis=2).min(axis=1)
    assert gap.max() <= 4.0 + 1e-9


@pytest.mark.parametrize("decimals", [0, 1, 4, 6])
def test_fixed_point_text_is_pythons_percent_format(decimals):
    # reference: Python's '%.Nf' (correctly rounded, ties to even) value by value; exact ties (0.03125
    # at 4 decimals), values a hair from a half, negative zero and negatives that round to zero included
    from gripsight.app.fixedtext import fixed_slots, joined_rows

    rng = np.random.default_rng(decimals)
    for scale in (1e-7, 1e-3, 1.0, 300.0, 2000.0):
        if 6 * scale * 10 ** decimals >= 2 ** 30:       # beyond the fast path's range (angles: 360 deg at 6)
            continue
        v = rng.normal(0, scale, 5000)
        v[:10] = [0.0, -0.0, 4e-8, -4e-8, 0.03125, -0.03125, 2.5, 0.5, 9.9999999999, -1e-12]
        half = (np.floor(v[10:20] * 10.0 ** decimals) + 0.5) / 10.0 ** decimals
        v[10:20] = np.nextafter(half, half + rng.choice([-1, 1], 10))       # a hair from a half
        slots = fixed_slots(v, decimals)
        assert slots is not None
        assert joined_rows([slots]).decode().split("\n")[:-1] == ["%.*f" % (decimals, x) for x in v]
    assert fixed_slots(np.array([1.0, np.nan]), 2) is None and fixed_slots(np.array([3e9]), 1) is None


def test_joint_rows_fall_back_to_python_where_a_number_needs_it():
    from gripsight.app.export import _sample_rows_numpy

    n = 50
    rng = np.random.default_rng(3)
    t, q, pulses = np.arange(n) * 0.02, rng.normal(0, 60, (n, 3)), rng.uniform(500, 2500, (n, 3))
    xyz = rng.normal(0, 200, (n, 3))
    kinds, parts, closed = ["transfer"] * n, ["p1"] * n, rng.random(n) > 0.5
    grip_us = np.where(closed, 1850, 1000)
    s = SimpleNamespace(t_s=t, segment_kind=kinds, part_id=parts, xyz_mm=xyz, gripper_closed=closed)
    texts = [kinds, parts, np.where(closed, "closed", "open").tolist()]
    assert _sample_rows_numpy(s, q, pulses, grip_us, texts) is not None
    xyz[7, 2] = np.nan                                   # numpy cannot promise Python's text: Python writes it
    assert _sample_rows_numpy(s, q, pulses, grip_us, texts) is None
    assert _sample_rows(s, q, pulses, grip_us) == _rows_by_csv_module(t, kinds, parts, xyz, q, closed, pulses, grip_us)
