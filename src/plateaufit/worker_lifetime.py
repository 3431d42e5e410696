"""Local worker processes that never outlive the run that started them.

Used by :class:`plateaufit.parallel.ProcessExecutor`. A worker stops as soon as
the process that started it is gone, however it went (an exception, SIGTERM,
SIGKILL, a crash), so a killed run leaves nothing computing. Two mechanisms,
set up by :func:`worker_init` (the pool's initializer) before the worker takes
its first task:

1. **Linux: parent-death signal.** ``prctl(PR_SET_PDEATHSIG, SIGKILL)``
   (through :mod:`ctypes`) asks the kernel to kill the worker when its parent
   ends; this works even while the worker is deep inside a numpy call. The
   kernel sends it when the *thread* that started the worker ends, so the
   pool arms it only for pools created from the main thread (a pool created
   elsewhere relies on the watchdog alone). If the parent ended before the
   call took effect, the worker exits at once (its parent id is no longer
   the original one).
2. **Everywhere: a watchdog thread** in each worker waits on the parent's
   sentinel (:func:`multiprocessing.parent_process`): with the ``spawn`` start
   method, the read end of the pipe the parent started the worker through,
   whose write end only the parent holds (on Windows, a handle on the parent
   process). It becomes ready when the parent is gone, and the thread then
   ends the worker with ``os._exit``. Where there is no sentinel, the thread
   polls ``os.getppid()`` against the original parent id twice a second.

Workers ignore SIGINT: a Ctrl-C reaches the whole process group, and the
parent alone decides (it terminates the workers with :func:`terminate_workers`
and reports one line, instead of one traceback per worker).
"""

from __future__ import annotations

import os
import signal
import sys
import threading
import time
from typing import Any

#: Linux ``prctl`` option that sets the signal sent when the parent ends.
_PR_SET_PDEATHSIG = 1
#: Seconds between two looks at the parent id, where there is no sentinel.
_POLL_SECONDS = 0.5
#: Seconds a terminated worker is given to end before it is killed.
TERMINATE_GRACE = 2.0


def set_parent_death_signal() -> bool:
    """Linux: have the kernel send SIGKILL to this process when its parent ends.

    Returns whether it was armed (False on other systems, or when ``prctl``
    cannot be called).
    """
    if not sys.platform.startswith("linux"):
        return False
    try:
        import ctypes

        libc = ctypes.CDLL(None, use_errno=True)
        status = libc.prctl(ctypes.c_int(_PR_SET_PDEATHSIG), ctypes.c_ulong(signal.SIGKILL),
                            ctypes.c_ulong(0), ctypes.c_ulong(0), ctypes.c_ulong(0))
    except (OSError, AttributeError, TypeError):
        return False
    return status == 0


def _watch_parent(parent_pid: int) -> None:
    """Body of the watchdog thread: end this worker once its parent is gone."""
    import multiprocessing
    from multiprocessing.connection import wait

    parent = multiprocessing.parent_process()
    sentinel = getattr(parent, "sentinel", None) if parent is not None else None
    if sentinel is not None:
        try:
            wait([sentinel])
        except (OSError, ValueError):   # an unusable sentinel: fall back to polling
            sentinel = None
    if sentinel is None:
        while os.getppid() == parent_pid:
            time.sleep(_POLL_SECONDS)
    os._exit(1)


def worker_init(parent_pid: int, death_signal: bool) -> None:
    """Initializer of every local worker process.

    Parameters
    ----------
    parent_pid : int
        Process id of the process that creates the pool.
    death_signal : bool
        Arm Linux's parent-death signal (only when the pool is created from
        the parent's main thread; see the module docstring).
    """
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    if death_signal:
        set_parent_death_signal()
    threading.Thread(target=_watch_parent, args=(parent_pid,), daemon=True,
                     name="plateaufit-parent-watchdog").start()
    if os.getppid() != parent_pid:   # the parent ended before the signal was armed
        os._exit(1)


def terminate_workers(pool: Any, grace: float = TERMINATE_GRACE) -> None:
    """Stop every worker of a ``ProcessPoolExecutor`` now: SIGTERM, then SIGKILL.

    A worker still running ``grace`` seconds after SIGTERM is killed.
    Liveness is read from each process's sentinel (ready once it has ended),
    not from ``is_alive``, because the pool's own manager thread may reap the
    processes at the same time.
    """
    from multiprocessing.connection import wait

    # ProcessPoolExecutor keeps its workers in ``_processes`` (pid -> Process)
    # in every Python version since 3.2; there is no public accessor before 3.14.
    processes = list((getattr(pool, "_processes", None) or {}).values())
    waiting: dict[Any, Any] = {}
    for proc in processes:
        try:
            sentinel = proc.sentinel
            proc.terminate()
        except (OSError, ValueError):   # already ended, or closed
            continue
        waiting[sentinel] = proc
    deadline = time.monotonic() + grace
    while waiting:
        left = deadline - time.monotonic()
        if left <= 0:
            break
        for ready in wait(list(waiting), timeout=left):
            waiting.pop(ready, None)
    for proc in waiting.values():
        try:
            proc.kill()
        except (OSError, ValueError):
            pass
