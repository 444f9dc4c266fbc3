"""The live cell: watch a folder and hand over each photo once it is completely written, in name order.

A camera (or a copy) writing a photo is not done until it closes the file. With ``watchdog`` (inotify on
Linux) a photo is complete when the writer closes it (``IN_CLOSE_WRITE``) or when it is renamed into the
folder (the usual write-then-rename; from a folder not watched it comes as a creation never followed by a
write, and counts as written once unchanged for ``settle_s``, not ``stall_s``); elsewhere, and for the photos already in the folder when the
watch starts, a photo is complete when its size and modification time have not changed over
``settle_s`` (polling every ``poll_s``). Complete photos are handed over in name order; a complete
photo waits while a photo with an earlier name is still being written (up to ``stall_s`` without a
change, after which the stalled one is taken as it is: reading it then says what is wrong with it).
A photo that completes after later names were handed over is handed over as it comes. Each name is
handed over once, unless its reader said it could not use it (:meth:`PhotoWatcher.refused`: unreadable,
cut short by a writer that paused past ``stall_s``): such a photo is handed over again once its file has
changed (size or modification time other than when it was handed over) and is complete again.

:class:`PictureWriter` draws a photo's pictures in a background thread, so the run goes on to the next
photo as soon as its joint sequence is written.
"""

from __future__ import annotations

import os
import queue
import threading
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Iterator

__all__ = ["PhotoWatcher", "PictureWriter", "watchdog_available", "warm_up"]

# what a photo's pipeline and outputs import on first use: imported before the first photo comes
_PHOTO_MODULES = ("gripsight.app.pipeline", "gripsight.app.photo_outputs", "gripsight.app.plan_plot",
                  "gripsight.vision.photo", "gripsight.vision.markers", "gripsight.vision.drift",
                  "gripsight.vision.parts", "gripsight.vision.overlay", "gripsight.planning.reach")


def warm_up() -> None:
    """Import what the first photo would otherwise wait for."""
    import importlib

    for name in _PHOTO_MODULES:
        importlib.import_module(name)


def watchdog_available() -> bool:
    try:
        import watchdog.observers  # noqa: F401
    except ImportError:
        return False
    return True


@dataclass
class _Seen:
    size: int
    mtime_ns: int
    since_s: float          # monotonic time the file was last seen to change
    closed: bool = False    # the writer closed it (or renamed it in): complete at once


