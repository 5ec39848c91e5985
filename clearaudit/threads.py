"""How many threads one piece of work may use.

numpy, scipy.ndimage and scipy's k-d tree release the GIL in their heavy loops, so threads of
one process share the cores well. Two levels use them:

* the in-process engine (:class:`clearaudit.distributed.InProcessEngine`) runs the tiles of a
  tiled run on a thread pool, one tile per thread;
* work inside one task (k-d tree queries, chunked per-point passes) asks :func:`inner_threads`
  how many threads it may use: inside a tile thread the task's share of the pool (one while
  tiles wait to start, since the tiles already fill the cores; at the end of a stage, when
  fewer tiles run than the pool has threads, the idle threads' share), otherwise
  ``--threads`` / ``CLEARAUDIT_THREADS`` / every core, in that order.

Results never depend on the thread count (tests check it).
"""
from __future__ import annotations

import os
import threading
from collections.abc import Callable, Iterator
from concurrent.futures import ThreadPoolExecutor
from contextlib import contextmanager
from typing import Any

_local = threading.local()
_run_default: list[int] = []  # stack of process-wide limits set by :func:`run_threads`
#: whether :func:`one_blas_thread_from_start` asked OpenBLAS for one thread before numpy or
#: scipy loaded it (then every OpenBLAS the process loads starts with one thread)
_one_from_start: list[bool] = [False]


