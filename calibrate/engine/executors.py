"""The one seam through which the replay fans out over series.

An executor runs `fn(shared, task)` for many small tasks, where `shared` is data
every task reads (the history arrays) and is handed to each worker only once.
`SerialExecutor` runs in this process; `LocalExecutor` uses processes on this
machine (started through a fork server, which is safe with the compiled kernels'
threads, and handed the shared arrays once per worker, not once per task);
`DaskExecutor` sends the shared data to each worker of a dask.distributed
cluster once (a copy per worker under its own key) and runs each batch of tasks
on a worker holding its copy.
"""

from __future__ import annotations

import abc
import contextlib
import ctypes
import ctypes.util
import gc
import os
import signal
import socket
import sys
import threading
import types
from collections import Counter, deque
from collections.abc import Callable, Iterable, Iterator
from concurrent.futures import CancelledError, ProcessPoolExecutor, as_completed
from multiprocessing import get_context
from multiprocessing.connection import Connection
from typing import Any

from calibrate.errors import CalibrationError

_SHARED: dict[int, Any] = {}


def _init_worker(token: int, shared: Any, caller_alive: Connection) -> None:
    exit_with_caller(caller_alive)
    # Ctrl-C in a terminal reaches the whole process group: the calling process
    # stops the pool, a worker interrupted on its own would only print a traceback
    # (already ignored when `_start_fork_server` started the fork server)
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    _SHARED[token] = shared
    single_thread_worker()


# Ctrl-C or SIGTERM while a worker is being started would cut the data the fork server
# hands it half-way (the worker then dies with a traceback of its own); a stop handler
# asks `defer_stop` first, and a stop that arrives meanwhile is delivered right after
_starting = 0
_deferred: list[int] = []


def defer_stop(signum: int) -> bool:
    """For a stop handler: True when workers are being started; the signal is then
    delivered again as soon as they are."""
    if _starting:
        _deferred.append(signum)
        return True
    return False


@contextlib.contextmanager
def _starting_workers() -> Iterator[None]:
    global _starting
    _starting += 1
    try:
        yield
    finally:
        _starting -= 1
        if not _starting and _deferred:
            os.kill(os.getpid(), _deferred.pop(0))
            _deferred.clear()


def _start_fork_server() -> None:
    """Start the fork server (once per process) with Ctrl-C ignored.

    A terminal sends SIGINT to every process of the foreground group. The fork
    server hands its own start-up handlers to the workers it forks, so started
    this way a worker ignores SIGINT from its first instruction, not only once
    its initializer runs: a worker still starting up (unpickling the history)
    would otherwise die with a traceback and break the pool.
    """
    from multiprocessing import forkserver

    # Nothing preloaded. Not the default `__main__`: where Python honours it, the fork
    # server would run the calling script (an unguarded one would start a replay there,
    # breaking the pool). Not this package either: Python 3.11 starts the fork server
    # without the caller's sys.path, so beside a checkout it could import another copy
    # (an installed one) and the workers would run that copy's code; each forked worker
    # imports what it needs with the caller's sys.path instead.
    forkserver.set_forkserver_preload([])
    if threading.current_thread() is not threading.main_thread():
        forkserver.ensure_running()  # signal handlers can only be set in the main thread
        return
    previous = signal.signal(signal.SIGINT, signal.SIG_IGN)
    try:
        forkserver.ensure_running()
    finally:
        signal.signal(signal.SIGINT, previous)


@contextlib.contextmanager
def _script_not_rerun(fn: Callable) -> Iterator[None]:
    """While workers start, show multiprocessing a blank `__main__`, so a worker does
    not run the calling script again: a saved script needs no
    ``if __name__ == "__main__":`` guard. Task functions defined in that script
    (rather than in a module) still need the script, so it is left as it is for them."""
    main = sys.modules.get("__main__")
    if getattr(fn, "__module__", None) == "__main__" or main is None:
        yield
        return
    sys.modules["__main__"] = types.ModuleType("__main__")
    try:
        yield
    finally:
        sys.modules["__main__"] = main


def exit_with_caller(caller_alive: Connection) -> None:
    """End this worker process as soon as the process that started its pool ends,
    however it ends (SIGKILL included).

    `caller_alive` is the read end of a pipe whose only write end the calling
    process holds: when it ends, the kernel closes that end and a daemon thread
    waiting here reads end-of-file. Neither the fork server's own pipe nor
    ``prctl(PR_SET_PDEATHSIG)`` can do this: a fork-server worker's parent is
    the fork server, which stays up as long as any of its workers does.
    """
    threading.Thread(target=_exit_at_eof, args=(caller_alive,), daemon=True,
                     name="exit-with-caller").start()


