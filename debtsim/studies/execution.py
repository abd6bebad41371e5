"""Where tasks run: in this process, on a local Dask cluster, or on an existing one.

Stress runs and sweep points both go through :func:`run_tasks`.  Each task
runs with BLAS held at one thread (:func:`single_blas_thread`), so a result
does not depend on where it ran.  Worker processes are spawned, so a script
that runs tasks on workers must guard its entry point with
``if __name__ == "__main__":``.
"""

from __future__ import annotations

import contextlib
import logging
import threading
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from typing import Any, TypeVar

from debtsim.errors import DebtsimError

__all__ = [
    "SCHEDULER_TIMEOUT",
    "Execution",
    "check_scheduler_address",
    "dask_client",
    "run_tasks",
    "single_blas_thread",
]

T = TypeVar("T")
R = TypeVar("R")
S = TypeVar("S")


@dataclass(frozen=True)
class Execution:
    """Where tasks run.

    Attributes
    ----------
    workers : int or None
        Start a local Dask cluster of this many worker processes.
    scheduler : str or None
        Address of an existing Dask scheduler (e.g. ``tcp://10.0.0.5:8786``).

    """

    workers: int | None = None
    scheduler: str | None = None

    def __post_init__(self) -> None:
        if self.workers is not None and self.scheduler is not None:
            raise DebtsimError("--workers and --scheduler exclude each other; give one")
        if self.workers is not None and self.workers < 1:
            raise DebtsimError(f"--workers: must be at least 1, got {self.workers}")
        if self.scheduler is not None:
            check_scheduler_address(self.scheduler)

    @property
    def in_process(self) -> bool:
        """Whether tasks run in this process."""
        return self.workers is None and self.scheduler is None

    @property
    def label(self) -> str:
        """Human description, e.g. ``local Dask cluster of 2 workers``."""
        if self.scheduler is not None:
            return f"Dask scheduler at {self.scheduler}"
        if self.workers is not None:
            return f"local Dask cluster of {self.workers} worker process" + (
                "es" if self.workers != 1 else ""
            )
        return "in-process"


#: Seconds to wait for a Dask scheduler to connect and answer.
SCHEDULER_TIMEOUT = 20.0

#: Address schemes a scheduler may use here, and why the others are refused.
_SCHEMES = {
    "tcp": None,
    "inproc": None,
    "tls": "tls:// needs TLS certificates (a Dask security configuration), which debtsim "
    "does not set up; use tcp:// (for example through an SSH tunnel)",
    "ucx": "ucx:// needs the UCX transport (ucx-py and a GPU network), which debtsim does "
    "not use; use tcp://",
    "ws": "ws:// is not supported; use tcp://",
    "wss": "wss:// is not supported; use tcp://",
}


def check_scheduler_address(address: str) -> str:
    """Refuse a scheduler address debtsim cannot use, before anything runs.

    Parameters
    ----------
    address : str
        ``tcp://host:port`` or ``host:port``.

    Returns
    -------
    str
        The address.

    Raises
    ------
    DebtsimError
        For an unsupported scheme (``tls://``, ``ucx://``...), a missing port or
        an empty address, in one line.

    """
    text = address.strip()
    scheme, sep, rest = text.partition("://")
    if not sep:
        scheme, rest = "tcp", text
    scheme = scheme.lower()
    if scheme not in _SCHEMES:
        raise DebtsimError(
            f"--scheduler: unknown address scheme {scheme + '://'!r} in {address!r}; "
            "use tcp://host:port"
        )
    reason = _SCHEMES[scheme]
    if reason is not None:
        raise DebtsimError(f"--scheduler: {reason}")
    if scheme == "tcp":
        host, colon, port = rest.rpartition(":")
        if not colon or not host or not port.isdigit() or not 0 < int(port) < 65536:
            raise DebtsimError(
                f"--scheduler: {address!r} must be host:port (e.g. tcp://10.0.0.5:8786)"
            )
    return text


def _connect(address: str, seconds: float) -> Any:
    """Connect a ``distributed.Client``, giving up after ``seconds`` whatever the peer does.

    The client's own timeout covers a peer that refuses or is silent before
    the connection; a peer that accepts and then never answers would block
    its handshake for good, so the attempt runs in a helper thread that is
    abandoned when the time is up.
    """
    from distributed import Client

    box: dict[str, Any] = {}

    def attempt() -> None:
        try:
            box["client"] = Client(address, timeout=f"{seconds}s")
        except BaseException as error:  # noqa: BLE001 - handed to the caller's thread
            box["error"] = error

    thread = threading.Thread(target=attempt, name="debtsim-connect", daemon=True)
    thread.start()
    thread.join(seconds + 5.0)
    if thread.is_alive():
        raise DebtsimError(
            f"--scheduler: {address} accepted the connection but did not answer within "
            f"{seconds:g} s; is a Dask scheduler listening there?"
        )
    if "error" in box:
        error = box["error"]
        if isinstance(error, OSError | TimeoutError | ValueError | TypeError):
            raise DebtsimError(f"--scheduler: cannot connect to {address}: {error}") from error
        raise error
    return box["client"]


