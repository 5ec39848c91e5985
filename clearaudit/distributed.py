"""Where the stage functions run: in this process, on a local Dask cluster, or on a cluster.

One small interface, :class:`Engine`, runs a list of tasks (a function and its arguments) and
yields their results as they complete. :class:`InProcessEngine` runs them in this process, on
a pool of threads (one task per thread, as many threads as cores unless ``--threads`` says
otherwise; the last tasks of a stage share the threads left idle; numpy, scipy.ndimage and
the k-d tree release the GIL, so tiles share the cores);
:class:`DaskEngine` submits them to a ``distributed.Client``:
``--workers N`` starts ``distributed.LocalCluster(n_workers=N, threads_per_worker=1)``,
``--scheduler ADDRESS`` connects to an existing scheduler. Only file paths, tile specs,
small summaries and the values every tile task shares (:meth:`Engine.share`: the tile
owners, the line model's structures and spans, the wire-state recipes; sent to each worker
once) travel
through the scheduler; workers read the inputs and their own tiles from the work folder (which
must be on storage every worker can reach: :meth:`Engine.check_access` checks it on every
worker before any work is sent).
"""
from __future__ import annotations

import logging
import math
import os
import threading
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import Any

from .errors import InputError
from .threads import SharedSetting

log = logging.getLogger(__name__)

Task = tuple[Callable[..., Any], tuple, dict]

#: Seconds to wait for a scheduler given with ``--scheduler``.
CONNECT_TIMEOUT_S = 10.0

_STOP = threading.Event()


@contextmanager
def stop_runs() -> Iterator[None]:
    """While the block runs, the runs of this process stop at their engine's next step
    (:func:`check_stop`): the lines of a network run side by side on threads, when one
    of them, or the user, stops the run."""
    _STOP.set()
    try:
        yield
    finally:
        _STOP.clear()


def check_stop() -> None:
    """Raise ``KeyboardInterrupt`` inside :func:`stop_runs` (a run's cleanup then runs as
    for Ctrl-C)."""
    if _STOP.is_set():
        raise KeyboardInterrupt("stopped with the other lines of the run")


class Engine:
    """Runs tasks and yields ``(position, result)`` as each one completes."""

    name = "in-process"
    n_workers = 1

    def run(self, tasks: Sequence[Task], costs: Sequence[float] | None = None
            ) -> Iterator[tuple[int, Any]]:  # pragma: no cover
        """Run ``tasks``; yield ``(position in tasks, result)`` as each completes.

        ``costs``: optional expected cost of each task (any unit). The tasks then start in
        order of decreasing cost (ties in list order), so a long task does not start last and
        leave the other workers idle at the end of a stage. The order never changes a result.
        """
        raise NotImplementedError

    def worker_peak_memory_mb(self) -> dict[str, float]:
        """Peak resident memory of each worker process so far. [MB]"""
        return {}

    def check_access(self, inputs: Sequence[Path], work: Path) -> None:
        """Raise :class:`InputError` unless every worker can read ``inputs`` and read and
        write the folder ``work`` (in this process: what the driver sees)."""

    def finish(self) -> None:
        """The run will send no more tasks (an engine may then release its workers)."""

    def share(self, value: Any) -> Any:
        """A handle to pass ``value`` to many tasks, as a task argument (possibly inside
        lists, tuples or dicts of the arguments; not inside other objects).

        In this process the value itself. On Dask the value is sent to every worker once and
        the tasks carry a reference: the line model and the wire states of a long line are
        megabytes, and would otherwise be pickled again for every tile's task.
        """
        return value

    def release(self, handle: Any) -> None:
        """The tasks that needed a :meth:`share` handle have run: let the workers drop it."""

    def map_batches(self, fn: Callable[[list], list], items: Sequence[Any],
                    batches_per_worker: int = 4) -> list[Any]:
        """``fn`` over ``items`` in batches (one task each); results in item order.

        ``fn(batch)`` returns one result per item of its batch. Items are dealt round-robin
        into ``batches_per_worker`` batches per worker (even loads when item costs vary
        along the list).
        """
        items = list(items)
        if not items:
            return []
        n = min(len(items), batches_per_worker * self.n_workers)  # no batch is empty
        batches = [items[k::n] for k in range(n)]
        out: list[Any] = [None] * len(items)
        for k, part in self.run([(fn, (b,), {}) for b in batches]):
            if len(part) != len(batches[k]):
                raise RuntimeError("a batch task returned a different number of results")
            out[k::n] = part
        return out

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

    def run(self, tasks: Sequence[Task], costs: Sequence[float] | None = None
            ) -> Iterator[tuple[int, Any]]:
        order = start_order(len(tasks), costs, self.threads)
        check_stop()
        if self.threads == 1 or len(tasks) <= 1:
            for k in order:
                fn, args, kwargs = tasks[k]
                yield k, fn(*args, **kwargs)
                check_stop()
            return
        from concurrent.futures import ThreadPoolExecutor

        from .threads import PoolShare

        share = PoolShare(self.threads, len(tasks))
        pool = ThreadPoolExecutor(self.threads, thread_name_prefix="clearaudit-task")
        futures = {pool.submit(_one_thread, *tasks[k], share): k for k in order}
        try:
            for k, result in as_done(futures):
                yield k, result
                check_stop()
        finally:
            pool.shutdown(wait=True, cancel_futures=True)

    def describe(self) -> dict[str, Any]:
        return {"engine": self.name, "workers": 1, "threads": self.threads}


