"""The live cell: photos taken once completely written, in name order; a live run writes the same joint
sequence as a run over the saved photos; Ctrl-C leaves a state --resume continues; joints.csv comes
before any picture."""

from __future__ import annotations

import json
import queue
import shutil
import threading
import time
from pathlib import Path

import pytest
import yaml

from gripsight.app.cellfile import load_cell
from gripsight.app.live import PhotoWatcher, PictureWriter, watchdog_available
from gripsight.app.pipeline import load_or_make_calibration
from gripsight.app.run import PHOTO_SUFFIXES, run_folder
from tests.conftest import ROOT, sample_cell_data

SAMPLES = ROOT / "sample_images"
MODES = [pytest.param(True, id="file-events"), pytest.param(False, id="polling")]


def _collect(watcher: PhotoWatcher) -> tuple[queue.Queue, threading.Thread]:
    got: queue.Queue = queue.Queue()

    def work():
        for path in watcher:
            got.put((path.name, path.stat().st_size, time.monotonic()))

    thread = threading.Thread(target=work, daemon=True)
    thread.start()
    return got, thread


@pytest.mark.parametrize("events", MODES)
def test_a_photo_is_taken_once_closed_and_in_name_order(tmp_path, events):
    if events and not watchdog_available():
        pytest.skip("watchdog is not installed")
    raw = (SAMPLES / "demo" / "demo_01.jpg").read_bytes()
    (tmp_path / "b_there_before.jpg").write_bytes(raw)
    stop = threading.Event()
    # polling cannot see a close: a photo counts as written once unchanged for settle_s (longer than the
    # writer's pause below); file events see the close, so settle_s only serves the photo already there
    watcher = PhotoWatcher(tmp_path, PHOTO_SUFFIXES, settle_s=0.3 if events else 1.5, poll_s=0.02, stop=stop,
                           use_watchdog=events)
    got, thread = _collect(watcher)
    try:
        assert got.get(timeout=10)[:2] == ("b_there_before.jpg", len(raw))      # already there: taken once settled
        (tmp_path / "notes.txt").write_text("not a photo")
        (tmp_path / ".hidden.jpg").write_bytes(raw)
        # two photos written at once: c finishes first but a (earlier name) is still being written
        with open(tmp_path / "a_late.jpg", "wb") as a_file:
            a_file.write(raw[:1000])
            a_file.flush()
            (tmp_path / "c.jpg").write_bytes(raw)
            with pytest.raises(queue.Empty):
                got.get(timeout=0.8)                   # neither: a is open, and c waits behind it
            a_file.write(raw[1000:])
        t_closed = time.monotonic()
        first, second = got.get(timeout=10), got.get(timeout=10)
        assert (first[0], first[1]) == ("a_late.jpg", len(raw)) and second[0] == "c.jpg"
        if events:
            assert first[2] - t_closed < 0.25            # the close itself, not a settling time (0.3 s)
        (tmp_path / "c.jpg").write_bytes(raw)           # written again: each name is taken once
        with pytest.raises(queue.Empty):
            got.get(timeout=0.8)
        assert watcher.out_of_order == ["a_late.jpg"]   # came after b_there_before.jpg had been taken
    finally:
        stop.set()
        thread.join(timeout=5)
    assert not thread.is_alive()


def test_a_photo_renamed_into_the_folder_is_taken_at_once(tmp_path):
    if not watchdog_available():
        pytest.skip("watchdog is not installed")
    stop = threading.Event()
    watcher = PhotoWatcher(tmp_path, PHOTO_SUFFIXES, settle_s=5.0, poll_s=0.02, stop=stop)
    got, thread = _collect(watcher)
    try:
        time.sleep(0.3)
        (tmp_path / ".part").write_bytes((SAMPLES / "demo" / "demo_02.jpg").read_bytes())
        (tmp_path / ".part").rename(tmp_path / "demo_02.jpg")
        assert got.get(timeout=2)[0] == "demo_02.jpg"     # well before settle_s
    finally:
        stop.set()
        thread.join(timeout=5)


