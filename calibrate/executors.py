"""The one seam through which the replay fans out over series.

An executor runs `fn(shared, task)` for many small tasks, where `shared` is data
every task reads (the history arrays) and is handed to each worker only once.
`SerialExecutor` runs in this process; `LocalExecutor` uses processes on this
machine (started through a fork server, which is safe with the compiled kernels'
threads, and handed the shared arrays once per worker, not once per task);
`DaskExecutor` sends the shared data to a dask.distributed cluster once
(`Client.scatter(broadcast=True)`) and submits tasks against it.
"""

from __future__ import annotations

import os
import socket
import threading
from collections.abc import Callable, Iterable, Iterator
from concurrent.futures import ProcessPoolExecutor, as_completed
from multiprocessing import get_context
from typing import Any

from calibrate.errors import CalibrationError

_SHARED: dict[int, Any] = {}


def _init_worker(token: int, shared: Any) -> None:
    _SHARED[token] = shared
    single_thread_worker()


def single_thread_worker() -> None:
    """One thread per worker process: the processes already use every core, and
    BLAS or numba threads on top would only oversubscribe them."""
    try:
        import numba
        from threadpoolctl import threadpool_limits

        threadpool_limits(1)
        numba.set_num_threads(1)
    except ImportError:  # pragma: no cover - both come with the dependencies
        pass


def _run_task(token: int, fn: Callable, index: int, task: Any) -> tuple[int, Any]:
    return index, fn(_SHARED[token], task)


class Executor:
    """Base class: run tasks against shared data, yielding (task index, result)."""

    workers: int = 1

    def run(self, fn: Callable, shared: Any, tasks: list) -> Iterator[tuple[int, Any]]:
        raise NotImplementedError

    def close(self) -> None:
        """Release workers (a no-op where there are none)."""

    def __enter__(self) -> Executor:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


class SerialExecutor(Executor):
    """Runs every task in the calling process."""

    def run(self, fn: Callable, shared: Any, tasks: list) -> Iterator[tuple[int, Any]]:
        for i, task in enumerate(tasks):
            yield i, fn(shared, task)


class LocalExecutor(Executor):
    """Processes on this machine; the pool is kept while the shared data is the same."""

    def __init__(self, workers: int | None = None):
        self.workers = workers or os.cpu_count() or 1
        self._pool: ProcessPoolExecutor | None = None
        self._token: int | None = None
        self._shared: Any = None  # held so its id cannot be reused by other data

    def _pool_for(self, shared: Any) -> ProcessPoolExecutor:
        token = id(shared)
        if self._pool is None or self._shared is not shared:
            self.close()
            self._shared = shared
            self._pool = ProcessPoolExecutor(
                max_workers=self.workers,
                mp_context=get_context("forkserver"),
                initializer=_init_worker,
                initargs=(token, shared),
            )
            self._token = token
        return self._pool

    def run(self, fn: Callable, shared: Any, tasks: list) -> Iterator[tuple[int, Any]]:
        if self.workers <= 1 or len(tasks) <= 1:
            yield from SerialExecutor().run(fn, shared, tasks)
            return
        pool = self._pool_for(shared)
        futures = [pool.submit(_run_task, self._token, fn, i, t) for i, t in enumerate(tasks)]
        try:
            for fut in as_completed(futures):
                yield fut.result()
        finally:
            for fut in futures:
                fut.cancel()

    def close(self) -> None:
        if self._pool is not None:
            self._pool.shutdown(wait=True, cancel_futures=True)
            self._pool = None
            self._token = None
        self._shared = None


_WORKER_THREAD = threading.local()


def _dask_batch(fn: Callable, shared: Any, batch: list[tuple[int, Any]]) -> list[tuple[int, Any]]:
    """Run one batch of tasks on a Dask worker (single-threaded kernels, set once
    per worker thread: numba's thread count is thread-local)."""
    if not getattr(_WORKER_THREAD, "ready", False):
        single_thread_worker()
        _WORKER_THREAD.ready = True
    return [(i, fn(shared, task)) for i, task in batch]