def as_done(futures: dict[Any, int]) -> Iterator[tuple[int, Any]]:
    """``(position, result)`` of each ``concurrent.futures`` future (``futures``: future →
    position) as it completes; in position order among those done together."""
    from concurrent.futures import FIRST_COMPLETED, wait

    pending = set(futures)
    while pending:
        done, pending = wait(pending, return_when=FIRST_COMPLETED)
        for fut in sorted(done, key=futures.__getitem__):
            yield futures[fut], fut.result()


def start_order(n: int, costs: Sequence[float] | None, workers: int = 1) -> list[int]:
    """Task positions ``0..n-1`` in the order to start them on ``workers`` threads or worker
    processes that each take the next task as they become free.

    With one worker: decreasing ``costs`` (ties and ``costs=None``: list order). With more,
    the tasks are first shared out largest first, each to the least loaded worker (the LPT
    rule of list scheduling), then single tasks are moved or swapped between the most and the
    least loaded worker while that lowers the largest load; the order given is the one in
    which free workers, taking the next task, follow that plan when the costs are right.
    The plan matters at a stage's end: with seven tiles on two threads, LPT left one thread
    idle for the last tile while a 3 + 4 split ended both at once (common practice, no
    source: list scheduling and its local-search refinements).
    """
    if costs is None:
        return list(range(n))
    if len(costs) != n:
        raise ValueError(f"{len(costs)} costs given for {n} tasks")
    values = [float(c) for c in costs]
    if not all(math.isfinite(v) for v in values):
        raise ValueError("task costs must be finite numbers")
    lpt = sorted(range(n), key=lambda k: -values[k])
    workers = int(workers)
    if workers < 2 or n <= workers:
        return lpt
    queues: list[list[int]] = [[] for _ in range(workers)]
    loads = [0.0] * workers
    for k in lpt:
        w = min(range(workers), key=lambda i: (loads[i], i))
        queues[w].append(k)
        loads[w] += values[k]
    _balance(queues, loads, values)
    for q in queues:
        q.sort(key=lambda k: (-values[k], k))
    order: list[int] = []
    free = [0.0] * workers
    heads = [0] * workers
    while len(order) < n:
        w = min((i for i in range(workers) if heads[i] < len(queues[i])),
                key=lambda i: (free[i], i))
        k = queues[w][heads[w]]
        heads[w] += 1
        free[w] += values[k]
        order.append(k)
    return order


