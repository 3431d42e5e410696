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
"""

from __future__ import annotations

import numbers
import os
import sys
from collections.abc import Callable, Iterable, Sequence
from typing import Any

from plateaufit.errors import FitError, PlateaufitError, SpecError

#: Marker for "no shared data": ``fn`` is then called as ``fn(item)``.
_NO_SHARED = object()
#: Chunks per worker: small enough for a useful progress bar and load balance,
#: large enough that shared data is sent only a few times per worker.
_CHUNKS_PER_WORKER = 4


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


def _progress_bar(total: int, progress: bool, desc: str | None):
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
        Number of workers tasks are spread over (1 for serial).
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
        """Release workers (nothing to do for the serial executor)."""

    def map(self, fn: Callable[..., Any], items: Iterable[Any], *, shared: Any = _NO_SHARED,
            progress: bool = False, desc: str | None = None) -> list[Any]:
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
        progress : bool, optional
            Show a progress bar on stderr (only when stderr is a terminal).
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

    The pool is started on the first :meth:`map` with more than one task, so
    an executor that is never used costs nothing.
    """

    kind = "processes"

    def __init__(self, n_workers: int) -> None:
        super().__init__()
        self.n_workers = int(n_workers)
        self._pool = None

    def _get_pool(self):
        if self._pool is None:
            import multiprocessing
            from concurrent.futures import ProcessPoolExecutor

            self._pool = ProcessPoolExecutor(max_workers=self.n_workers,
                                             mp_context=multiprocessing.get_context("spawn"))
        return self._pool

    def close(self, cancel: bool = False) -> None:
        if self._pool is not None:
            self._pool.shutdown(wait=True, cancel_futures=cancel)
            self._pool = None

    def map(self, fn, items, *, shared=_NO_SHARED, progress=False, desc=None):
        items = list(items)
        if len(items) <= 1:
            return super().map(fn, items, shared=shared, progress=progress, desc=desc)
        from concurrent.futures import FIRST_COMPLETED, wait
        from concurrent.futures.process import BrokenProcessPool

        chunks = _split(items, self.n_workers * _CHUNKS_PER_WORKER)
        pool = self._get_pool()
        bar = _progress_bar(len(items), progress, desc)
        futures = [pool.submit(_run_chunk, fn, shared is not _NO_SHARED,
                               None if shared is _NO_SHARED else shared, chunk) for chunk in chunks]
        try:
            pending = set(futures)
            sizes = {fut: len(chunk) for fut, chunk in zip(futures, chunks)}
            while pending:
                done, pending = wait(pending, return_when=FIRST_COMPLETED)
                for fut in done:
                    bar.update(sizes[fut])
            return _collect(fut.result() for fut in futures)
        except BrokenProcessPool:
            self._pool = None
            raise FitError("--jobs", "a worker process stopped abruptly (killed, out of memory, "
                                     "or started from a script without an "
                                     "`if __name__ == \"__main__\":` guard); rerun with "
                                     "--jobs 1 (jobs=1) to run in-process") from None
        except BaseException:
            for fut in futures:
                fut.cancel()
            raise
        finally:
            bar.close()


class DaskExecutor(Executor):
    """Runs tasks on a dask.distributed cluster through its scheduler address."""

    kind = "dask"

    def __init__(self, address: str, timeout: float = 20.0) -> None:
        super().__init__()
        try:
            from dask.distributed import Client
        except ImportError:
            raise SpecError("--scheduler", "dask.distributed is not installed; "
                                           "pip install 'plateaufit[cluster]'") from None
        try:
            self._client = Client(address, timeout=timeout, set_as_default=False)
        except (OSError, TimeoutError, ValueError) as exc:
            raise SpecError("--scheduler", f"cannot connect to the dask scheduler at "
                                           f"{address!r} ({exc}); start one (dask scheduler) "
                                           "and its workers, or leave out --scheduler") from None
        self.address = address
        self.n_workers = max(1, len(self._client.scheduler_info().get("workers", {})))

    def close(self, cancel: bool = False) -> None:
        if self._client is not None:
            self._client.close()
            self._client = None

    def map(self, fn, items, *, shared=_NO_SHARED, progress=False, desc=None):
        from dask.distributed import as_completed

        items = list(items)
        if not items:
            return []
        chunks = _split(items, self.n_workers * _CHUNKS_PER_WORKER)
        has_shared = shared is not _NO_SHARED
        shared_ref = self._client.scatter(shared, broadcast=True) if has_shared else None
        futures = [self._client.submit(_run_chunk, fn, has_shared, shared_ref, chunk, pure=False)
                   for chunk in chunks]
        sizes = {fut.key: len(chunk) for fut, chunk in zip(futures, chunks)}
        bar = _progress_bar(len(items), progress, desc)
        try:
            for fut in as_completed(futures, loop=self._client.loop):
                bar.update(sizes[fut.key])
            return _collect(self._client.gather(futures))
        except BaseException:
            self._client.cancel(futures)
            raise
        finally:
            bar.close()


def make_executor(jobs: int | None = None, scheduler: str | None = None) -> Executor:
    """Choose an executor for independent tasks.

    Parameters
    ----------
    jobs : int, optional
        ``1``: serial, in this process. ``None``: one worker process per core
        (``os.cpu_count()``). ``> 1``: that many local worker processes.
        Ignored when ``scheduler`` is given (the cluster decides).
    scheduler : str, optional
        Address of a running dask.distributed scheduler (``tcp://host:8786``);
        tasks then run on its workers. Needs ``pip install 'plateaufit[cluster]'``.

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
    if scheduler is not None:
        if not isinstance(scheduler, str) or not scheduler.strip():
            raise SpecError("--scheduler", f"expected a scheduler address such as "
                                           f"tcp://host:8786, got {scheduler!r}")
        return DaskExecutor(scheduler.strip())
    if jobs is None:
        jobs = os.cpu_count() or 1
    if isinstance(jobs, bool) or not isinstance(jobs, numbers.Integral) or jobs < 1:
        raise SpecError("--jobs", f"the number of jobs must be a positive integer, got {jobs!r}; "
                                  "use 1 to run serially")
    if jobs == 1:
        return SerialExecutor()
    return ProcessExecutor(int(jobs))