def _exit_at_eof(conn: Connection) -> None:
    with contextlib.suppress(EOFError, OSError):
        while True:
            conn.recv_bytes()
    os._exit(1)


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
    steady_heap()


# glibc's mallopt parameters (malloc.h)
M_TRIM_THRESHOLD = -1
M_MMAP_THRESHOLD = -3
HEAP_MMAP_BYTES = 32 * 2**20  # glibc's largest mmap threshold on 64-bit systems
HEAP_TRIM_BYTES = 64 * 2**20
heap_steady = False  # set in a worker once `steady_heap` took effect


def steady_heap() -> None:
    """Keep a worker's freed memory for its next task (glibc only; elsewhere nothing).

    A task allocates and frees arrays of a few MB per series. glibc gives such blocks
    back to the system when they are freed (unmapped, or the heap's top trimmed) and
    the next task takes fresh pages, which the kernel must zero: measured on a
    1,105-series tune, that was about a third of each worker's time. Serving
    blocks up to 32 MB from the heap and keeping up to 64 MB free at its top makes the
    pages stay; the worker's peak memory is unchanged, it is only held between tasks.
    """
    global heap_steady
    mallopt = _libc_function("mallopt")
    if mallopt is None:  # pragma: no cover - not glibc
        return
    heap_steady = bool(mallopt(M_MMAP_THRESHOLD, HEAP_MMAP_BYTES)
                       and mallopt(M_TRIM_THRESHOLD, HEAP_TRIM_BYTES))


def trim_heap(collect: bool = True) -> None:
    """Give memory freed in this process back to the system (glibc's malloc_trim;
    elsewhere nothing). After a large load (a history's frames), a dropped cache or a
    trial's temporaries, glibc keeps the freed pages for later allocations, scattered
    between live ones; measured on a 1,105-series tune that held about 300 MB.
    `collect`: run the garbage collector first."""
    if collect:
        gc.collect()
    malloc_trim = _libc_function("malloc_trim")
    if malloc_trim is not None:
        malloc_trim(0)