def _balance(queues: list[list[int]], loads: list[float], values: list[float]) -> None:
    """Move or swap single tasks between the most and the least loaded worker while that
    lowers the larger of their two loads (in place)."""
    for _ in range(4 * sum(len(q) for q in queues)):
        hi = max(range(len(loads)), key=lambda i: (loads[i], -i))
        lo = min(range(len(loads)), key=lambda i: (loads[i], i))
        gap = loads[hi] - loads[lo]
        best, best_peak = None, loads[hi]
        for a in queues[hi]:
            if 0.0 < values[a] < gap:  # move a
                peak = max(loads[hi] - values[a], loads[lo] + values[a])
                if peak < best_peak - 1e-12:
                    best, best_peak = (a, None), peak
            for b in queues[lo]:  # swap a and b
                d = values[a] - values[b]
                if 0.0 < d < gap:
                    peak = max(loads[hi] - d, loads[lo] + d)
                    if peak < best_peak - 1e-12:
                        best, best_peak = (a, b), peak
        if best is None:
            return
        a, b = best
        queues[hi].remove(a)
        queues[lo].append(a)
        loads[hi] -= values[a]
        loads[lo] += values[a]
        if b is not None:
            queues[lo].remove(b)
            queues[hi].append(b)
            loads[lo] -= values[b]
            loads[hi] += values[b]


def _task(fn: Callable[..., Any], args: tuple, kwargs: dict) -> Any:
    """Run a task on a Dask worker, then give the heap pages it freed back to the system.

    A worker runs one task at a time; without this the pages a finished tile freed stay in
    its resident set between tasks. In this process the tasks are not followed by a trim:
    with tile threads a trim walks (and locks) the arenas the other tile is using, and the
    tiled run on 2 threads was 10 % slower (alternating runs); the stages still trim.
    """
    from .errors import ClearauditError, is_disk_full
    from .threads import fewer_gc_passes
    from .tiling import release_free_memory, small_pages

    try:
        with small_pages(), fewer_gc_passes():
            return fn(*args, **kwargs)
    except Exception as exc:
        # the errors a user can meet (bad input, a full disk) come back as a value that the
        # driver raises: a task failing on the cluster has the worker log its traceback on
        # the console ("Compute Failed"), where the command line promises one line
        if isinstance(exc, ClearauditError) or is_disk_full(exc):
            return _TaskFailure(exc)
        raise
    finally:
        release_free_memory()


def _cluster_failure(exc: BaseException) -> bool:
    """Whether ``exc`` comes from the Dask cluster itself, not from a task's own code."""
    import asyncio

    module = type(exc).__module__.split(".")[0]
    return (module in ("distributed", "tornado")
            or isinstance(exc, asyncio.CancelledError | asyncio.TimeoutError | ConnectionError))


class _TaskFailure:
    """A task's expected error, carried back to the driver as its result (see :func:`_task`)."""

    def __init__(self, exc: BaseException):
        self.exc = exc


def worker_access(inputs: Sequence[str], sizes: Sequence[int], probe: str,
                  token: str) -> list[tuple[str, str]]:
    """What a worker cannot use: ``(path or --work-dir, reason)`` pairs, none when all is well.

    Runs on each worker (:meth:`DaskEngine.check_access`). An input must exist here with the
    driver's size and be readable; the work folder must hold the driver's probe file with
    its token (the same folder, not one of the same name) and take a file of the worker's own.
    """
    problems: list[tuple[str, str]] = []
    for path, size in zip(inputs, sizes, strict=True):
        try:
            here = os.stat(path).st_size
        except OSError as exc:
            problems.append((path, exc.strerror or str(exc)))
            continue
        if here != size:
            problems.append((path, f"{here} bytes there, {size} on the driver"))
        elif not os.access(path, os.R_OK):
            problems.append((path, "not readable"))
    folder = os.path.dirname(probe)
    try:
        with open(probe, encoding="ascii") as fh:
            if fh.read() != token:
                problems.append((f"--work-dir {folder}", "another folder of the same name"))
                return problems
        own = f"{probe}.{os.getpid()}"
        with open(own, "w", encoding="ascii") as fh:
            fh.write(token)
        os.remove(own)
    except OSError as exc:
        problems.append((f"--work-dir {folder}", exc.strerror or str(exc)))
    return problems


