"""Survey years in parallel: in this process, in local worker processes, or on a dask cluster.

Every year's work depends only on its own casts, the shared grid and options, and its
seed (``SeedSequence([seed, year])``), so the years can run anywhere and in any order
and still give the same numbers. To keep that true to the last bit the BLAS and OpenMP
thread pools are pinned to the same size (:data:`BLAS_THREADS`) around every task in
every mode, serial included: a kriging system factored by one thread and by several
may round differently.

Results come back in the order of the items, whatever order they finish in. An error
in a worker is raised in the caller as the same exception type with the same message;
Ctrl-C cancels the tasks not yet started and stops the worker processes.

Worker processes start with ``forkserver`` where the platform has it (a clean,
single-threaded server process forks the workers: no threads or locks of the caller
are copied, and OpenBLAS's own fork handlers cover its pool), ``spawn`` elsewhere.
The large shared inputs (cell coordinates and areas, drift at the cells, region
weights) travel once per worker, through the pool's initializer, or once per dask
worker by ``scatter(broadcast=True)``; each task carries only its year's casts.
"""

from __future__ import annotations

import multiprocessing as mp
import os
import signal
import threading
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import FIRST_COMPLETED, Future, ProcessPoolExecutor, wait
from concurrent.futures.process import BrokenProcessPool
from contextlib import contextmanager
from types import TracebackType
from typing import Any, TypeVar

from threadpoolctl import threadpool_limits

from coldindex.errors import ConfigError, StageError
from coldindex.interpolate import THREAD_LIMIT

T = TypeVar("T")
R = TypeVar("R")

BLAS_THREADS = 1
"""Threads of BLAS and OpenMP in every task, serial or parallel.

One thread a task: years are the unit of parallel work, and a fixed pool size makes
serial and parallel runs do the same arithmetic.
"""

PRELOAD = ["__main__", "coldindex.indices"]
"""Modules the forkserver imports once, so the workers it forks start warm.

``__main__`` (the caller's script or ``coldindex.cli``, as multiprocessing does by
default) because every worker imports it again on start; ``coldindex.indices`` for the
per-year work.
"""

_SHARED: Any = None
_PIN_LOCK = threading.Lock()
_PIN_DEPTH = 0
_PIN_CONTROL: threadpool_limits | None = None
_PIN_OWN = 2  # the simulations' own thread limit before the first task pinned it


def default_workers() -> int:
    """The cores this process may run on (its CPU affinity), at least 1."""
    try:
        return max(len(os.sched_getaffinity(0)), 1)
    except AttributeError:  # no affinity on macOS and Windows
        return max(os.cpu_count() or 1, 1)


def start_method() -> str:
    """``forkserver`` where available (Linux, macOS), otherwise ``spawn``."""
    return "forkserver" if "forkserver" in mp.get_all_start_methods() else "spawn"


def warm_up(workers: int = 2, scheduler: str | None = None) -> None:
    """Start the process server now, so its imports overlap the caller's own work.

    Optional: call it early (e.g. before reading and checking the casts) in a run that
    will use ``workers > 1`` local processes; it returns at once. Without it the first
    :meth:`YearPool.map` waits for the server's imports (about a second or two).
    """
    if (workers > 1 and scheduler is None and start_method() == "forkserver"
            and not mp.current_process().daemon):
        from multiprocessing import forkserver

        mp.get_context("forkserver").set_forkserver_preload(PRELOAD)
        forkserver.ensure_running()


@contextmanager
def _pinned(blas_threads: int) -> Iterator[None]:
    """Limit the BLAS and OpenMP pools while any task of this process runs.

    The limit is process-wide: with several tasks at once in one process (a dask worker
    with several threads) the first to start sets it and the last to end restores the
    original, so no task runs with the pool another task's end restored.
    """
    global _PIN_DEPTH, _PIN_CONTROL, _PIN_OWN
    with _PIN_LOCK:
        if _PIN_DEPTH == 0:
            _PIN_CONTROL = threadpool_limits(limits=blas_threads)
            _PIN_OWN = THREAD_LIMIT[0]  # the simulations' own thread pools follow the pin
            THREAD_LIMIT[0] = blas_threads
        _PIN_DEPTH += 1
    try:
        yield
    finally:
        with _PIN_LOCK:
            _PIN_DEPTH -= 1
            if _PIN_DEPTH == 0 and _PIN_CONTROL is not None:
                _PIN_CONTROL.restore_original_limits()
                _PIN_CONTROL = None
                THREAD_LIMIT[0] = _PIN_OWN


