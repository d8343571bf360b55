"""Independent jobs (parts of a survey, surveys) run serially, on threads, or on a Dask cluster.

The survey step cuts a survey into jobs that are classified alone
(:mod:`inventory.survey.measure`); a month close of many sites runs surveys that share nothing.
:func:`executor` turns the ``--workers N`` / ``--scheduler ADDRESS`` options into one
object with a single method, :meth:`Executor.map`, that yields results **in the order of
the inputs** whatever order they finish in, with at most ``window`` jobs in flight. Equal
order is what makes serial, threaded and distributed runs write identical files (the
classified cloud lists points job by job, the surface sums are added in the same order);
the window is what bounds memory (finished results wait on the workers only until the
ones before them are taken).

* ``workers=None`` or ``0``, no scheduler: in this process, jobs side by side on threads, one
  per core (:func:`cores`), each job's own parallel loops on its share of the cores; a
  single job runs alone on every core. The jobs release the GIL for nearly all their work
  (compiled kernels, NumPy, the LAZ codec), so this keeps the cores busy where one job at a
  time leaves them idle during its NumPy passes.
* ``workers=1``: in this process, one job at a time (its parallel loops on every core).
* ``workers=N, threads=True``: a pool of N threads in this process. NumPy, SciPy's
  KD-tree and the LAZ codec release the GIL for most of the work.
* ``workers=N``: a local Dask distributed cluster of N worker processes, one thread each
  (``dask.distributed.LocalCluster``), started and closed here. Dask starts its workers
  with one BLAS/OpenMP thread (``distributed.nanny.pre-spawn-environ``), and each job's
  own parallel loops get the machine's cores shared among the workers (:func:`job_threads`).
  Each worker process tunes glibc's allocator before its first job
  (:func:`tune_worker_allocator`), on a local cluster and on a scheduler's alike.
* ``scheduler=ADDRESS``: an existing Dask cluster (``tcp://host:8786``). Jobs and their
  arguments are pickled to the workers; survey jobs read their points from the spill folder,
  so the workers must see it (same machine, or a shared ``spill_dir``).
"""

from __future__ import annotations

import collections
import contextlib
import itertools
import os
import threading
from typing import Any, Callable, Iterable, Iterator

__all__ = ["Executor", "executor", "job_threads", "cores", "release_free_memory"]

_local = threading.local()


def job_threads() -> int:
    """Threads a job may use for its own parallel loops (SciPy ``cKDTree`` ``workers``).

    ``-1`` (every core) in a serial run; inside a job run by an :class:`Executor` of
    several workers, the cores of the machine shared among them (one each on a Dask
    cluster at ``scheduler``, whose size its owner chose), so that N workers do not start
    N x cores threads.
    """
    return getattr(_local, "threads", -1)


def cores() -> int:
    """Cores this process may use: the share of a job (:func:`job_threads`) when it runs
    inside one, else the CPUs it is allowed to run on (``os.sched_getaffinity``)."""
    threads = job_threads()
    if threads >= 1:
        return threads
    if hasattr(os, "sched_getaffinity"):
        return max(1, len(os.sched_getaffinity(0)))
    return os.cpu_count() or 1


_trim: Any = None


def release_free_memory() -> None:
    """Hand the memory that finished jobs freed back to the system, where the C library can.

    Each thread allocates from a malloc arena of its own, and glibc keeps what a thread
    frees in its arena for that arena's later use; after jobs have run on threads, that
    memory would stay in the process through the next step (the surface grid).
    ``malloc_trim(0)`` returns the free pages of every arena. A no-op where there is no
    ``malloc_trim`` (not glibc)."""
    global _trim
    if _trim is None:
        import ctypes

        try:
            _trim = ctypes.CDLL(None).malloc_trim
        except (OSError, AttributeError, TypeError):
            _trim = False
    if _trim:
        _trim(0)


#: glibc ``mallopt`` settings of a Dask worker process (:func:`tune_worker_allocator`):
#: M_MMAP_THRESHOLD (-3), M_TRIM_THRESHOLD (-1), M_TOP_PAD (-2), in bytes.
WORKER_MALLOPT = ((-3, 1 << 30), (-1, 1 << 28), (-2, 1 << 28))
_tuned = False


def tune_worker_allocator() -> bool:
    """Keep a worker process's large arrays on the C heap between jobs (glibc only).

    glibc maps each block above its mmap threshold (128 KiB, rising to 32 MiB) afresh and
    unmaps it when freed, and Dask starts its workers trimming the heap above 64 KiB
    (``distributed.nanny.pre-spawn-environ``). So every job's large arrays came to a worker
    as new pages, zeroed by the kernel: a third of a worker's CPU on the 10 M bench survey
    (CHANGELOG.md). This raises the mmap threshold to 1 GiB, grows the heap 256 MiB beyond
    each need and trims it above 256 MiB free. Once per process; False where there is no
    ``mallopt`` (not glibc).
    Not used in the main process, where the jobs run on threads whose arenas are mapped
    heaps of their own (measured: no gain there)."""
    global _tuned
    if _tuned:
        return True
    import ctypes

    try:
        mallopt = ctypes.CDLL(None).mallopt
    except (OSError, AttributeError, TypeError):
        return False
    _tuned = all(mallopt(param, value) == 1 for param, value in WORKER_MALLOPT)
    return _tuned


def _in_worker(fn: Callable[..., Any], *args: Any) -> Any:
    """``fn(*args)`` in a Dask worker process, its allocator tuned first."""
    tune_worker_allocator()
    return fn(*args)


