"""The worker processes of a local batch: started early (a fork server with the workers' modules
imported, so its start-up overlaps what the command does before its first photo), each worker tied to the
batch process (it ends when the batch ends, however it ends), and the fork server stopped with the batch.
"""

from __future__ import annotations

import contextlib
import os
import signal
import sys
import threading
import time

__all__ = ["start_workers", "stop_workers", "stop_pool", "worker_start"]


def stop_workers() -> None:
    """End the fork server of :func:`start_workers`, if one runs, now rather than when it notices the batch
    is gone (it would first unload the workers' modules, a second or more); a later batch in this process
    starts a new one."""
    from multiprocessing import forkserver, util

    server = getattr(forkserver, "_forkserver", None)
    pid = getattr(server, "_forkserver_pid", None)
    if not pid:
        return
    with contextlib.suppress(OSError):
        os.kill(pid, signal.SIGKILL)
        os.waitpid(pid, 0)
    with contextlib.suppress(OSError, TypeError):
        os.close(server._forkserver_alive_fd)
    address = server._forkserver_address
    if address and not util.is_abstract_socket_namespace(address):
        with contextlib.suppress(OSError):
            os.unlink(address)
    server._forkserver_pid = server._forkserver_alive_fd = server._forkserver_address = None


_POOL_STOP_S = 5.0      # the pool's own stop gets this long; then the fork server goes, and its workers with it


def stop_pool(pool) -> None:
    """Stop a pool of :func:`start_workers`'s workers now, and never wait on it for ever: the pool's own stop
    (each worker asked to unwind: a write in progress removes its temporary file) runs in a thread for at
    most ``_POOL_STOP_S``; if it has not ended by then, the fork server is killed, which ends its workers
    (PR_SET_PDEATHSIG on Linux, each worker's watchdog elsewhere) and so every wait of the pool's stop.
    Seen once in about eighty Ctrl-C trials: the pool's stop waiting for ever on a worker that stayed in
    its wait for the task queue's lock, the batch with it."""
    stopping = threading.Thread(target=lambda: (pool.terminate(), pool.join()), name="gripsight-pool-stop",
                                daemon=True)
    stopping.start()
    stopping.join(_POOL_STOP_S)
    stop_workers()
    stopping.join(_POOL_STOP_S)


def worker_start(parent_pid: int) -> None:
    """In each worker: Ctrl-C is the parent's to handle (it stops the pool), and the worker ends when
    the batch process ends, however it ends (kill -9 included): on Linux the kernel kills it when its
    parent goes (prctl PR_SET_PDEATHSIG), and everywhere a watchdog thread ends it when the batch
    process is gone."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, _exit_on_term)      # the pool's stop: unwind, so a write in progress is removed
    if sys.platform.startswith("linux"):
        with contextlib.suppress(OSError, AttributeError):
            import ctypes

            ctypes.CDLL(None, use_errno=True).prctl(1, signal.SIGKILL)     # 1 = PR_SET_PDEATHSIG
    ppid = os.getppid()

    def watch() -> None:
        while True:
            time.sleep(0.2)
            if os.getppid() != ppid or not _alive(parent_pid):
                os._exit(1)

    # the watchdog thread never takes the pool's SIGTERM: Python runs a handler in the main thread only, and a
    # signal the kernel hands to another thread does not wake the main thread from its wait on the task queue's
    # lock (which the pool's stop holds). The thread starts with the signals blocked (a new thread inherits the
    # mask), then they are unblocked here
    stop_signals = {signal.SIGTERM, signal.SIGINT}
    if hasattr(signal, "pthread_sigmask"):
        signal.pthread_sigmask(signal.SIG_BLOCK, stop_signals)
    try:
        threading.Thread(target=watch, name="gripsight-parent-watch", daemon=True).start()
    finally:
        if hasattr(signal, "pthread_sigmask"):
            signal.pthread_sigmask(signal.SIG_UNBLOCK, stop_signals)


def _exit_on_term(signum, frame) -> None:
    raise SystemExit(1)


def _alive(pid: int) -> bool:
    """True while ``pid`` runs (a zombie, killed but not yet reaped, counts as gone on Linux)."""
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    try:
        with open(f"/proc/{pid}/stat", "rb") as fh:
            return fh.read().rsplit(b")", 1)[1].split()[0] != b"Z"
    except (OSError, IndexError):
        return True


# what every worker imports: the fork server imports them once, while the main process reads the cell
# (scipy.optimize: the refit's least squares, imported on a worker's first photo, a quarter of a second;
# the cell file's pydantic models, 50 ms; a module that cannot be imported is skipped by the fork server)
_WORKER_MODULES = ["gripsight.app.pipeline", "gripsight.app.photo_outputs", "gripsight.app.plan_plot",
                   "gripsight.app.cellfile", "gripsight.app.calfile", "gripsight.app.fixedtext",
                   "gripsight.vision.parts", "gripsight.vision.markers", "gripsight.vision.drift",
                   "gripsight.vision.overlay", "gripsight.app.truthcheck", "gripsight.app.jointcheck", "yaml",
                   "scipy.optimize", "isal.isal_zlib"]


def start_workers(workers: int, scheduler: str | None = None):
    """The worker processes' start method for a local batch of ``workers`` (> 1) processes, or None (one
    worker works in this process; a scheduler has its own). On POSIX a fork server, started at the first
    call with the workers' modules imported in it, so that its start-up (a third of a second) overlaps
    what the command does before its first photo; call it as early as the worker count is known (a
    second call returns the same server)."""
    import multiprocessing

    if workers <= 1 or scheduler:
        return None
    for name in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
        os.environ.setdefault(name, "1")        # numpy's BLAS threads would spin beside the other workers
    if os.name != "posix":
        return multiprocessing.get_context("spawn")
    ctx = multiprocessing.get_context("forkserver")
    ctx.set_forkserver_preload(_WORKER_MODULES)
    from multiprocessing import forkserver

    # the server (a new interpreter, in the terminal's process group) ignores Ctrl-C from its first
    # instruction: an ignored signal stays ignored across exec, and the batch stops the server itself
    previous = signal.signal(signal.SIGINT, signal.SIG_IGN)
    try:
        forkserver.ensure_running()
    finally:
        signal.signal(signal.SIGINT, previous)
    return ctx
