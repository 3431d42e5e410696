"""Executors for independent tasks (scan points): serial, local processes, dask.

:func:`make_executor` returns a context manager with one method,
``map(fn, items, *, shared=..., progress=False, desc=None) -> list``, giving
the results in input order whatever the order of completion. The same task
function runs in every case, so results do not depend on the executor or on
the number of workers (bit for bit, as long as the workers use the same
numpy/scipy build).

Rules for task functions
------------------------
Local processes are started with the ``spawn`` method (safe with threaded
BLAS libraries and the same on Linux, macOS and Windows), so

* ``fn`` must be a module-level function (picklable by reference), not a
  lambda, closure or bound method of an unpicklable object;
* ``items``, ``shared`` and the results must be picklable;
* a script that calls this must guard its entry point with
  ``if __name__ == "__main__":``, because each worker imports the main module.

``shared`` is data every task needs (e.g. the binned correlators of a scan):
it is shipped once per chunk of tasks -- a handful of times per worker --
instead of once per task, and ``fn`` is then called as ``fn(shared, item)``.

Errors a user can fix (:class:`~plateaufit.errors.PlateaufitError`) raised in
a worker are re-raised in the caller with their ``where`` and message.

How many workers
----------------
``jobs`` is capped at what can be useful: at most the number of CPUs this
process may run on (:func:`usable_cpus`: the scheduler affinity mask where the
system has one, else ``os.cpu_count()``), and each :meth:`ProcessExecutor.map`
starts at most one worker per task. ``jobs=1000`` on two cores starts two
workers; a pool that later gets more tasks than workers is replaced by a
larger one, never beyond the cap.

Workers never outlive the run
-----------------------------
A local worker stops as soon as the process that started it is gone, however
it went (an exception, SIGTERM, SIGKILL, a crash). The pool's initializer
(:func:`plateaufit.worker_lifetime.worker_init`) arms, on Linux, the kernel's
parent-death signal (``prctl(PR_SET_PDEATHSIG, SIGKILL)`` through ctypes; for
pools created from the main thread, since the kernel ties it to the thread
that started the worker) and starts, everywhere, a watchdog thread waiting on
the parent's sentinel from :func:`multiprocessing.parent_process` (the read
end of the pipe the parent started the worker through, whose write end only
the parent holds; a process handle on Windows), which ends the worker with
``os._exit`` when the parent is gone; without a sentinel it polls
``os.getppid()`` against the original parent id. Workers ignore SIGINT: a
Ctrl-C reaches the whole process group and the parent alone decides.

On an interruption in the caller (KeyboardInterrupt: Ctrl-C, or SIGTERM,
which the command line turns into the same path) :meth:`ProcessExecutor.map`
and leaving the ``with`` block on an exception (``close(cancel=True)``)
terminate the workers instead of waiting for their current tasks: SIGTERM,
then SIGKILL for one still alive after two seconds.

Dask
----
``scheduler="tcp://host:8786"`` runs the tasks on an existing
dask.distributed cluster (:class:`plateaufit.dask_executor.DaskExecutor`): a
closed port is refused at once, a scheduler that does not answer within
``connect_timeout`` seconds is a clear error, and the run's tasks are
cancelled on interruption; the cluster's workers are the cluster's.
"""

from __future__ import annotations

import numbers
import os
import sys
import threading
from collections.abc import Callable, Iterable, Sequence
from typing import Any

from plateaufit.errors import FitError, PlateaufitError, SpecError
from plateaufit.worker_lifetime import terminate_workers, worker_init

#: Marker for "no shared data": ``fn`` is then called as ``fn(item)``.
_NO_SHARED = object()
#: Chunks per worker: small enough for a useful progress bar and load balance,
#: large enough that shared data is sent only a few times per worker.
_CHUNKS_PER_WORKER = 4
#: Seconds :func:`make_executor` lets a dask scheduler take to answer.
SCHEDULER_CONNECT_TIMEOUT = 10.0


def usable_cpus() -> int:
    """Number of CPUs this process may run on (at least 1).

    The scheduler affinity mask (``os.sched_getaffinity``) where the system has
    one -- a batch system or ``taskset`` may give a job fewer cores than the
    machine has -- else ``os.cpu_count()``.
    """
    getaffinity = getattr(os, "sched_getaffinity", None)
    if getaffinity is not None:
        try:
            return max(1, len(getaffinity(0)))
        except OSError:
            pass
    return max(1, os.cpu_count() or 1)


def check_jobs(jobs: Any) -> int | None:
    """Validate a ``--jobs`` value: ``None`` (all usable CPUs) or an integer >= 1.

    Raises
    ------
    SpecError
        At ``--jobs``, for zero, a negative number or anything not an integer.
    """
    if jobs is None:
        return None
    if isinstance(jobs, bool) or not isinstance(jobs, numbers.Integral) or jobs < 1:
        raise SpecError("--jobs", f"the number of jobs must be a positive integer, got {jobs!r}; "
                                  "use 1 to run serially, or leave it out to use every "
                                  "core this process may run on")
    return int(jobs)


