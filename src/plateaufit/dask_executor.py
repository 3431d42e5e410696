"""Tasks on a dask.distributed cluster: :class:`DaskExecutor` (``--scheduler``).

The cluster is the user's (a ``dask scheduler`` with ``dask worker``
processes, or one a batch system started, e.g. through dask-jobqueue);
plateaufit only connects to its scheduler, submits chunks of tasks with the
same task function the local pool runs (so the numbers are the same, bit for
bit, as long as the workers have the same numpy/scipy build), and cancels its
tasks when the run is interrupted. The workers' lifetime is the cluster's
business.

Everything that can go wrong with the cluster -- nothing listening at the
address, no answer within the connection timeout, a scheduler without
workers, workers dying, the connection lost -- is a
:class:`~plateaufit.errors.SpecError` at ``--scheduler`` saying what to do;
a user error inside a task comes back as the same error the local pool gives.
"""

from __future__ import annotations

import threading
from typing import Any

from plateaufit.errors import PlateaufitError, SpecError
from plateaufit.parallel import (_CHUNKS_PER_WORKER, _NO_SHARED, SCHEDULER_CONNECT_TIMEOUT,
                                 Executor, _collect, _progress_bar, _run_chunk, _split)

#: The port a dask scheduler listens on when an address names none.
_DASK_DEFAULT_PORT = 8786
#: Seconds beyond the connection timeout allowed for the handshake with the scheduler.
_HANDSHAKE_SPARE = 2.0


_WHAT_TO_DO = ("start the scheduler and its workers (dask scheduler, dask worker ADDRESS, "
               "or your batch system's dask set-up), check the address, or leave out "
               "--scheduler to run on local processes")


def _scheduler_error(address: str, what: str, todo: str = _WHAT_TO_DO) -> SpecError:
    return SpecError("--scheduler", f"cannot use the dask scheduler at {address!r}: {what}; {todo}")


def _probe_tcp(address: str, timeout: float) -> None:
    """Fail at once when nothing listens at a ``tcp://`` scheduler address.

    (dask's own connect retries a refused connection until its timeout ends.)
    """
    import socket

    from distributed.comm.addressing import parse_address, parse_host_port

    try:
        scheme, location = parse_address(address)
        if scheme != "tcp":
            return
        host, port = parse_host_port(location, default_port=_DASK_DEFAULT_PORT)
        if not host:
            raise ValueError("no host")
        port = int(port)
    except (ValueError, TypeError) as exc:
        raise _scheduler_error(address, f"not an address ({exc})",
                               "write it as tcp://HOST:PORT") from None
    try:
        with socket.create_connection((host, port), timeout=timeout):
            pass
    except ConnectionRefusedError:
        raise _scheduler_error(address, f"nothing listens at {host}:{port} "
                                        "(connection refused)") from None
    except socket.gaierror as exc:
        raise _scheduler_error(address, f"unknown host {host!r} ({exc.strerror})") from None
    except TimeoutError:
        raise _scheduler_error(address, f"no answer from {host}:{port} within "
                                        f"{timeout:g} s") from None
    except OSError as exc:
        raise _scheduler_error(address, f"cannot reach {host}:{port} "
                                        f"({exc.strerror or exc})") from None


def check_reachable(address: str, timeout: float = SCHEDULER_CONNECT_TIMEOUT) -> None:
    """Check, without connecting a client, that dask is installed and that
    something listens at a ``tcp://`` address (other schemes: not checked).

    Cheap enough for the command line to call before any data is read.

    Raises
    ------
    SpecError
        At ``--scheduler``: dask.distributed not installed; a malformed
        address; an unknown host; nothing listening (refused at once); no
        TCP answer within ``timeout`` seconds.
    """
    try:
        import dask.distributed  # noqa: F401   (what Client needs)
    except ImportError:
        raise SpecError("--scheduler", "dask.distributed is not installed; "
                                       "pip install 'plateaufit[cluster]'") from None
    _probe_tcp(address, timeout)