@contextlib.contextmanager
def dask_client(execution: Execution) -> Iterator[Any]:
    """Open a ``distributed.Client`` for ``execution``, closed (with its cluster) on exit.

    Raises
    ------
    DebtsimError
        When the scheduler cannot be reached or the cluster cannot start.

    """
    from distributed import Client, LocalCluster

    if execution.scheduler is not None:
        client = _connect(execution.scheduler, SCHEDULER_TIMEOUT)
        try:
            yield client
        finally:
            client.close()
        return
    import dask

    # Dask starts workers with MALLOC_TRIM_THRESHOLD_ set, which also stops
    # glibc from adapting its mmap threshold: every large numpy temporary is
    # then a fresh mmap, and the engines ran twice as slow (measured).  Keep
    # Dask's other settings (one OpenMP/BLAS thread per worker process).
    environ = {
        k: v
        for k, v in dict(dask.config.get("distributed.nanny.pre-spawn-environ", {})).items()
        if k != "MALLOC_TRIM_THRESHOLD_"
    }
    try:
        with dask.config.set({"distributed.nanny.pre-spawn-environ": environ}):
            cluster = LocalCluster(
                n_workers=execution.workers,
                threads_per_worker=1,
                processes=True,
                dashboard_address=None,
                silence_logs=logging.ERROR,
            )
    except (OSError, TimeoutError, RuntimeError) as error:
        raise DebtsimError(f"--workers: cannot start a local Dask cluster: {error}") from error
    try:
        client = Client(cluster)
        try:
            yield client
        finally:
            client.close()
    finally:
        cluster.close()


_BLAS_LOCK = threading.Lock()
_BLAS_STATE: dict[str, Any] = {"active": 0, "limiter": None}


@contextlib.contextmanager
def single_blas_thread() -> Iterator[None]:
    """Hold every BLAS library loaded in this process at one thread inside the block.

    BLAS splits sums by thread, so the thread count changes the last bits of
    results.  Every sweep point and stress run is computed inside this block,
    wherever it runs, so in-process and Dask results agree bit for bit (and
    two runs on one core each do not oversubscribe the machine).  Nested and
    concurrent blocks share one setting, restored when the last one ends.
    The libraries are found and limited by ``threadpoolctl``.
    """
    import scipy.linalg  # noqa: F401  (loads scipy's own BLAS, so it is limited too)
    from threadpoolctl import threadpool_limits

    with _BLAS_LOCK:
        if _BLAS_STATE["active"] == 0:
            _BLAS_STATE["limiter"] = threadpool_limits(limits=1, user_api="blas")
        _BLAS_STATE["active"] += 1
    try:
        yield
    finally:
        with _BLAS_LOCK:
            _BLAS_STATE["active"] -= 1
            if _BLAS_STATE["active"] == 0 and _BLAS_STATE["limiter"] is not None:
                _BLAS_STATE["limiter"].restore_original_limits()
                _BLAS_STATE["limiter"] = None


def _pinned(fn: Callable[[S, T], R], shared: S, item: T) -> R:
    """Call ``fn(shared, item)`` with BLAS held at one thread."""
    with single_blas_thread():
        return fn(shared, item)


def run_tasks(
    fn: Callable[[S, T], R],
    shared: S,
    items: Sequence[T],
    execution: Execution,
    on_result: Callable[[int, R | BaseException], None],
) -> None:
    """Run ``fn(shared, item)`` for every item and report each result as it arrives.

    Parameters
    ----------
    fn : callable
        A module-level (picklable) function.
    shared : object
        Data every task needs (e.g. the book); sent to each worker once.
    items : sequence
        One task per item.
    execution : Execution
        In-process, local cluster or existing scheduler.
    on_result : callable
        ``on_result(index, result_or_exception)``, called in this process in
        completion order; an exception raised by a task (or by the cluster,
        e.g. a killed worker) is passed instead of a result.

    Notes
    -----
    Remaining tasks are cancelled when ``on_result`` raises (or on
    ``KeyboardInterrupt``).

    """
    if not items:
        return
    if execution.in_process:
        for i, item in enumerate(items):
            try:
                result: R | BaseException = _pinned(fn, shared, item)
            except Exception as error:  # a failed task is reported, not fatal
                result = error
            on_result(i, result)
        return
    from distributed import as_completed

    with dask_client(execution) as client:
        shared_future = client.scatter(shared, broadcast=True, hash=False)
        futures = {
            client.submit(_pinned, fn, shared_future, item, pure=False): i
            for i, item in enumerate(items)
        }
        try:
            for future in as_completed(futures):
                try:
                    result = future.result()
                except Exception as error:
                    result = error
                on_result(futures[future], result)
        finally:
            pending = [f for f in futures if not f.done()]
            if pending:
                client.cancel(pending)