def test_a_photo_moved_in_from_another_folder_is_taken_once_settled_not_stalled(tmp_path):
    # inotify reports a move from a folder not watched as a creation alone (no close follows): it waited
    # stall_s (10 s) as if its writer had paused; now settle_s, as a photo already there
    if not watchdog_available():
        pytest.skip("watchdog is not installed")
    watched, elsewhere = tmp_path / "watched", tmp_path / "elsewhere"
    watched.mkdir()
    elsewhere.mkdir()
    stop = threading.Event()
    watcher = PhotoWatcher(watched, PHOTO_SUFFIXES, settle_s=0.3, stall_s=30.0, poll_s=0.02, stop=stop)
    got, thread = _collect(watcher)
    try:
        time.sleep(0.3)
        raw = (SAMPLES / "demo" / "demo_02.jpg").read_bytes()
        (elsewhere / "demo_02.jpg").write_bytes(raw)
        t_moved = time.monotonic()
        (elsewhere / "demo_02.jpg").rename(watched / "demo_02.jpg")
        name, size, t_taken = got.get(timeout=10)
        assert (name, size) == ("demo_02.jpg", len(raw))
        assert t_taken - t_moved < 10.0                   # well before stall_s (30 s)
    finally:
        stop.set()
        thread.join(timeout=5)


@pytest.mark.parametrize("events", MODES)
def test_a_watched_folder_that_goes_away_ends_the_watch_and_says_so(tmp_path, events):
    if events and not watchdog_available():
        pytest.skip("watchdog is not installed")
    watched = tmp_path / "watched"
    watched.mkdir()
    shutil.copy(SAMPLES / "demo" / "demo_01.jpg", watched / "demo_01.jpg")
    watcher = PhotoWatcher(watched, PHOTO_SUFFIXES, settle_s=0.2, poll_s=0.02, use_watchdog=events)
    got, thread = _collect(watcher)
    assert got.get(timeout=10)[0] == "demo_01.jpg"
    shutil.rmtree(watched)                                # no idle stop: it watched nothing, for ever
    thread.join(timeout=10)
    assert not thread.is_alive() and watcher.gone


def _live_cell(tmp_path) -> tuple:
    (tmp_path / "cell.yaml").write_text(yaml.safe_dump(sample_cell_data(), sort_keys=False))
    shutil.copy(SAMPLES / "calibration.jpg", tmp_path / "calibration.jpg")
    cell = load_cell(tmp_path / "cell.yaml")
    return cell, load_or_make_calibration(cell, None)


def _body(path: Path) -> list[str]:
    return [line for line in path.read_text().splitlines() if not line.startswith("#")]


class _Camera(threading.Thread):
    """Copies photos into a folder one by one, each written in two halves."""

    def __init__(self, photos, folder: Path, gap_s: float = 0.05):
        super().__init__(daemon=True)
        self.photos, self.folder, self.gap_s = photos, folder, gap_s

    def run(self):
        for photo in self.photos:
            raw = photo.read_bytes()
            with open(self.folder / photo.name, "wb") as fh:
                fh.write(raw[:20000])
                fh.flush()
                time.sleep(self.gap_s)
                fh.write(raw[20000:])
            time.sleep(self.gap_s)


def _saved_demo_photos(tmp_path, n: int):
    """The first n demo photos and a folder ``saved`` holding copies of them."""
    photos = sorted((SAMPLES / "demo").glob("*.jpg"))[:n]
    saved = tmp_path / "saved"
    saved.mkdir()
    for p in photos:
        shutil.copy(p, saved / p.name)
    return photos, saved


def _reference_run_and_camera_folder(tmp_path, n: int):
    """The live cell, the first n demo photos run from a saved folder into ``tmp_path/ref``, and an empty
    folder ``tmp_path/cam`` for a camera to write into."""
    cell, stored = _live_cell(tmp_path)
    photos, saved = _saved_demo_photos(tmp_path, n)
    run_folder(saved, cell, stored, tmp_path / "ref")
    cam = tmp_path / "cam"
    cam.mkdir()
    return cell, stored, photos, cam