def check_scheduler(scheduler: Any) -> str | None:
    """Validate a ``--scheduler`` value: ``None`` or a non-empty address (stripped).

    Raises
    ------
    SpecError
        At ``--scheduler``, for an empty address or one that is not text.
    """
    if scheduler is None:
        return None
    if not isinstance(scheduler, str) or not scheduler.strip():
        raise SpecError("--scheduler", f"expected a scheduler address such as tcp://host:8786, "
                                       f"got {scheduler!r}; give the address or leave out "
                                       "--scheduler")
    return scheduler.strip()


class _RemoteFailure:
    """A PlateaufitError caught in a worker, carried back as plain data.

    (The exception classes take two arguments, so they do not survive the
    default exception pickling; this keeps their class, ``where`` and message.)
    """

    def __init__(self, err: PlateaufitError) -> None:
        self.cls = type(err)
        self.where = err.where
        self.message = err.message

    def reraise(self) -> None:
        raise self.cls(self.where, self.message)


def _run_chunk(fn: Callable[..., Any], has_shared: bool, shared: Any,
               chunk: Sequence[Any]) -> Any:
    """Run ``fn`` on each item of ``chunk`` in a worker.

    (``has_shared`` is a flag rather than a sentinel object: a sentinel would
    not survive pickling as the same object.)
    """
    try:
        if not has_shared:
            return [fn(item) for item in chunk]
        return [fn(shared, item) for item in chunk]
    except PlateaufitError as err:
        return _RemoteFailure(err)


def _split(items: Sequence[Any], n_chunks: int) -> list[list[Any]]:
    """Split ``items`` into at most ``n_chunks`` contiguous chunks, in order."""
    n = len(items)
    n_chunks = max(1, min(n_chunks, n))
    bounds = [round(k * n / n_chunks) for k in range(n_chunks + 1)]
    return [list(items[bounds[k]:bounds[k + 1]]) for k in range(n_chunks)]


class _BorrowedBar:
    """A caller's progress bar (``progress=`` an object with ``update``): advanced
    by this map, closed by its owner (a batch's one bar over all its specs)."""

    def __init__(self, bar: Any) -> None:
        self._bar = bar

    def update(self, n: int = 1) -> None:
        self._bar.update(n)

    def close(self) -> None:
        pass


def _progress_bar(total: int, progress: Any, desc: str | None):
    if hasattr(progress, "update"):
        return _BorrowedBar(progress)
    from tqdm.auto import tqdm

    show = bool(progress) and sys.stderr.isatty()
    return tqdm(total=total, desc=desc, unit="task", leave=False, disable=not show,
                file=sys.stderr)


def _collect(parts: Iterable[Any]) -> list[Any]:
    out: list[Any] = []
    for part in parts:
        if isinstance(part, _RemoteFailure):
            part.reraise()
        out.extend(part)
    return out


class Executor:
    """Base class: a context manager running independent tasks.

    Attributes
    ----------
    n_workers : int
        Number of workers tasks are spread over at most (1 for serial).
    kind : str
        ``"serial"``, ``"processes"`` or ``"dask"``.
    """

    kind = "serial"

    def __init__(self) -> None:
        self.n_workers = 1

    def __enter__(self) -> Executor:
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        self.close(cancel=exc_type is not None)

    def close(self, cancel: bool = False) -> None:
        """Release the workers; with ``cancel``, stop running tasks instead of
        waiting for them (nothing to do for the serial executor)."""

    def map(self, fn: Callable[..., Any], items: Iterable[Any], *, shared: Any = _NO_SHARED,
            progress: Any = False, desc: str | None = None) -> list[Any]:
        """Apply ``fn`` to every item; return the results in input order.

        Parameters
        ----------
        fn : callable
            Module-level function; called as ``fn(item)``, or as
            ``fn(shared, item)`` when ``shared`` is given.
        items : iterable
            Task arguments.
        shared : object, optional
            Data every task needs, shipped once per chunk of tasks.
        progress : bool or progress bar, optional
            Show a progress bar on stderr (only when stderr is a terminal); or
            an open bar (anything with ``update(n)``) to advance by one per task.
        desc : str, optional
            Label of the progress bar.

        Returns
        -------
        list
            ``[fn(item) for item in items]`` (or with ``shared``), in order.
        """
        items = list(items)
        bar = _progress_bar(len(items), progress, desc)
        try:
            out: list[Any] = []
            for item in items:
                out.append(fn(item) if shared is _NO_SHARED else fn(shared, item))
                bar.update(1)
            return out
        finally:
            bar.close()

    def __repr__(self) -> str:
        return f"<{type(self).__name__} kind={self.kind} n_workers={self.n_workers}>"


class SerialExecutor(Executor):
    """Runs every task in the calling process, one after the other."""