def run_pinned(func: Callable[[Any, T], R], shared: Any, item: T,
               blas_threads: int = BLAS_THREADS) -> R:
    """``func(shared, item)`` with the BLAS and OpenMP pools limited to ``blas_threads``."""
    with _pinned(blas_threads):
        return func(shared, item)


def _init_worker(shared: Any) -> None:
    """Keep the shared inputs for the worker's tasks; leave Ctrl-C to the caller."""
    global _SHARED
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    _SHARED = shared


def _in_worker(func: Callable[[Any, T], R], item: T, blas_threads: int) -> R:
    return run_pinned(func, _SHARED, item, blas_threads)


class YearPool:
    """Runs per-year functions serially, in worker processes or on a dask scheduler.

    Use as a context manager; the workers start on the first :meth:`map` that has more
    than one item and stop on exit, so several stages (the family choice, then the
    years) share one set of workers and one copy of the shared inputs.

    Parameters
    ----------
    shared
        Inputs every task needs (passed as the first argument of ``func``); sent once
        per worker. Must pickle for ``workers > 1`` or a scheduler.
    workers
        Local worker processes; 1 runs every task in this process.
    scheduler
        None for local processes; ``"local"`` starts a dask ``LocalCluster`` of
        ``workers`` single-threaded processes; any other value is the address of a
        running dask.distributed scheduler (e.g. ``tcp://10.0.0.5:8786``), whose
        workers need ``coldindex`` installed at the same version. One thread a worker
        (``dask worker --nthreads 1``) uses one core a year, as here; with more threads,
        a process's tasks share one BLAS pin (held while any of them runs).
    blas_threads
        BLAS/OpenMP threads a task (:data:`BLAS_THREADS`).
    """

    def __init__(self, shared: Any = None, workers: int = 1, scheduler: str | None = None,
                 blas_threads: int = BLAS_THREADS) -> None:
        if workers < 1:
            raise ConfigError(f"--workers needs to be a whole number >= 1, got: {workers}")
        self.shared = shared
        self.workers = workers
        self.scheduler = scheduler
        self.blas_threads = blas_threads
        self._executor: ProcessPoolExecutor | None = None
        self._client: Any = None
        self._cluster: Any = None
        self._shared_future: Any = None
        warm_up(workers, scheduler)

    def __enter__(self) -> YearPool:
        return self

    def __exit__(self, exc_type: type[BaseException] | None, exc: BaseException | None,
                 tb: TracebackType | None) -> None:
        self.close(abort=exc is not None)

    def close(self, abort: bool = False) -> None:
        """Stop the workers; ``abort`` stops running tasks too instead of waiting for them."""
        if self._executor is not None:
            ex, self._executor = self._executor, None
            if abort:
                _terminate(ex)
            else:
                ex.shutdown(wait=True)
        if self._client is not None:
            client, self._client = self._client, None
            client.close()
        if self._cluster is not None:
            cluster, self._cluster = self._cluster, None
            cluster.close()

    def map(self, func: Callable[[Any, T], R], items: Sequence[T],
            on_done: Callable[[int, R], None] | None = None) -> list[R]:
        """``[func(shared, item) for item in items]``, in the items' order.

        Parameters
        ----------
        func
            A module-level function (so it pickles by name).
        items
            One item a task, e.g. a year's casts.
        on_done
            Called in this process with the item's index and its result as each task
            finishes (in finishing order).

        Returns
        -------
        list
            The results, in the order of ``items``.
        """
        if not items:
            return []
        if self.scheduler is not None:
            return self._map_dask(func, items, on_done)
        if self.workers == 1 or len(items) == 1 or mp.current_process().daemon:
            # (a daemonic process may not start processes: it runs its years itself)
            out = []
            for i, item in enumerate(items):
                res = run_pinned(func, self.shared, item, self.blas_threads)
                if on_done is not None:
                    on_done(i, res)
                out.append(res)
            return out
        return self._map_processes(func, items, on_done)

    def _map_processes(self, func: Callable[[Any, T], R], items: Sequence[T],
                       on_done: Callable[[int, R], None] | None) -> list[R]:
        if self._executor is None:
            ctx = mp.get_context(start_method())
            self._executor = ProcessPoolExecutor(max_workers=self.workers, mp_context=ctx,
                                                 initializer=_init_worker,
                                                 initargs=(self.shared,))
        futures = {self._executor.submit(_in_worker, func, item, self.blas_threads): i
                   for i, item in enumerate(items)}
        results: dict[int, R] = {}
        pending: set[Future[R]] = set(futures)
        try:
            while pending:
                done, pending = wait(pending, return_when=FIRST_COMPLETED)
                for fut in sorted(done, key=futures.__getitem__):
                    res = fut.result()  # a worker's exception is raised here, as itself
                    results[futures[fut]] = res
                    if on_done is not None:
                        on_done(futures[fut], res)
        except BrokenProcessPool:
            self.close(abort=True)
            raise StageError("A worker process stopped unexpectedly: out of memory (run "
                             "again with fewer --workers), or a script that calls coldindex "
                             "with workers > 1 outside an `if __name__ == \"__main__\":` "
                             "block (add one).") from None
        except BaseException:
            for fut in pending:
                fut.cancel()
            self.close(abort=True)
            raise
        return [results[i] for i in range(len(items))]

    def _map_dask(self, func: Callable[[Any, T], R], items: Sequence[T],
                  on_done: Callable[[int, R], None] | None) -> list[R]:
        from distributed import as_completed

        if self._client is None:
            self._client = self._connect()
            self._shared_future = self._client.scatter(self.shared, broadcast=True)
        client = self._client
        futures = [client.submit(run_pinned, func, self._shared_future, item,
                                 self.blas_threads, pure=False) for item in items]
        index = {f.key: i for i, f in enumerate(futures)}
        results: dict[int, R] = {}
        try:
            for fut in as_completed(futures):
                res = fut.result()  # a worker's exception is raised here, as itself
                results[index[fut.key]] = res
                if on_done is not None:
                    on_done(index[fut.key], res)
        except BaseException:
            client.cancel(futures)
            raise
        return [results[i] for i in range(len(items))]

    def _connect(self) -> Any:
        from distributed import Client, LocalCluster

        if self.scheduler == "local":
            self._cluster = LocalCluster(n_workers=self.workers, threads_per_worker=1,
                                         processes=True, dashboard_address=None)
            return Client(self._cluster)
        try:
            return Client(self.scheduler, timeout="20s")
        except (OSError, TimeoutError, ValueError) as exc:
            raise ConfigError(f"--scheduler: no dask scheduler answered at {self.scheduler} "
                              f"({exc}); start one there, or leave --scheduler out to use "
                              "local processes.") from None


def _terminate(executor: ProcessPoolExecutor) -> None:
    """Stop a pool now: cancel queued tasks and end the worker processes."""
    processes = list(getattr(executor, "_processes", {}).values())
    executor.shutdown(wait=False, cancel_futures=True)
    for p in processes:
        if p.is_alive():
            p.terminate()
    for p in processes:
        p.join(timeout=5)


def map_years(func: Callable[[Any, T], R], items: Sequence[T], workers: int = 1,
              scheduler: str | None = None,
              on_done: Callable[[int, R], None] | None = None, shared: Any = None) -> list[R]:
    """One stage of per-year tasks: :meth:`YearPool.map` on a pool of its own.

    Parameters
    ----------
    func
        A module-level ``func(shared, item)``.
    items
        One item a task.
    workers, scheduler
        Where to run (:class:`YearPool`).
    on_done
        Called with each item's index and result as it finishes.
    shared
        Inputs every task needs, sent once per worker.

    Returns
    -------
    list
        The results, in the order of ``items``.
    """
    with YearPool(shared, workers, scheduler) as pool:
        return pool.map(func, items, on_done)
