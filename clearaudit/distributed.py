"""Where the stage functions run: in this process, on a local Dask cluster, or on a cluster.

One small interface, :class:`Engine`, runs a list of tasks (a function and its arguments) and
yields their results as they complete. :class:`InProcessEngine` runs them in this process, on
a pool of threads (one task per thread, as many threads as cores unless ``--threads`` says
otherwise; numpy, scipy.ndimage and the k-d tree release the GIL, so tiles share the cores);
:class:`DaskEngine` submits them to a ``distributed.Client``:
``--workers N`` starts ``distributed.LocalCluster(n_workers=N, threads_per_worker=1)``,
``--scheduler ADDRESS`` connects to an existing scheduler. Only file paths, tile specs and
small summaries travel through the scheduler; workers read their own tiles from the work
folder (which must be on storage every worker can reach).
"""
from __future__ import annotations

import logging
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from typing import Any

from .errors import InputError

log = logging.getLogger(__name__)

Task = tuple[Callable[..., Any], tuple, dict]

#: Seconds to wait for a scheduler given with ``--scheduler``.
CONNECT_TIMEOUT_S = 10.0


class Engine:
    """Runs tasks and yields ``(position, result)`` as each one completes."""

    name = "in-process"
    n_workers = 1

    def run(self, tasks: Sequence[Task]) -> Iterator[tuple[int, Any]]:  # pragma: no cover
        raise NotImplementedError

    def worker_peak_memory_mb(self) -> dict[str, float]:
        """Peak resident memory of each worker process so far. [MB]"""
        return {}

    def describe(self) -> dict[str, Any]:
        return {"engine": self.name, "workers": self.n_workers}


class InProcessEngine(Engine):
    """Run every task in this process: one after the other, or on ``threads`` threads.

    Parameters
    ----------
    threads
        Tasks run at once (each on its own thread; the work inside a task then uses one
        thread, see :mod:`clearaudit.threads`). 1 runs them one after the other in the caller's
        thread.
    """

    def __init__(self, threads: int = 1):
        if int(threads) < 1:
            raise ValueError(f"the in-process engine needs at least one thread, not {threads}")
        self.threads = int(threads)
        self.n_workers = self.threads

    def run(self, tasks: Sequence[Task]) -> Iterator[tuple[int, Any]]:
        if self.threads == 1 or len(tasks) <= 1:
            for k, (fn, args, kwargs) in enumerate(tasks):
                yield k, _task(fn, args, kwargs)
            return
        from concurrent.futures import FIRST_COMPLETED, ThreadPoolExecutor, wait

        pool = ThreadPoolExecutor(self.threads, thread_name_prefix="clearaudit-task")
        futures = {pool.submit(_one_thread, fn, args, kwargs): k
                   for k, (fn, args, kwargs) in enumerate(tasks)}
        try:
            pending = set(futures)
            while pending:
                done, pending = wait(pending, return_when=FIRST_COMPLETED)
                # in submission order among those done together: the same order every run
                for fut in sorted(done, key=futures.__getitem__):
                    yield futures[fut], fut.result()
        finally:
            pool.shutdown(wait=True, cancel_futures=True)

    def describe(self) -> dict[str, Any]:
        return {"engine": self.name, "workers": 1, "threads": self.threads}


def _task(fn: Callable[..., Any], args: tuple, kwargs: dict) -> Any:
    """Run a task, then give the heap pages it freed back to the system.

    Without this, the pages a finished tile freed stay resident in its thread's malloc arena
    and the next tile's peak (on another thread) stacks on top of them.
    """
    from .tiling import release_free_memory

    try:
        return fn(*args, **kwargs)
    finally:
        release_free_memory()


def _one_thread(fn: Callable[..., Any], args: tuple, kwargs: dict) -> Any:
    """Run a task with the work inside it limited to its own thread."""
    from .threads import thread_limit

    with thread_limit(1):
        return _task(fn, args, kwargs)


def _worker_peak_rss_mb() -> float:
    from .tiling import peak_rss_mb

    return peak_rss_mb()