class ProcessExecutor(Executor):
    """Runs tasks on a pool of local worker processes (``spawn`` start method).

    The pool is started on the first :meth:`map` with more than one task,
    with one worker per task up to ``n_workers`` (itself at most
    :func:`usable_cpus`), so an executor that is never used costs nothing.
    Workers end with the calling process however it ends (see the module
    docstring).
    """

    kind = "processes"

    def __init__(self, n_workers: int) -> None:
        super().__init__()
        self.n_workers = max(1, min(int(n_workers), usable_cpus()))
        self._pool: Any = None
        self._pool_size = 0
        self._pool_thread: int | None = None   # creating thread, when the death signal is armed

    @property
    def pool_size(self) -> int:
        """Worker processes the running pool may have (0 when no pool runs)."""
        return self._pool_size if self._pool is not None else 0

    def _get_pool(self, n_tasks: int) -> Any:
        want = max(1, min(self.n_workers, n_tasks))
        if self._pool is not None:
            foreign = self._pool_thread not in (None, threading.get_ident())
            if self._pool_size >= want and not foreign:
                return self._pool
            want = max(want, self._pool_size)
            self.close()            # idle between maps: replaced by a larger one / one for this thread
        import multiprocessing
        from concurrent.futures import ProcessPoolExecutor

        in_main = threading.current_thread() is threading.main_thread()
        self._pool = ProcessPoolExecutor(max_workers=want,
                                         mp_context=multiprocessing.get_context("spawn"),
                                         initializer=worker_init,
                                         initargs=(os.getpid(), in_main))
        self._pool_size = want
        self._pool_thread = threading.get_ident() if in_main else None
        return self._pool

    def close(self, cancel: bool = False) -> None:
        pool, self._pool, self._pool_size = self._pool, None, 0
        if pool is None:
            return
        if cancel:
            # Workers first: the pool's manager thread then fails the pending
            # futures itself (cancelling them as well would race with it).
            terminate_workers(pool)
        pool.shutdown(wait=True)

    def map(self, fn, items, *, shared=_NO_SHARED, progress=False, desc=None):
        items = list(items)
        if len(items) <= 1 or self.n_workers <= 1:
            return super().map(fn, items, shared=shared, progress=progress, desc=desc)
        from concurrent.futures import FIRST_COMPLETED, wait
        from concurrent.futures.process import BrokenProcessPool

        pool = self._get_pool(len(items))
        chunks = _split(items, self._pool_size * _CHUNKS_PER_WORKER)
        bar = _progress_bar(len(items), progress, desc)
        futures: list[Any] = []
        try:
            for chunk in chunks:
                futures.append(pool.submit(_run_chunk, fn, shared is not _NO_SHARED,
                                           None if shared is _NO_SHARED else shared, chunk))
            pending = set(futures)
            sizes = {fut: len(chunk) for fut, chunk in zip(futures, chunks)}
            while pending:
                done, pending = wait(pending, return_when=FIRST_COMPLETED)
                for fut in done:
                    bar.update(sizes[fut])
            return _collect(fut.result() for fut in futures)
        except BrokenProcessPool:
            self.close(cancel=True)
            raise FitError("--jobs", "a worker process stopped abruptly (killed, out of memory, "
                                     "or started from a script without an "
                                     "`if __name__ == \"__main__\":` guard); rerun with "
                                     "--jobs 1 (jobs=1) to run in-process") from None
        except PlateaufitError:   # from _collect: every chunk has finished, the pool is fine
            raise
        except BaseException:     # KeyboardInterrupt (Ctrl-C, SIGTERM), SystemExit, a bug
            self.close(cancel=True)
            raise
        finally:
            bar.close()


def make_executor(jobs: int | None = None, scheduler: str | None = None, *,
                  connect_timeout: float = SCHEDULER_CONNECT_TIMEOUT) -> Executor:
    """Choose an executor for independent tasks.

    Parameters
    ----------
    jobs : int, optional
        ``1``: serial, in this process. ``None``: one worker process per CPU
        this process may use (:func:`usable_cpus`). ``> 1``: that many local
        worker processes, but at most :func:`usable_cpus` (and at most one per
        task). Ignored when ``scheduler`` is given (the cluster decides), but
        still validated.
    scheduler : str, optional
        Address of a running dask.distributed scheduler (``tcp://host:8786``);
        tasks then run on its workers. Needs ``pip install 'plateaufit[cluster]'``.
    connect_timeout : float, optional
        Seconds to wait for the scheduler to answer.

    Returns
    -------
    Executor
        Use as ``with make_executor(jobs) as ex: results = ex.map(fn, items)``.

    Raises
    ------
    SpecError
        ``--jobs`` not a positive integer; ``--scheduler`` given but dask is
        not installed or the scheduler cannot be reached.
    """
    jobs = check_jobs(jobs)
    scheduler = check_scheduler(scheduler)
    if scheduler is not None:
        from plateaufit.dask_executor import DaskExecutor

        return DaskExecutor(scheduler, timeout=connect_timeout)
    n_workers = usable_cpus() if jobs is None else min(jobs, usable_cpus())
    if n_workers == 1:
        return SerialExecutor()
    return ProcessExecutor(n_workers)


def __getattr__(name: str) -> Any:
    # ``plateaufit.parallel.DaskExecutor`` still works; the module is imported
    # only when asked for (it imports from this one).
    if name == "DaskExecutor":
        from plateaufit.dask_executor import DaskExecutor

        return DaskExecutor
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