@pytest.mark.slow
def test_a_live_run_writes_the_sequence_a_run_over_saved_photos_writes(tmp_path, monkeypatch):
    cell, stored = _live_cell(tmp_path)
    photos, saved = _saved_demo_photos(tmp_path, 5)
    ref = run_folder(saved, cell, stored, tmp_path / "ref")

    import gripsight.app.photo_outputs as outputs

    real = outputs.write_photo_pictures
    order_seen = []

    def spy(out_dir, pp, *args, **kwargs):            # joints.csv and the run state come first
        state = json.loads((out_dir.parent / "run_state.json").read_text())
        order_seen.append(((out_dir / "joints.csv").is_file(), out_dir.name in state["done"]))
        return real(out_dir, pp, *args, **kwargs)

    monkeypatch.setattr(outputs, "write_photo_pictures", spy)
    cam = tmp_path / "cam"
    cam.mkdir()
    camera = _Camera(photos, cam)
    watcher = PhotoWatcher(cam, PHOTO_SUFFIXES, poll_s=0.02, idle_stop_s=1.5)
    camera.start()
    live = run_folder(cam, cell, stored, tmp_path / "live", photos=watcher, pictures=PictureWriter())
    camera.join()
    assert [s["photo"] for s in live.photos] == [p.name for p in photos]
    assert live.picked == ref.picked and live.rejected == ref.rejected and live.cycle_s == pytest.approx(ref.cycle_s)
    assert _body(tmp_path / "live" / "run.csv") == _body(tmp_path / "ref" / "run.csv")
    assert order_seen == [(True, True)] * sum(1 for s in live.photos if s["status"] == "planned")
    for p in photos:                                   # every picture drawn by the end of the run
        assert sorted(f.name for f in (tmp_path / "live" / p.name).glob("*.png")) == [
            "joints.png", "overlay.png", "path.png"]


class _InterruptAfter:
    """Photos from a watcher, then Ctrl-C after ``n`` of them."""

    def __init__(self, watcher, n):
        self.watcher, self.n = watcher, n

    def __iter__(self):
        for i, photo in enumerate(self.watcher):
            if i == self.n:
                self.watcher.stop.set()
                raise KeyboardInterrupt
            yield photo


@pytest.mark.slow
def test_ctrl_c_in_a_live_run_leaves_a_state_resume_continues(tmp_path):
    cell, stored, photos, cam = _reference_run_and_camera_folder(tmp_path, 4)
    camera = _Camera(photos[:3], cam)
    camera.start()
    first = run_folder(cam, cell, stored, tmp_path / "live", pictures=PictureWriter(),
                       photos=_InterruptAfter(PhotoWatcher(cam, PHOTO_SUFFIXES, poll_s=0.02), 2))
    camera.join()
    assert first.interrupted and [s["photo"] for s in first.photos] == [p.name for p in photos[:2]]
    state = json.loads((tmp_path / "live" / "run_state.json").read_text())
    assert state["done"] == [p.name for p in photos[:2]]
    camera = _Camera(photos[3:], cam)                  # the camera goes on while the cell is down
    camera.start()
    camera.join()
    again = run_folder(cam, cell, stored, tmp_path / "live", resume=True, pictures=PictureWriter(),
                       photos=PhotoWatcher(cam, PHOTO_SUFFIXES, poll_s=0.02, settle_s=0.2, idle_stop_s=1.0))
    assert not again.interrupted and [s["photo"] for s in again.photos] == [p.name for p in photos]
    assert _body(tmp_path / "live" / "run.csv") == _body(tmp_path / "ref" / "run.csv")