def _libc_function(name: str) -> Callable | None:
    """A function of glibc's C library, None where there is none."""
    try:
        return getattr(ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6"), name)
    except (OSError, AttributeError):  # pragma: no cover - not glibc
        return None


def _run_task(token: int, fn: Callable, index: int, task: Any) -> tuple[int, Any]:
    return index, fn(_SHARED[token], task)


# the resource tracker's note when a stopped run (Ctrl-C, SIGTERM) left a pool's semaphore
# for it to unlink: it does unlink it, so the note is noise after the one-line message
TRACKER_NOTE = "ignore:resource_tracker:UserWarning"


def _quiet_resource_tracker() -> None:
    """Pass `TRACKER_NOTE` to the resource tracker process, which multiprocessing starts
    with this interpreter's warning options (it is started with the first pool)."""
    if TRACKER_NOTE not in sys.warnoptions:
        sys.warnoptions.append(TRACKER_NOTE)


class Executor(abc.ABC):
    """The seam where work fans out: run tasks against shared data, yielding (task index,
    result) as they finish. Implementations: `SerialExecutor`, `LocalExecutor`,
    `DaskExecutor`."""

    workers: int = 1

    @abc.abstractmethod
    def run(self, fn: Callable, shared: Any, tasks: list) -> Iterator[tuple[int, Any]]:
        """Yield ``(i, fn(shared, tasks[i]))`` for every task, in any order."""

    def close(self) -> None:  # noqa: B027 (a no-op default: not every executor has workers)
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
        self._caller_alive: tuple[Connection, Connection] | None = None

    def _pool_for(self, shared: Any) -> ProcessPoolExecutor:
        token = id(shared)
        if self._pool is None or self._shared is not shared:
            self.close()
            self._shared = shared
            context = get_context("forkserver")
            _quiet_resource_tracker()
            _start_fork_server()
            self._caller_alive = context.Pipe(duplex=False)  # (read end, write end)
            self._pool = ProcessPoolExecutor(
                max_workers=self.workers,
                mp_context=context,
                initializer=_init_worker,
                initargs=(token, shared, self._caller_alive[0]),
            )
            self._token = token
        return self._pool

    def run(self, fn: Callable, shared: Any, tasks: list) -> Iterator[tuple[int, Any]]:
        if self.workers <= 1 or len(tasks) <= 1:
            yield from SerialExecutor().run(fn, shared, tasks)
            return
        with _starting_workers():
            pool = self._pool_for(shared)
            with _script_not_rerun(fn):  # workers start on the first submits
                futures = [pool.submit(_run_task, self._token, fn, i, t)
                           for i, t in enumerate(tasks)]
        pending = set(futures)
        del futures  # a finished future holds its result: only `pending` keeps them
        try:
            for fut in as_completed(list(pending)):
                pending.discard(fut)
                yield fut.result()
        finally:
            for fut in pending:
                fut.cancel()

    def close(self) -> None:
        if self._pool is not None:
            self._pool.shutdown(wait=True, cancel_futures=True)
            self._pool = None
            self._token = None
            for end in self._caller_alive or ():
                end.close()
            self._caller_alive = None
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
BATCHES_IN_FLIGHT = 2  # per worker thread: the next batch is queued while one runs
LIVENESS_SECONDS = 2.0  # how often a run with nothing finishing checks for departed workers


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

    Every worker gets its own copy of the shared data (the history arrays): one
    scatter per worker, under a key of its own, kept while the data is the same
    object, so repeated replays (search trials) ship nothing but the small task
    descriptions. Each batch of tasks (`dask_batch_size`) runs on a worker that
    holds its copy; batches are handed out as workers finish earlier ones. A
    broadcast of one key would not stay put: Dask's active memory manager (on by
    default) drops the extra replicas of a key between replays, after which
    workers fetch the history again or sit idle. A key held by one worker only is
    never dropped. A worker that leaves gets its batches rerun elsewhere; a worker
    that joins gets its copy at the start of the next run.

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
        self._blocks: dict[str, Any] = {}  # worker address -> future of its own copy

    def _blocks_for(self, shared: Any) -> dict[str, int]:
        """Scatter `shared` to every worker that has no copy of it yet (each copy
        under its own key, held by that worker only) and forget the copies of
        workers that left. Returns the threads of each worker holding a copy."""
        if self._shared is not shared:
            self._release()
            self._shared = shared
        nthreads = self._client.nthreads()
        for addr in [a for a in self._blocks if a not in nthreads]:
            self._blocks.pop(addr).release()
        for addr in nthreads:
            if addr not in self._blocks:
                # a one-element list: one unique key for the whole dict, never the
                # dict's own keys (two histories with the same levels would share names)
                [self._blocks[addr]] = self._client.scatter([shared], workers=[addr], hash=False)
        return {a: nthreads[a] for a in self._blocks}

    def _release(self) -> None:
        for fut in self._blocks.values():
            fut.release()
        self._blocks = {}
        self._shared = None

    @property
    def shared_keys(self) -> dict[str, str]:
        """Dask key of each worker's copy of the shared data, by worker address."""
        return {addr: fut.key for addr, fut in self._blocks.items()}

    def run(self, fn: Callable, shared: Any, tasks: list) -> Iterator[tuple[int, Any]]:
        from dask.distributed import wait

        if not tasks:
            return
        threads = self._blocks_for(shared)
        self.workers = max(1, sum(threads.values()))  # clusters scale
        todo = deque(batched(enumerate(tasks), dask_batch_size(len(tasks), self.workers)))
        running: dict[Any, tuple[str, list]] = {}  # future -> (worker, batch)

        def hand_out() -> None:
            load = Counter(addr for addr, _ in running.values())
            while todo:
                free = [a for a in threads if load[a] < BATCHES_IN_FLIGHT * threads[a]]
                if not free:
                    return
                for addr in free:
                    if not todo:
                        return
                    batch = todo.popleft()
                    fut = self._client.submit(
                        _dask_batch, fn, self._blocks[addr], batch,
                        workers=[addr], allow_other_workers=False, pure=False,
                    )
                    running[fut] = (addr, batch)
                    load[addr] += 1

        def requeue(lost: list) -> None:
            nonlocal threads
            for fut in lost:
                todo.appendleft(running.pop(fut)[1])
                fut.cancel()
            threads = self._blocks_for(shared)
            if not threads:
                raise CalibrationError("the Dask cluster has no workers left")

        try:
            hand_out()
            while running:
                try:
                    wait(list(running), timeout=LIVENESS_SECONDS, return_when="FIRST_COMPLETED")
                except CancelledError:
                    pass  # sorted out below
                except TimeoutError:
                    # a worker that retired gracefully took its copy along: its
                    # batches would wait for it for ever
                    alive = self._client.nthreads()
                    requeue([f for f, (a, _) in running.items() if a not in alive])
                    hand_out()
                    continue
                lost = []
                for fut in [f for f in running if f.done()]:
                    if fut.status == "finished":
                        try:
                            results = fut.result()
                        except CancelledError:  # its worker died before we got them
                            lost.append(fut)
                            continue
                        del running[fut]
                        fut.release()  # the batch's results now live here only
                        yield from results
                    elif fut.status == "error":
                        fut.result()  # the task's own error, raised here
                    else:  # cancelled: its worker died and took its copy along
                        lost.append(fut)
                if lost:
                    requeue(lost)
                hand_out()
        finally:
            if running:
                self._client.cancel(list(running))

    def close(self) -> None:
        self._release()
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