class PhotoWatcher:
    """Photos of ``folder`` as they are completely written, each once, in name order (see the module).

    Iterate over it; the iteration ends when ``stop`` (a threading.Event) is set, when the folder itself is
    gone (``gone`` is then True) or, with ``idle_stop_s``, when no photo was handed over for that long and
    none is being written. Ctrl-C ends it as usual
    (KeyboardInterrupt in the iterating thread).

    Parameters
    ----------
    folder : path
        The folder the camera writes into.
    suffixes : tuple of str
        Photo suffixes (lower case, with the dot); other files and names starting with "." are ignored.
    settle_s : float
        How long a file's size and time must stay the same to count as written when its close cannot be
        seen (polling, and photos already there when the watch starts).
    stall_s : float
        How long a photo being written may hold back later names; with file events, also how long an
        unclosed file must stay unchanged to be taken anyway (an event lost to a full event queue).
    poll_s : float
        How often the folder is listed (watchdog events wake the watcher at once).
    use_watchdog : bool
        Use watchdog's file events if the library is there; False polls only.
    """

    def __init__(self, folder, suffixes: tuple[str, ...], settle_s: float = 1.0, poll_s: float = 0.05,
                 stall_s: float = 10.0, idle_stop_s: float | None = None, stop: threading.Event | None = None,
                 use_watchdog: bool = True):
        self.folder = Path(folder)
        self.suffixes = tuple(s.lower() for s in suffixes)
        self.settle_s, self.poll_s, self.stall_s, self.idle_stop_s = settle_s, poll_s, stall_s, idle_stop_s
        self.stop = stop or threading.Event()
        self.use_watchdog = use_watchdog and watchdog_available()
        self.handed: set[str] = set()
        self.out_of_order: list[str] = []           # names handed over after a later name
        self.again: list[str] = []                  # names handed over again (refused, then written again)
        self._taken: dict[str, tuple[int, int]] = {}    # name -> (size, mtime_ns) when handed over
        self._refused: dict[str, tuple[int, int]] = {}  # handed names the reader refused: taken again once changed
        self._seen: dict[str, _Seen] = {}
        self._before: set[str] = set()              # names in the folder before the file events started
        self._closed: set[str] = set()              # names closed/renamed in, from the event thread
        self._created: set[str] = set()             # names created, from the event thread ...
        self._written: set[str] = set()             # ... and written after (a file moved in is never written)
        self._lock = threading.Lock()
        self._wake = threading.Event()
        self._observer = None
        self.gone = False                           # the folder was removed (or replaced) while watched

    # ---------------------------------------------------------------- watchdog events (another thread)
    def _is_photo(self, path: str) -> bool:
        p = Path(path)
        return p.parent == self.folder and not p.name.startswith(".") and p.suffix.lower() in self.suffixes

    def _event(self, event) -> None:
        from watchdog.events import FileClosedEvent, FileCreatedEvent, FileModifiedEvent, FileMovedEvent

        if isinstance(event, FileClosedEvent) and self._is_photo(event.src_path):
            name = Path(event.src_path).name
        elif isinstance(event, FileMovedEvent) and self._is_photo(event.dest_path):
            name = Path(event.dest_path).name
        else:
            # a file moved in from a folder not watched comes as "created" alone (inotify's unpaired
            # IN_MOVED_TO): whole, with no write and no close to follow; a file created here is written
            if isinstance(event, (FileCreatedEvent, FileModifiedEvent)) and self._is_photo(event.src_path):
                with self._lock:
                    (self._created if isinstance(event, FileCreatedEvent) else self._written).add(Path(event.src_path).name)
            self._wake.set()                         # look again soon
            return
        with self._lock:
            self._closed.add(name)
        self._wake.set()

    def _start_observer(self) -> None:
        if not self.use_watchdog:
            return
        from watchdog.events import FileSystemEventHandler
        from watchdog.observers import Observer

        watcher = self

        class _Handler(FileSystemEventHandler):
            def on_any_event(self, event):
                watcher._event(event)

        try:
            observer = Observer()
            observer.schedule(_Handler(), str(self.folder), recursive=False)
            observer.start()
        except (OSError, RuntimeError):             # e.g. out of inotify watches: poll instead
            self.use_watchdog = False
            return
        self._observer = observer

    def close(self) -> None:
        if self._observer is not None:
            self._observer.stop()
            self._observer.join(timeout=5)
            self._observer = None

    def refused(self, photo) -> None:
        """The reader could not use ``photo`` (unreadable, cut short, ...): hand it over again once its file
        differs (size or modification time) from when it was handed over and is complete again."""
        name = Path(photo).name
        if name in self._taken:
            self._refused[name] = self._taken[name]

    @property
    def awaiting_rewrite(self) -> set[str]:
        """Names refused by the reader and not written since (each is handed over again once it is); safe to
        read from another thread (dict.copy is one step under the GIL)."""
        return set(self._refused.copy())

    # ---------------------------------------------------------------- the folder, listed
    def _scan(self, now_s: float) -> None:
        names = set()
        try:
            entries = list(os.scandir(self.folder))
        except (FileNotFoundError, NotADirectoryError):
            self.gone = True                         # the folder itself: nothing more can come
            return
        except OSError:
            entries = []
        with self._lock:
            closed, self._closed = self._closed, set()
        for entry in entries:
            name = entry.name
            if name.startswith(".") or Path(name).suffix.lower() not in self.suffixes:
                continue
            if name in self.handed and name not in self._refused:
                continue
            try:
                st = entry.stat()
            except OSError:
                continue
            if not entry.is_file():
                continue
            if name in self._refused:
                if (st.st_size, st.st_mtime_ns) == self._refused[name]:
                    continue                         # refused, and not written since: wait
                del self._refused[name]              # written again since it was refused: a new photo
                self.handed.discard(name)
                self.again.append(name)
            names.add(name)
            seen = self._seen.get(name)
            if seen is None or (seen.size, seen.mtime_ns) != (st.st_size, st.st_mtime_ns):
                self._seen[name] = _Seen(st.st_size, st.st_mtime_ns, now_s)       # changed: written again
            if name in closed:
                self._seen[name].closed = True
        for name in list(self._seen):
            if name not in names:
                del self._seen[name]                 # removed before it was taken

    def _complete(self, name: str, now_s: float) -> bool:
        """Closed by its writer (or renamed in); without file events, or for a photo that was there before
        the watch began (its close was not seen), unchanged for ``settle_s``."""
        s = self._seen[name]
        if s.size == 0:
            return False
        if s.closed:
            return True
        with self._lock:
            moved_in = name in self._created and name not in self._written
        settle_s = self.settle_s if not self.use_watchdog or name in self._before or moved_in else self.stall_s
        return now_s - s.since_s >= settle_s

    def _ready(self, now_s: float) -> list[str]:
        """Complete photos that no earlier, still-written photo holds back, in name order."""
        ready = []
        for name in sorted(self._seen):
            if self._complete(name, now_s):
                ready.append(name)
            elif now_s - self._seen[name].since_s < self.stall_s:
                break                                # an earlier name is being written: wait for it
            else:
                ready.append(name)                   # stalled: take it as it is
        return ready

    def __iter__(self) -> Iterator[Path]:
        self._start_observer()
        last_s = time.monotonic()
        self._scan(last_s)
        self._before = set(self._seen)
        try:
            while not self.stop.is_set():
                now_s = time.monotonic()
                self._scan(now_s)
                if self.gone:
                    return
                for name in self._ready(now_s):
                    if self.stop.is_set():
                        return
                    if self.handed and name < max(self.handed) and name not in self.again:
                        self.out_of_order.append(name)
                    self.handed.add(name)
                    self._taken[name] = (self._seen[name].size, self._seen[name].mtime_ns)
                    del self._seen[name]
                    with self._lock:
                        self._created.discard(name)
                        self._written.discard(name)
                    yield self.folder / name
                    last_s = time.monotonic()
                if self.idle_stop_s is not None and not self._seen and time.monotonic() - last_s >= self.idle_stop_s:
                    return
                wait_s = self.poll_s if not self.use_watchdog or self._seen else max(self.poll_s, 0.25)
                self._wake.wait(wait_s)
                self._wake.clear()
        finally:
            self.close()


class PictureWriter:
    """Draws pictures in one background thread, in the order given; at most ``backlog`` photos wait (the
    next ``submit`` waits for room), so a slow disk cannot fill the memory with photos."""

    def __init__(self, backlog: int = 4):
        self._queue: queue.Queue = queue.Queue(maxsize=backlog)
        self.errors: list[str] = []
        self._thread = threading.Thread(target=self._work, name="gripsight-pictures", daemon=True)
        self._thread.start()

    def _work(self) -> None:
        while True:
            job = self._queue.get()
            if job is None:
                return
            fn, args, label = job
            try:
                fn(*args)
            except Exception as exc:  # noqa: BLE001 - a picture that fails must not stop the cell; said at the end
                self.errors.append(f"{label}: pictures not drawn ({type(exc).__name__}: {exc})")

    def submit(self, fn: Callable, *args, label: str = "") -> None:
        self._queue.put((fn, args, label))

    def close(self) -> None:
        """Wait until every submitted picture is written."""
        self._queue.put(None)
        self._thread.join()