def _in_job(threads: int, fn: Callable[..., Any], *args: Any) -> Any:
    """Run ``fn(*args)`` with :func:`job_threads` set to ``threads`` (in a worker thread or process)."""
    before = getattr(_local, "threads", -1)
    _local.threads = threads
    try:
        return fn(*args)
    finally:
        _local.threads = before


class Executor:
    """Runs ``fn(*args)`` jobs; see the module docstring. Use as a context manager."""

    def __init__(self, kind: str, workers: int, submit: Callable[..., Any], result: Callable[[Any], Any],
                 close: Callable[[], None] = lambda: None, address: str | None = None,
                 job_threads: int = -1, side_by_side: bool = False) -> None:
        self.kind = kind          # "serial" | "threads" | "dask"
        self.workers = workers
        #: serial only: run the jobs of each :meth:`map` on a thread per core
        self.side_by_side = side_by_side
        self.job_threads = job_threads
        self.address = address
        self._submit, self._result, self._close = submit, result, close

    def map(self, fn: Callable[..., Any], jobs: Iterable[tuple], window: int | None = None) -> Iterator[Any]:
        """Yield ``fn(*job)`` for each job, in the order of ``jobs``.

        At most ``window`` jobs (default twice the workers) are submitted and not yet taken.
        """
        if self.kind == "serial":
            yield from self._map_here(fn, jobs, window)
            return
        yield from _windowed(self._submit, self._result, self.job_threads, fn, jobs,
                             max(1, window or 2 * self.workers))

    def _map_here(self, fn: Callable[..., Any], jobs: Iterable[tuple], window: int | None) -> Iterator[Any]:
        # Serial: one job at a time, or side by side on a thread per core. A lone job runs
        # here on every core: threads would only take its cores away.
        n = cores() if self.side_by_side else 1
        it = iter(jobs)
        first = list(itertools.islice(it, 2))
        if n <= 1 or len(first) < 2:
            for job in itertools.chain(first, it):
                yield fn(*job)
            return
        from concurrent.futures import ThreadPoolExecutor

        with ThreadPoolExecutor(max_workers=n, thread_name_prefix="inventory-job") as pool:
            try:
                yield from _windowed(pool.submit, lambda fut: fut.result(), max(1, cores() // n), fn,
                                     itertools.chain(first, it), max(1, window or 2 * n))
            finally:
                pool.shutdown(wait=True, cancel_futures=True)

    def close(self) -> None:
        self._close()

    def __enter__(self) -> "Executor":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()

    def __repr__(self) -> str:
        where = f" at {self.address}" if self.address else ""
        return f"Executor({self.kind}, {self.workers} workers{where})"


def _windowed(submit: Callable[..., Any], result: Callable[[Any], Any], threads: int, fn: Callable[..., Any],
              jobs: Iterable[tuple], window: int) -> Iterator[Any]:
    """Results of ``fn(*job)`` in the order of ``jobs``, with at most ``window`` submitted and
    not yet taken; each job runs with :func:`job_threads` ``threads``."""
    pending: collections.deque = collections.deque()
    for job in jobs:
        pending.append(submit(_in_job, threads, fn, *job))
        if len(pending) >= window:
            yield result(pending.popleft())
    while pending:
        yield result(pending.popleft())


def executor(workers: int | None = None, scheduler: str | None = None, *, threads: bool = False) -> Executor:
    """An :class:`Executor` for the ``--workers`` / ``--scheduler`` options.

    Parameters
    ----------
    workers : int, optional
        Local parallelism: worker processes of a Dask ``LocalCluster`` (or threads with
        ``threads=True``). Without a scheduler, ``None`` or 0 runs in this process with the
        jobs side by side on the cores, 1 in this process one job at a time.
    scheduler : str, optional
        Address of a running Dask scheduler; wins over ``workers``.
    threads : bool
        Use a thread pool of ``workers`` threads instead of processes.
    """
    if workers is not None and int(workers) < 0:
        raise ValueError(f"workers must be 0 or more, got {workers}")
    if scheduler:
        from dask.distributed import Client

        client = Client(scheduler)
        n = max(1, len(client.scheduler_info().get("workers", {})))
        return Executor("dask", n, lambda fn, *a: client.submit(_in_worker, fn, *a, pure=False),
                        lambda fut: fut.result(), client.close, address=scheduler, job_threads=1)
    n = int(workers or 0)
    if n <= 1:
        return Executor("serial", 1, None, None, side_by_side=n == 0)  # type: ignore[arg-type]
    share = max(1, (os.cpu_count() or 1) // n)   # cores per worker
    if threads:
        from concurrent.futures import ThreadPoolExecutor

        pool = ThreadPoolExecutor(max_workers=n, thread_name_prefix="inventory")
        return Executor("threads", n, pool.submit, lambda fut: fut.result(),
                        lambda: pool.shutdown(wait=True, cancel_futures=True), job_threads=share)
    from dask.distributed import Client, LocalCluster

    # One thread per process: the jobs are NumPy-bound and bring their own KD-tree threads.
    cluster = LocalCluster(n_workers=n, threads_per_worker=1, processes=True,
                           dashboard_address=":0")   # any free port: several closes may run at once
    try:
        client = Client(cluster)
    except BaseException:
        cluster.close()
        raise

    def close() -> None:
        with contextlib.suppress(Exception):
            client.close()
        cluster.close()

    return Executor("dask", n, lambda fn, *a: client.submit(_in_worker, fn, *a, pure=False),
                    lambda fut: fut.result(), close, address=cluster.scheduler_address, job_threads=share)