def available_cores() -> int:
    """Cores this process may run on (its CPU affinity; ``os.cpu_count()`` elsewhere)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):  # pragma: no cover - not Linux
        return max(1, os.cpu_count() or 1)


def inner_threads() -> int:
    """Threads the work of the current task may use for itself (always ≥ 1).

    In order: the limit of the current thread (inside a tile thread of the in-process engine
    its :class:`PoolShare`: 1 while tasks wait), the run's ``--threads``, the
    ``CLEARAUDIT_THREADS`` environment variable (set to 1 for the workers of a local Dask
    cluster), the cores of the machine.
    """
    local = getattr(_local, "limit", None)
    if local:
        return local() if callable(local) else int(local)
    if _run_default and _run_default[-1] > 0:
        return _run_default[-1]
    env = os.environ.get("CLEARAUDIT_THREADS", "").strip()
    if env.isdigit() and int(env) > 0:
        return int(env)
    return available_cores()


def resolve_threads(threads: int) -> int:
    """``threads`` as a count: 0 → the value :func:`inner_threads` gives here."""
    if threads < 0:
        raise ValueError(f"threads must be 0 (automatic) or a positive count, not {threads}")
    return int(threads) if threads else inner_threads()


@contextmanager
def run_threads(threads: int) -> Iterator[int]:
    """Set the thread count of a whole run (0: automatic); yields the count in force."""
    n = resolve_threads(threads)
    _run_default.append(n)
    try:
        yield n
    finally:
        _run_default.pop()


class SharedSetting:
    """A process-wide setting that several blocks may hold at once (runs or tasks on threads
    of one process): the first block in applies it, the last one out restores it.

    ``apply()`` applies the setting and returns what ``restore(state)`` needs, or None when
    it changed nothing (then nothing is restored); :meth:`hold` is the block, yielding that
    state; :attr:`state` is it while any block holds the setting (None otherwise).
    """

    def __init__(self, apply: Callable[[], Any], restore: Callable[[Any], None]):
        self._apply, self._restore = apply, restore
        self._lock = threading.Lock()
        self._depth = 0
        self.state: Any = None

    @contextmanager
    def hold(self) -> Iterator[Any]:
        with self._lock:
            if self._depth == 0:
                self.state = self._apply()
            self._depth += 1
            state = self.state
        try:
            yield state
        finally:
            with self._lock:
                self._depth -= 1
                if self._depth == 0:
                    state, self.state = self.state, None
                    if state is not None:
                        self._restore(state)


def _limit_blas() -> Any:
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # pragma: no cover - a dependency; without it nothing is limited
        return None
    import numpy  # noqa: F401  (loaded now: only loaded libraries are limited)

    if not _blas_one_thread_at_load():
        # scipy's own OpenBLAS loaded now too, to be limited (its threads would start one a
        # core). Not needed where every OpenBLAS starts with one thread: importing
        # scipy.linalg took 0.12-0.17 s on the main thread before a run's first stage,
        # while the line's other scipy modules come on a thread of their own
        import scipy.linalg  # noqa: F401

    return threadpool_limits(limits=1, user_api="blas")


def _blas_one_thread_at_load() -> bool:
    """Whether every OpenBLAS library this process loads starts with one thread:
    :func:`one_blas_thread_from_start` set it before numpy or scipy was loaded, and the
    environment still asks for it."""
    return _one_from_start[0] and os.environ.get("OPENBLAS_NUM_THREADS", "").strip() == "1"


_BLAS_ONE_THREAD = SharedSetting(_limit_blas, lambda limiter: limiter.restore_original_limits())


@contextmanager
def blas_one_thread() -> Iterator[int | None]:
    """BLAS / LAPACK on one thread while the block runs (restored after it; overlapping
    blocks share the setting, :class:`SharedSetting`); yields the limit set, or None where
    ``threadpoolctl`` finds no BLAS.

    The run's matrices are small (3 x 3 plane and eigen systems, a few catenary parameters);
    OpenBLAS's own thread pools (numpy's and scipy's) only woke and spun beside the run's
    threads: on p10M tiled 0.2-0.5 CPU s (1.5-3.5 %) less with one thread, the same outputs.
    The same as ``OPENBLAS_NUM_THREADS=1``, which Dask already sets for its workers.
    """
    with _BLAS_ONE_THREAD.hold() as limiter:
        yield 1 if limiter is not None and limiter.get_original_num_threads().get("blas") \
            else None


#: Allocations of container objects between two collections of the youngest generation of
#: Python's cyclic garbage collector while a run lasts (Python's default: 700), and the
#: collections of each generation before the next older one is collected (default: 10, 10).
RUN_GC_THRESHOLDS = (20_000, 50, 100)


def _relax_gc() -> tuple[int, int, int] | None:
    """Python's collector at :data:`RUN_GC_THRESHOLDS` (never more often than it was): the
    thresholds before, or None when nothing changed (the collector is off)."""
    import gc

    if not gc.isenabled():
        return None
    before = gc.get_threshold()
    gc.set_threshold(*(max(a, b) for a, b in zip(RUN_GC_THRESHOLDS, before, strict=True)))
    return before


def _restore_gc(before: tuple[int, int, int]) -> None:
    import gc

    gc.set_threshold(*before)


_FEWER_GC_PASSES = SharedSetting(_relax_gc, _restore_gc)


@contextmanager
def fewer_gc_passes() -> Iterator[tuple[int, int, int] | None]:
    """Python's cyclic garbage collector runs less often while the block runs (restored after
    it; overlapping blocks share the setting, :class:`SharedSetting`); yields the thresholds
    before, or None where the collector is off.

    A run allocates container objects by the million (tuples, lists, dicts of its Python
    steps) but leaves few reference cycles; at Python's default the collector ran 216-255
    times in a p10M tiled audit for 0.10-0.12 s (943 times for 0.57 s on 100 M points), each
    pass with every other thread stopped (it holds the GIL). At :data:`RUN_GC_THRESHOLDS` it
    did not run between the start and the end of those audits; the cycles it frees wait a
    little longer. Nothing else changes: no result depends on when the collector runs.
    """
    with _FEWER_GC_PASSES.hold() as before:
        yield before


def one_blas_thread_from_start() -> bool:
    """Ask OpenBLAS for one thread before numpy or scipy loads it (``OPENBLAS_NUM_THREADS=1``
    unless the environment already sets a value); whether one thread is what it will start.

    When loaded, numpy's and scipy's OpenBLAS each start a thread per core that spins for a
    while before it sleeps: 0.25 CPU s on 2 cores (a process importing both and sleeping
    1 s used 0.50-0.54 instead of 0.26-0.29 CPU s), taken from the start of a run that keeps
    BLAS on one thread anyway (:func:`blas_one_thread`). The command line calls this first;
    a program that imported numpy before is left as it is (False), as is a value it set.
    Child processes (a local Dask cluster's workers) inherit the setting, as Dask would set
    it for them.
    """
    import sys

    if "numpy" in sys.modules or "scipy" in sys.modules:
        return False
    _one_from_start[0] = os.environ.setdefault("OPENBLAS_NUM_THREADS", "1").strip() == "1"
    return _one_from_start[0]


def blas_threads() -> int | None:
    """The largest thread count of the BLAS libraries loaded (None: none found)."""
    try:
        from threadpoolctl import threadpool_info
    except ImportError:  # pragma: no cover
        return None
    counts = [i["num_threads"] for i in threadpool_info() if i.get("user_api") == "blas"]
    return max(counts) if counts else None


class PoolShare:
    """The threads each running task of a pool may use for the work inside it.

    While tasks wait to start, every task gets one thread (the tasks fill the pool). Once
    none wait, the threads of the pool that have no task left are shared among the running
    tasks: the last tile of a stage uses every core for its chunked passes instead of
    leaving them idle. Results never depend on the thread count, so neither on this share.
    """

    def __init__(self, threads: int, tasks: int):
        self.threads = max(1, int(threads))
        self._waiting = int(tasks)
        self._running = 0
        self._lock = threading.Lock()

    def start(self) -> None:
        """A task starts on a pool thread."""
        with self._lock:
            self._waiting -= 1
            self._running += 1

    def stop(self) -> None:
        """A task has ended."""
        with self._lock:
            self._running -= 1

    def __call__(self) -> int:
        with self._lock:
            if self._waiting > 0 or self._running <= 0:
                return 1
            return max(1, self.threads // self._running)


@contextmanager
def thread_limit(threads: int | PoolShare) -> Iterator[None]:
    """Limit the work done in the current thread to ``threads`` threads (a count, or a
    :class:`PoolShare` asked afresh at every call of :func:`inner_threads`)."""
    if not callable(threads) and threads < 1:
        raise ValueError(f"a thread limit must be at least 1, not {threads}")
    previous = getattr(_local, "limit", None)
    _local.limit = threads if callable(threads) else int(threads)
    try:
        yield
    finally:
        _local.limit = previous


def run_chunks(work: Callable[[int, int], None], n: int, chunk: int,
               threads: int | None = None) -> None:
    """Call ``work(start, stop)`` on consecutive ranges of ``chunk`` covering ``range(n)``.

    The ranges must be independent (each writes its own part of the outputs); they run on
    ``threads`` threads (default :func:`inner_threads`), inline with one thread or one range.
    A range's exception is raised here.
    """
    if chunk < 1:
        raise ValueError(f"chunk must be at least 1, not {chunk}")
    threads = inner_threads() if threads is None else int(threads)
    bounds = [(start, min(n, start + chunk)) for start in range(0, n, chunk)]
    if threads <= 1 or len(bounds) <= 1:
        for start, stop in bounds:
            work(start, stop)
        return
    with ThreadPoolExecutor(max_workers=min(threads, len(bounds))) as pool:
        for future in [pool.submit(work, start, stop) for start, stop in bounds]:
            future.result()


__all__ = ["PoolShare", "SharedSetting", "available_cores", "blas_one_thread", "blas_threads",
           "fewer_gc_passes", "inner_threads", "resolve_threads", "run_chunks", "run_threads", "thread_limit"]
