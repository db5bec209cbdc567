"""Local worker processes that start cleanly, stop on Ctrl-C and never outlive their parent.

The Monte Carlo engine runs simulations in a pool of ``spawn`` processes.  Three
things here make that pool behave like a plain command:

* :func:`spawn_context` gives a start method that does not run the caller's
  script again in each worker when the work does not need it (a script without
  an ``if __name__ == "__main__":`` guard would otherwise run itself once per
  worker); :func:`main_module_needed` tells whether the pickled work refers to
  the script's own functions, which then must be imported.
* :func:`ignore_interrupts` leaves Ctrl-C (SIGINT, sent by a terminal to the
  whole process group) to the parent, which stops the run and reports it once.
* :func:`exit_with_parent` makes a worker exit when its parent dies, even by
  SIGKILL (the out-of-memory killer): on Linux the kernel sends the worker
  SIGKILL (``prctl(PR_SET_PDEATHSIG)``); everywhere a watchdog thread polls
  the parent's process id as well.
"""

from __future__ import annotations

import os
import signal
import sys
import threading

__all__ = ["spawn_context", "main_module_needed", "dead_workers", "ignore_interrupts", "exit_with_parent"]

#: Seconds between two checks of the watchdog thread.
WATCHDOG_INTERVAL = 1.0

_launching = threading.local()


def main_module_needed(job_bytes: bytes) -> bool:
    """True if the pickled work refers to something defined in the ``__main__`` module."""
    return b"__main__" in job_bytes


def _install_preparation_filter():
    """Wrap :func:`multiprocessing.spawn.get_preparation_data` once: while one of our processes is being
    launched (a per-thread flag), the data sent to the child do not ask it to import the main module."""
    from multiprocessing import spawn

    if getattr(spawn.get_preparation_data, "_cmbtools_filter", False):
        return
    original = spawn.get_preparation_data

    def get_preparation_data(name):
        data = original(name)
        if getattr(_launching, "without_main", False):
            data.pop("init_main_from_path", None)
            data.pop("init_main_from_name", None)
        return data

    get_preparation_data._cmbtools_filter = True
    spawn.get_preparation_data = get_preparation_data


def spawn_context(*, import_main: bool):
    """A ``spawn`` multiprocessing context; with ``import_main=False`` its processes skip the main module."""
    import multiprocessing

    if import_main or sys.platform == "win32":
        return multiprocessing.get_context("spawn")
    _install_preparation_filter()
    return _SpawnWithoutMainContext()


def _popen_without_main(process_obj):
    from multiprocessing.popen_spawn_posix import Popen

    _launching.without_main = True
    try:
        return Popen(process_obj)
    finally:
        _launching.without_main = False


from multiprocessing import context as _mp_context  # noqa: E402  (stdlib, cheap)


class _SpawnProcessWithoutMain(_mp_context.SpawnProcess):
    """A spawned process that does not import the parent's ``__main__`` module."""

    _start_method = "spawn"

    @staticmethod
    def _Popen(process_obj):
        return _popen_without_main(process_obj)


class _SpawnWithoutMainContext(_mp_context.SpawnContext):
    Process = _SpawnProcessWithoutMain


def dead_workers(pool) -> str:
    """A description of the worker processes of a ProcessPoolExecutor that have exited, or ''."""
    processes = getattr(pool, "_processes", None) or {}
    dead = [f"pid {p.pid} exit code {p.exitcode}" for p in list(processes.values()) if p.exitcode is not None]
    return "worker process died: " + ", ".join(dead) if dead else ""


def ignore_interrupts() -> None:
    """Ignore SIGINT in this process (a worker: its parent handles Ctrl-C)."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)


def _set_parent_death_signal() -> bool:
    """Ask Linux to SIGKILL this process when its parent dies; False where that is not available."""
    if not sys.platform.startswith("linux"):
        return False
    try:
        import ctypes

        libc = ctypes.CDLL(None, use_errno=True)
        PR_SET_PDEATHSIG = 1
        return libc.prctl(PR_SET_PDEATHSIG, int(signal.SIGKILL), 0, 0, 0) == 0
    except (OSError, AttributeError):
        return False


def exit_with_parent(parent_pid: int, *, interval: float = WATCHDOG_INTERVAL) -> None:
    """Make this process exit as soon as the process ``parent_pid`` is no longer its parent."""
    _set_parent_death_signal()
    if os.getppid() != parent_pid:  # the parent died before the death signal was armed
        os._exit(1)

    def watch():
        import time

        while True:
            time.sleep(interval)
            if os.getppid() != parent_pid:
                os._exit(1)

    threading.Thread(target=watch, name="cmbtools-parent-watchdog", daemon=True).start()