class DaskEngine(Engine):
    """Run tasks on a Dask ``distributed`` cluster (one task per tile or per input range)."""

    name = "dask"

    def __init__(self, client: Any):
        self.client = client
        self.n_workers = len(client.scheduler_info().get("workers", {})) or 1

    def run(self, tasks: Sequence[Task]) -> Iterator[tuple[int, Any]]:
        from distributed import as_completed

        futures = {}
        for k, (fn, args, kwargs) in enumerate(tasks):
            fut = self.client.submit(_task, fn, args, kwargs, pure=False)
            futures[fut] = k
        try:
            for fut in as_completed(futures, loop=self.client.loop):
                yield futures[fut], fut.result()
        finally:
            for fut in futures:
                fut.release()

    def worker_peak_memory_mb(self) -> dict[str, float]:
        try:
            return {str(k): round(float(v), 1)
                    for k, v in self.client.run(_worker_peak_rss_mb).items()}
        except Exception as exc:  # noqa: BLE001 - memory figures are informative only
            log.info("could not collect worker memory: %s", exc)
            return {}

    def describe(self) -> dict[str, Any]:
        return {"engine": self.name, "workers": self.n_workers,
                "scheduler": str(self.client.scheduler.address)}


def check_engine(options: Any) -> None:
    """Check ``--workers`` / ``--scheduler`` before any heavy work (InputError when bad).

    Parameters
    ----------
    options
        :class:`clearaudit.pipeline.AuditOptions` (``workers``, ``scheduler``).

    Raises
    ------
    InputError
        Negative worker count, both options at once, Dask not installed, or a scheduler
        address that cannot be reached.
    """
    workers = int(getattr(options, "workers", 0) or 0)
    scheduler = getattr(options, "scheduler", None)
    if workers < 0:
        raise InputError("--workers", f"must be 0 (in-process) or a positive count, not {workers}")
    if workers and scheduler:
        raise InputError("--scheduler", "give either --workers (local cluster) or --scheduler "
                                        "(existing cluster), not both")
    try:
        import distributed  # noqa: F401
    except ImportError:
        raise InputError("--workers" if workers else "--scheduler",
                         "needs the 'distributed' package (pip install 'dask[distributed]')") \
            from None
    if scheduler:
        client = _connect(str(scheduler))
        client.close()


def _connect(address: str) -> Any:
    from distributed import Client

    try:
        return Client(address, timeout=CONNECT_TIMEOUT_S, set_as_default=False)
    except (OSError, TimeoutError, ValueError, TypeError) as exc:
        detail = str(exc).strip().splitlines()[0][:160] if str(exc).strip() else \
            type(exc).__name__
        raise InputError("--scheduler", f"cannot reach a Dask scheduler at {address!r} "
                                        f"({detail})") from None


@contextmanager
def engine_for(workers: int = 0, scheduler: str | None = None,
               threads: int = 1) -> Iterator[Engine]:
    """The engine of a run: in-process, a local cluster of ``workers`` or a scheduler.

    Parameters
    ----------
    workers
        Processes of a local cluster (one thread each); 0: in-process.
    scheduler
        Address of an existing Dask scheduler (``tcp://host:8786``).
    threads
        Threads of the in-process engine (tasks run at once).
    """
    if not workers and not scheduler:
        yield InProcessEngine(threads)
        return
    if scheduler:
        client = _connect(str(scheduler))
        try:
            yield DaskEngine(client)
        finally:
            client.close()
        return
    import dask
    from distributed import Client, LocalCluster

    # Dask's default worker environment sets MALLOC_TRIM_THRESHOLD_, which switches off
    # glibc's adaptive mmap threshold: every array of more than 128 kB is then mapped and
    # zero-filled afresh, and a tile's classification ran at half speed in each worker (the
    # per-tile step times doubled on 2 cores). One BLAS/OpenMP thread per worker is kept, and
    # the k-d tree queries of a worker use one thread too (``CLEARAUDIT_THREADS``).
    env = {k: v for k, v in (dask.config.get("distributed.nanny.pre-spawn-environ") or {}).items()
           if k != "MALLOC_TRIM_THRESHOLD_"}
    env["CLEARAUDIT_THREADS"] = 1
    with dask.config.set({"distributed.nanny.pre-spawn-environ": env}):
        cluster = LocalCluster(n_workers=int(workers), threads_per_worker=1, processes=True,
                               dashboard_address=None, silence_logs=logging.ERROR)
    client = Client(cluster, set_as_default=False)
    try:
        yield DaskEngine(client)
    finally:
        client.close()
        cluster.close()


__all__ = ["DaskEngine", "Engine", "InProcessEngine", "check_engine", "engine_for"]