def _one_thread(fn: Callable[..., Any], args: tuple, kwargs: dict, share: Any) -> Any:
    """Run a task with the work inside it limited to its ``share``
    (:class:`clearaudit.threads.PoolShare`) of the pool's threads."""
    from .threads import thread_limit

    share.start()
    try:
        with thread_limit(share):
            return fn(*args, **kwargs)
    finally:
        share.stop()


def _worker_peak_rss_mb() -> float:
    from .tiling import peak_rss_mb

    return peak_rss_mb()


class DaskEngine(Engine):
    """Run tasks on a Dask ``distributed`` cluster (one task per tile or per input range)."""

    name = "dask"

    def __init__(self, client: Any, on_done: Callable[[], None] | None = None):
        self.client = client
        self.address = getattr(getattr(client, "scheduler", None), "address", None)
        self.n_workers = len(client.scheduler_info().get("workers", {})) or 1
        self._on_done = on_done
        self._final_memory: dict[str, float] | None = None
        self._shared: list[Any] = []

    def run(self, tasks: Sequence[Task], costs: Sequence[float] | None = None
            ) -> Iterator[tuple[int, Any]]:
        from distributed import as_completed

        if self._final_memory is not None:
            raise RuntimeError("the Dask engine was finished; no more tasks can run")

        check_stop()
        futures = {}
        order = start_order(len(tasks), costs, self.n_workers)
        for rank, k in enumerate(order):
            fn, args, kwargs = tasks[k]
            # the scheduler starts higher priorities first
            fut = self.client.submit(_task, fn, args, kwargs, pure=False,
                                     priority=len(order) - rank)
            futures[fut] = k
        try:
            with self._cluster_failures():
                for fut in as_completed(futures, loop=self.client.loop):
                    result = fut.result()
                    if isinstance(result, _TaskFailure):
                        raise result.exc
                    check_stop()
                    yield futures[fut], result
        finally:
            for fut in futures:
                fut.release()

    @contextmanager
    def _cluster_failures(self) -> Iterator[None]:
        """Turn the cluster's own failures (the scheduler lost, a task cancelled by it, a task
        that killed its workers again and again) into one :class:`EngineError`; the tasks'
        errors pass unchanged."""
        from .errors import ClearauditError, EngineError

        try:
            yield
        except (ClearauditError, KeyboardInterrupt, SystemExit, GeneratorExit):
            raise
        except BaseException as exc:  # distributed's cancellations are asyncio.CancelledError
            if not _cluster_failure(exc):
                raise
            text = str(exc).strip().splitlines()[0][:200] if str(exc).strip() else ""
            raise EngineError(self.address, f"{type(exc).__name__}: {text}".rstrip(": ")
                              ) from exc

    def check_access(self, inputs: Sequence[Path], work: Path) -> None:
        """Raise :class:`InputError` unless every worker connected now can read ``inputs``
        and read and write ``work``: workers read the inputs and their tiles themselves, so on
        a cluster both must be on storage every worker shares, under the same absolute paths
        (a worker that does not would otherwise fail later, or read another file)."""
        import secrets

        token = secrets.token_hex(8)
        probe = Path(work) / f".workers-probe-{token}"
        probe.write_text(token, encoding="ascii")
        try:
            found = self.client.run(worker_access, [str(p) for p in inputs],
                                    [Path(p).stat().st_size for p in inputs], str(probe), token)
        finally:
            probe.unlink(missing_ok=True)
        for address, problems in sorted(found.items()):
            if problems:
                what, why = problems[0]
                raise InputError(what, f"the Dask worker {address} cannot use it ({why}); the "
                                       "inputs and --work-dir must be on storage every worker "
                                       "shares, under the same paths")

    def share(self, value: Any) -> Any:
        if self._final_memory is not None:
            raise RuntimeError("the Dask engine was finished; nothing more can be shared")
        with self._cluster_failures():
            [future] = self.client.scatter([value], broadcast=True, hash=False)
        self._shared.append(future)
        return future

    def release(self, handle: Any) -> None:
        for k, fut in enumerate(self._shared):
            if fut is handle:
                del self._shared[k]
                fut.release()
                return

    def finish(self) -> None:
        """No more tasks: keep the workers' memory figures and let the cluster go (a local
        cluster then shuts down while the driver writes the outputs)."""
        for fut in self._shared:
            fut.release()
        self._shared.clear()
        if self._final_memory is None:
            self._final_memory = self.worker_peak_memory_mb()
        if self._on_done is not None:
            self._on_done()
            self._on_done = None

    def worker_peak_memory_mb(self) -> dict[str, float]:
        if self._final_memory is not None:
            return dict(self._final_memory)
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
    """Check ``--threads``, ``--workers`` and ``--scheduler`` before any heavy work (InputError
    when bad).

    Parameters
    ----------
    options
        Anything with ``threads``, ``workers`` and ``scheduler`` (as
        :class:`clearaudit.pipeline.AuditOptions`).

    Raises
    ------
    InputError
        A negative thread or worker count, threads with a Dask engine, both Dask options at
        once, Dask not installed, or a scheduler address that cannot be reached.
    """
    threads = getattr(options, "threads", 0)
    workers = int(getattr(options, "workers", 0) or 0)
    scheduler = getattr(options, "scheduler", None)
    if not isinstance(threads, int) or threads < 0:
        raise InputError("--threads", f"must be 0 (every core) or a positive count, not {threads}")
    if threads and (workers or scheduler):
        raise InputError("--threads", "applies to the in-process run; with --workers or "
                                      "--scheduler each Dask worker runs one task at a time")
    if workers < 0:
        raise InputError("--workers", f"must be 0 (in-process) or a positive count, not {workers}")
    if workers and scheduler:
        raise InputError("--scheduler", "give either --workers (local cluster) or --scheduler "
                                        "(existing cluster), not both")
    if not (workers or scheduler):
        return
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