def _connect(client_class: Any, address: str, timeout: float) -> Any:
    """``Client(address)``, given ``timeout`` seconds (and a little to spare) in all.

    dask's own timeout covers the connection but not the handshake after it,
    so a server that accepts and never answers would hold the constructor
    forever; it runs in a daemon thread instead, which is abandoned (with its
    half-made client) if it has not finished in time.
    """
    outcome: dict[str, Any] = {}

    def connect() -> None:
        try:
            outcome["client"] = client_class(address, timeout=timeout, set_as_default=False)
        except BaseException as exc:   # handed to the caller's thread below
            outcome["error"] = exc

    thread = threading.Thread(target=connect, name="plateaufit-dask-connect", daemon=True)
    thread.start()
    thread.join(timeout + _HANDSHAKE_SPARE)
    if thread.is_alive():
        raise _scheduler_error(address, f"no answer within {timeout:g} s (a dask scheduler "
                                        "answers at once; is this the scheduler's address?)")
    if "error" in outcome:
        exc = outcome["error"]
        if not isinstance(exc, Exception):
            raise exc
        # the address is user input: any failure to connect is the user's to fix
        raise _scheduler_error(address, f"{type(exc).__name__}: {exc}")
    return outcome["client"]


class DaskExecutor(Executor):
    """Runs tasks on a dask.distributed cluster through its scheduler address.

    Parameters
    ----------
    address : str
        Scheduler address, ``tcp://host:8786`` (also ``tls://``, ...).
    timeout : float, optional
        Seconds to wait for the connection; also how long :meth:`map` waits
        for a first worker when the scheduler has none yet, times
        ``worker_wait_factor``.
    """

    kind = "dask"
    #: a scheduler without workers is given this many connection timeouts to get one
    worker_wait_factor = 6

    n_workers: int
    """Task slots: the threads of all the cluster's workers (counted at every map)."""

    def __init__(self, address: str, timeout: float = SCHEDULER_CONNECT_TIMEOUT) -> None:
        super().__init__()
        self._client = None
        self.address = address
        self.timeout = float(timeout)
        check_reachable(address, self.timeout)
        from dask.distributed import Client

        self._client = _connect(Client, address, self.timeout)
        self.n_workers = self._count_workers()

    def _count_workers(self) -> int:
        """Task slots of the cluster: the threads of all its workers."""
        return int(sum(self._client.nthreads().values()))

    def close(self, cancel: bool = False) -> None:
        client, self._client = self._client, None
        if client is not None:
            client.close(timeout=self.timeout)

    def map(self, fn, items, *, shared=_NO_SHARED, progress=False, desc=None):
        from dask.distributed import as_completed

        items = list(items)
        if not items:
            return []
        self.n_workers = self._count_workers()
        if self.n_workers == 0:
            wait_s = self.worker_wait_factor * self.timeout
            try:
                self._client.wait_for_workers(1, timeout=wait_s)
            except TimeoutError:
                raise _scheduler_error(self.address, f"it has no workers (waited {wait_s:g} s "
                                                     "for one)") from None
            self.n_workers = max(1, self._count_workers())
        chunks = _split(items, self.n_workers * _CHUNKS_PER_WORKER)
        has_shared = shared is not _NO_SHARED
        futures: list[Any] = []
        bar = _progress_bar(len(items), progress, desc)
        try:
            shared_ref = self._client.scatter(shared, broadcast=True) if has_shared else None
            futures = [self._client.submit(_run_chunk, fn, has_shared, shared_ref, chunk,
                                           pure=False) for chunk in chunks]
            sizes = {fut.key: len(chunk) for fut, chunk in zip(futures, chunks)}
            for fut in as_completed(futures, loop=self._client.loop):
                bar.update(sizes[fut.key])
            return _collect(self._client.gather(futures))
        except PlateaufitError:
            raise
        except BaseException as exc:
            if futures and self._client is not None:
                try:
                    self._client.cancel(futures)
                except Exception:   # the scheduler may be gone already
                    pass
            lost = _lost_cluster(exc)
            if lost is not None:
                raise _scheduler_error(self.address, lost) from None
            raise
        finally:
            bar.close()


def _lost_cluster(exc: BaseException) -> str | None:
    """What went wrong, when ``exc`` says the cluster failed (not the task)."""
    from concurrent.futures import CancelledError

    name = type(exc).__name__
    if name == "KilledWorker":
        return f"its workers died while running a task, repeatedly ({exc})"
    if isinstance(exc, CancelledError) or name in ("FutureCancelledError", "CommClosedError"):
        return f"the connection to it was lost or its tasks were cancelled ({name}: {exc})"
    if isinstance(exc, OSError):
        return f"the connection to it failed ({name}: {exc})"
    return None


