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

    def _pool_for(self, shared: Any) -> ProcessPoolExecutor:
        token = id(shared)
        if self._pool is None or self._token != token:
            self.close()
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


def _dask_task(fn: Callable, shared: Any, index: int, task: Any) -> tuple[int, Any]:
    return index, fn(shared, task)


class DaskExecutor(Executor):
    """A dask.distributed cluster: `address` of a scheduler, or a LocalCluster.

    Parameters
    ----------
    address : str, optional
        Scheduler address such as ``tcp://10.0.0.5:8786``; None starts a
        `LocalCluster` with `workers` single-threaded worker processes.
    """

    def __init__(self, address: str | None = None, workers: int | None = None):
        try:
            from dask.distributed import Client, LocalCluster
        except ImportError as exc:  # pragma: no cover - dask is a dependency
            raise CalibrationError("the dask engine needs dask[distributed] installed") from exc
        self._cluster = None
        if address:
            try:
                self._client = Client(address, timeout="20s")
            except OSError as exc:
                raise CalibrationError(
                    f"cannot reach the Dask scheduler at {address}: {exc}"
                ) from exc
        else:
            n = workers or os.cpu_count() or 1
            self._cluster = LocalCluster(
                n_workers=n, threads_per_worker=1, processes=True, dashboard_address=None
            )
            self._client = Client(self._cluster)
        self.workers = max(1, sum(self._client.nthreads().values()))
        self._shared_key: int | None = None
        self._shared_future = None

    def run(self, fn: Callable, shared: Any, tasks: list) -> Iterator[tuple[int, Any]]:
        from dask.distributed import as_completed as dask_completed

        if self._shared_key != id(shared):
            # shipped once per worker, then referenced by every task
            self._shared_future = self._client.scatter(shared, broadcast=True, hash=False)
            self._shared_key = id(shared)
        futures = [
            self._client.submit(_dask_task, fn, self._shared_future, i, t, pure=False)
            for i, t in enumerate(tasks)
        ]
        for fut in dask_completed(futures):
            yield fut.result()

    def close(self) -> None:
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