#: Modules every worker of a local cluster imports while it starts (the task functions and
#: what they use), so that the first tasks do not pay for the imports.
WORKER_PRELOAD = ("clearaudit.tiling", "clearaudit.classify", "clearaudit.audit.engine",
                  "clearaudit.model")


def _start_local_cluster(workers: int) -> tuple[Any, Any]:
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
    # Dask's nanny sets these in this (the driver's) environment before it spawns each
    # worker; left there, a later run in this process (a library user's) would take one
    # inner thread and one BLAS thread: the driver's values come back once the workers run
    saved = {k: os.environ.get(k) for k in env}
    try:
        with dask.config.set({"distributed.nanny.pre-spawn-environ": env}):
            # the scheduler's HTTP server on any free port: with the fixed default (8787) a
            # second audit on the same machine printed a "port already in use" warning
            cluster = LocalCluster(n_workers=int(workers), threads_per_worker=1,
                                   processes=True, dashboard_address=":0",
                                   silence_logs=logging.ERROR, preload=list(WORKER_PRELOAD))
    finally:
        for k, v in saved.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v
    try:
        client = Client(cluster, set_as_default=False)
    except BaseException:
        cluster.close()
        raise
    return cluster, client


class LocalClusterStart:
    """A local Dask cluster started on a background thread.

    The cluster (worker processes, their imports) starts while the driver validates the inputs
    and reads their headers; :meth:`client` waits for it. :meth:`close_soon` shuts it down on
    a background thread once the last task has run (the driver writes the outputs meanwhile);
    :meth:`close` waits for the shutdown. Use it as a context manager, so that the cluster is
    closed whatever happens.

    Parameters
    ----------
    workers
        Worker processes (one thread each).
    """

    def __init__(self, workers: int):
        import threading

        if int(workers) < 1:
            raise ValueError(f"a local cluster needs at least one worker, not {workers}")
        self.workers = int(workers)
        self._result: tuple[Any, Any] | None = None
        self._error: BaseException | None = None
        self._closer: Any = None
        self._thread = threading.Thread(target=self._start, name="clearaudit-cluster-start",
                                        daemon=True)
        self._thread.start()

    def _start(self) -> None:
        try:
            self._result = _start_local_cluster(self.workers)
        except BaseException as exc:  # noqa: BLE001 - handed to the caller of client()
            self._error = exc

    def client(self) -> Any:
        """The cluster's client (waits for the start; re-raises a failed start)."""
        self._thread.join()
        if self._error is not None:
            raise self._error
        assert self._result is not None
        return self._result[1]

    def close_soon(self) -> None:
        """Shut the cluster down on a background thread (no more tasks will be sent)."""
        import threading

        if self._closer is None:
            self._closer = threading.Thread(target=self._shutdown, name="clearaudit-cluster-stop",
                                            daemon=True)
            self._closer.start()

    def _shutdown(self) -> None:
        self._thread.join()
        if self._result is not None:
            cluster, client = self._result
            try:
                client.close()
            finally:
                cluster.close()

    def close(self) -> None:
        """Shut the cluster down and wait until it is down."""
        self.close_soon()
        self._closer.join()

    def __enter__(self) -> LocalClusterStart:
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()