def test_run_watch_on_a_folder_that_goes_away_ends_with_the_arm_home_and_one_line(tmp_path):
    import subprocess
    import sys

    _live_cell(tmp_path)                               # cell.yaml and calibration.yaml in tmp_path
    cam = tmp_path / "cam"
    cam.mkdir()
    shutil.copy(SAMPLES / "demo" / "demo_01.jpg", cam / "demo_01.jpg")
    proc = subprocess.Popen([sys.executable, "-c", "from gripsight.app.cli import entry; entry()", "run", str(cam),
                             "--cell", str(tmp_path / "cell.yaml"), "--out", str(tmp_path / "live"), "--watch",
                             "--no-pictures"], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        end = time.monotonic() + 60
        while not (tmp_path / "live" / "demo_01.jpg" / "joints.csv").is_file() and time.monotonic() < end:
            time.sleep(0.1)
        shutil.rmtree(cam)
        out, err = proc.communicate(timeout=30)
    finally:
        proc.kill()
    assert proc.returncode == 2                        # an input gone (DEVELOPERS.md, exit codes)
    errors = [line for line in err.splitlines() if line.startswith("error: ")]
    assert len(errors) == 1 and "the watched folder is gone" in errors[0] and "--resume --watch" in errors[0]
    run_csv = (tmp_path / "live" / "run.csv").read_text()
    assert "demo_01.jpg" in run_csv and "Traceback" not in err


# ------------------------------------------------------------------ a writer that pauses past stall_s
@pytest.mark.parametrize("events", MODES)
def test_a_refused_photo_is_taken_again_once_written_again_and_a_good_one_only_once(tmp_path, events):
    if events and not watchdog_available():
        pytest.skip("watchdog is not installed")
    raw = (SAMPLES / "demo" / "demo_01.jpg").read_bytes()
    stop = threading.Event()
    watcher = PhotoWatcher(tmp_path, PHOTO_SUFFIXES, settle_s=0.2, stall_s=0.3, poll_s=0.02, stop=stop,
                           use_watchdog=events)
    got: queue.Queue = queue.Queue()

    def reader():                                      # the run: a photo shorter than its camera's refused
        for path in watcher:
            size = path.stat().st_size
            if size < len(raw):
                watcher.refused(path)
            got.put((path.name, size))

    thread = threading.Thread(target=reader, daemon=True)
    thread.start()
    try:
        with open(tmp_path / "a.jpg", "wb") as a_file:
            a_file.write(raw[:1000])
            a_file.flush()
            assert got.get(timeout=10) == ("a.jpg", 1000)    # stalled past stall_s: taken as it is, refused
            a_file.write(raw[1000:])                           # the writer goes on and closes it
        assert got.get(timeout=10) == ("a.jpg", len(raw))     # written since it was refused: taken again
        (tmp_path / "b.jpg").write_bytes(raw)
        assert got.get(timeout=10) == ("b.jpg", len(raw))     # read fine
        (tmp_path / "b.jpg").write_bytes(raw[:500] + raw)      # written again, another size: still not taken
        (tmp_path / "a.jpg").write_bytes(raw + b"\0")           # a's second take read fine: not taken again
        (tmp_path / "c.jpg").write_bytes(raw)                   # the last name: whatever would come comes first
        assert got.get(timeout=10) == ("c.jpg", len(raw))
        assert got.empty() and watcher.again == ["a.jpg"] and watcher.out_of_order == []
    finally:
        stop.set()
        thread.join(timeout=5)


@pytest.mark.slow
def test_a_live_run_retakes_a_photo_refused_as_cut_short_in_place_of_its_refusal(tmp_path):
    cell, stored, photos, cam = _reference_run_and_camera_folder(tmp_path, 2)
    state_path = tmp_path / "live" / "run_state.json"

    def summaries():
        try:
            return json.loads(state_path.read_text())["summaries"]
        except (OSError, ValueError):
            return []

    def camera():                                      # pauses mid-file past stall_s, goes on once refused
        raw = photos[0].read_bytes()
        with open(cam / photos[0].name, "wb") as fh:
            fh.write(raw[:20000])
            fh.flush()
            while not any(s["status"] == "error" for s in summaries()):
                time.sleep(0.05)
            fh.write(raw[20000:])
        while not (tmp_path / "live" / photos[0].name / "joints.csv").is_file():
            time.sleep(0.05)
        shutil.copy(photos[1], cam / photos[1].name)

    writer = threading.Thread(target=camera, daemon=True)
    writer.start()
    watcher = PhotoWatcher(cam, PHOTO_SUFFIXES, settle_s=0.3, stall_s=0.3, poll_s=0.02, idle_stop_s=3.0)
    live = run_folder(cam, cell, stored, tmp_path / "live", photos=watcher, pictures=False)
    writer.join(timeout=30)
    assert [(s["photo"], s["status"], s.get("again", False)) for s in live.photos] == [
        (photos[0].name, "planned", True), (photos[1].name, "planned", False)]       # the refusal replaced
    state = json.loads(state_path.read_text())
    assert state["done"] == [p.name for p in photos] and len(state["summaries"]) == 2
    assert _body(tmp_path / "live" / "run.csv") == _body(tmp_path / "ref" / "run.csv")
    assert watcher.again == [photos[0].name]


def test_resume_retakes_a_refused_photo_whose_file_changed_and_keeps_it_once(tmp_path):
    cell, stored = _live_cell(tmp_path)
    photos, saved = _saved_demo_photos(tmp_path, 2)
    raw = photos[0].read_bytes()
    (saved / photos[0].name).write_bytes(raw[:20000])              # cut short when the run saw it
    first = run_folder(saved, cell, stored, tmp_path / "run", pictures=False)
    assert [s["status"] for s in first.photos] == ["error", "planned"]
    assert not (tmp_path / "run" / photos[0].name).exists()
    (saved / photos[0].name).write_bytes(raw)                      # written whole afterwards
    again = run_folder(saved, cell, stored, tmp_path / "run", resume=True, pictures=False)
    assert [(s["photo"], s["status"], s.get("again", False)) for s in again.photos] == [
        (photos[1].name, "planned", False), (photos[0].name, "planned", True)]     # on the run's clock, once
    state = json.loads((tmp_path / "run" / "run_state.json").read_text())
    assert state["done"] == [photos[1].name, photos[0].name]
    assert (tmp_path / "run" / photos[0].name / "joints.csv").is_file()
    names = [row.split(",")[0] for row in _body(tmp_path / "run" / "run.csv")[1:]]
    assert names[:names.index(photos[0].name)] == [photos[1].name] * names.index(photos[0].name)
    assert set(names) == {photos[1].name, photos[0].name, ""}      # "" : the move home
    unchanged = run_folder(saved, cell, stored, tmp_path / "run", resume=True, pictures=False)
    assert [s["photo"] for s in unchanged.photos] == [photos[1].name, photos[0].name]       # nothing taken twice


def test_a_resumed_watch_keeps_waiting_for_a_refused_photo_and_takes_it_once_written(tmp_path):
    cell, stored = _live_cell(tmp_path)
    photos, cam = _saved_demo_photos(tmp_path, 2)
    raw = photos[0].read_bytes()
    (cam / photos[0].name).write_bytes(raw[:20000])                # cut short when the run saw it
    run_folder(cam, cell, stored, tmp_path / "run", pictures=False)
    watcher = PhotoWatcher(cam, PHOTO_SUFFIXES, settle_s=0.2, stall_s=0.3, poll_s=0.02, idle_stop_s=2.0)

    def camera():                                      # the same bytes were skipped and are watched: written whole
        while photos[0].name not in watcher.awaiting_rewrite:
            time.sleep(0.02)
        (cam / photos[0].name).write_bytes(raw)

    writer = threading.Thread(target=camera, daemon=True)
    writer.start()
    again = run_folder(cam, cell, stored, tmp_path / "run", resume=True, photos=watcher, pictures=False)
    writer.join(timeout=30)
    assert [(s["photo"], s["status"], s.get("again", False)) for s in again.photos] == [
        (photos[1].name, "planned", False), (photos[0].name, "planned", True)]
    assert watcher.again == [photos[0].name]