def dask_batch_size(n_tasks: int, workers: int) -> int:
    """Tasks per Dask task: about `BATCHES_PER_WORKER` batches per worker (load
    balance, steady progress), at most `MAX_BATCH` (bounded result size per batch,
    about 1 MB per replay task of 8 series x 90 days), at least 1."""
    per = -(-n_tasks // max(1, workers * BATCHES_PER_WORKER))
    return max(1, min(MAX_BATCH, per))


BATCHES_PER_WORKER = 8
MAX_BATCH = 16


def _check_reachable(address: str, timeout: float = 5.0) -> None:
    """Fail fast, in one line, when a tcp:// scheduler address refuses connections."""
    from distributed.comm.addressing import parse_address, parse_host_port

    try:
        protocol, loc = parse_address(address)
        if protocol not in ("tcp", "tls"):
            return
        host, port = parse_host_port(loc)
    except ValueError as exc:
        raise CalibrationError(
            f"--scheduler: bad Dask scheduler address {address!r}: {exc}"
        ) from None
    try:
        socket.create_connection((host, port), timeout=timeout).close()
    except OSError as exc:
        reason = exc.strerror or type(exc).__name__
        raise CalibrationError(
            f"cannot reach the Dask scheduler at {address}: {reason}"
        ) from None


class DaskExecutor(Executor):
    """A dask.distributed cluster: `address` of a scheduler, or a LocalCluster.

    The shared data (the history arrays) is scattered once to every worker with
    `broadcast=True` and kept there while it is the same object, so repeated
    replays (search trials) ship nothing but the small task descriptions. Tasks
    are grouped into batches (`dask_batch_size`) to keep the scheduler's
    per-task overhead small.

    Parameters
    ----------
    address : str, optional
        Scheduler address such as ``tcp://10.0.0.5:8786``; None starts a
        `LocalCluster` with `workers` single-threaded worker processes.
    workers : int, optional
        Worker processes of the LocalCluster (default: cores); ignored with `address`.
    """

    def __init__(self, address: str | None = None, workers: int | None = None):
        try:
            from dask.distributed import Client, LocalCluster
        except ImportError as exc:  # pragma: no cover - dask is a dependency
            raise CalibrationError("the dask engine needs dask[distributed] installed") from exc
        self._cluster = None
        if address:
            _check_reachable(address)
            try:
                self._client = Client(address)
            except (OSError, ValueError) as exc:
                msg = " ".join(str(exc).split())
                raise CalibrationError(
                    f"cannot reach the Dask scheduler at {address}: {msg}"
                ) from None
            try:
                self._client.wait_for_workers(1, timeout=60)
            except TimeoutError:
                self._client.close()
                raise CalibrationError(
                    f"the Dask scheduler at {address} has no workers (waited 60 s)"
                ) from None
        else:
            n = workers or os.cpu_count() or 1
            self._cluster = LocalCluster(
                n_workers=n, threads_per_worker=1, processes=True, dashboard_address=None
            )
            self._client = Client(self._cluster)
        self.workers = max(1, sum(self._client.nthreads().values()))
        self._shared: Any = None  # held so its id cannot be reused by other data
        self._shared_future: Any = None

    def _scatter(self, shared: Any) -> Any:
        """The future of `shared` on every worker, scattered only when it changed."""
        if self._shared is not shared or self._shared_future is None:
            if self._shared_future is not None:
                self._shared_future.release()
            # a one-element list: one unique key for the whole dict, never the dict's
            # own keys (two histories with the same levels would share names)
            [self._shared_future] = self._client.scatter([shared], broadcast=True, hash=False)
            self._shared = shared
        return self._shared_future

    @property
    def shared_key(self) -> str | None:
        """Dask key of the scattered shared data (None before the first run)."""
        return None if self._shared_future is None else self._shared_future.key

    def run(self, fn: Callable, shared: Any, tasks: list) -> Iterator[tuple[int, Any]]:
        from dask.distributed import as_completed as dask_completed

        if not tasks:
            return
        self.workers = max(1, sum(self._client.nthreads().values()))  # clusters scale
        shared_future = self._scatter(shared)
        size = dask_batch_size(len(tasks), self.workers)
        batches = batched(enumerate(tasks), size)
        futures = [
            self._client.submit(_dask_batch, fn, shared_future, b, pure=False) for b in batches
        ]
        done: set[str] = set()
        try:
            for fut in dask_completed(futures):
                yield from fut.result()
                done.add(fut.key)
                fut.release()  # the batch's results now live here only
        finally:
            pending = [f for f in futures if f.key not in done]
            if pending:
                self._client.cancel(pending)

    def close(self) -> None:
        if self._shared_future is not None:
            self._shared_future.release()
            self._shared_future = None
            self._shared = None
        self._client.close()
        if self._cluster is not None:
            self._cluster.close()


def make_executor(
    engine: str = "local", workers: int | None = None, scheduler: str | None = None
) -> Executor:
    """Factory behind `--engine`: ``serial``, ``local`` or ``dask``."""
    if engine == "serial":
        return SerialExecutor()
    if engine == "local":
        return LocalExecutor(workers)
    if engine == "dask":
        return DaskExecutor(scheduler, workers)
    raise CalibrationError(f"--engine: unknown engine '{engine}' (use local, serial or dask)")


def batched(items: Iterable, size: int) -> list[list]:
    """Split `items` into lists of at most `size`."""
    items = list(items)
    return [items[i : i + size] for i in range(0, len(items), size)]