@contextmanager
def engine_for(workers: int = 0, scheduler: str | None = None,
               threads: int = 1, started: LocalClusterStart | None = None) -> Iterator[Engine]:
    """The engine of a run: in-process, a local cluster of ``workers`` or a scheduler.

    Parameters
    ----------
    workers
        Processes of a local cluster (one thread each); 0: in-process.
    scheduler
        Address of an existing Dask scheduler (``tcp://host:8786``).
    threads
        Threads of the in-process engine (tasks run at once).
    started
        A local cluster already starting (:class:`LocalClusterStart`) for ``workers``; its
        owner closes it.
    """
    if not workers and not scheduler:
        yield InProcessEngine(threads)
        return
    with _quiet_client():
        if scheduler:
            client = _connect(str(scheduler))
            try:
                yield DaskEngine(client)
            finally:
                client.close()
            return
        if started is not None:
            yield DaskEngine(started.client(), on_done=started.close_soon)
            return
        with LocalClusterStart(int(workers)) as cluster:
            yield DaskEngine(cluster.client(), on_done=cluster.close_soon)


@contextmanager
def _quiet_client() -> Iterator[None]:
    """The Dask client's own log messages kept off the console while a run uses it: its
    failures reach the user as the run's one-line error (:class:`EngineError`), and a lost
    scheduler also had it print "Failed to reconnect to scheduler" beside that line."""
    with _QUIET_CLIENT.hold():  # runs side by side (network lines): the first sets, the last restores
        yield


def _client_log_quiet() -> int:
    log = logging.getLogger("distributed.client")
    level = log.level
    log.setLevel(logging.CRITICAL)
    return level


def _client_log_restore(level: int) -> None:
    logging.getLogger("distributed.client").setLevel(level)


_QUIET_CLIENT = SharedSetting(_client_log_quiet, _client_log_restore)


__all__ = ["DaskEngine", "Engine", "InProcessEngine", "LocalClusterStart", "check_engine",
           "engine_for"]
