"""The in-process engine's thread pool and the thread limits of the work inside a task."""
from __future__ import annotations

import threading

import numpy as np
import pytest

from clearaudit.distributed import InProcessEngine
from clearaudit.threads import inner_threads, resolve_threads, run_threads, thread_limit


def _task(k: int, barrier: threading.Barrier | None = None) -> tuple[int, int, str]:
    inner = inner_threads()  # asked before the barrier: the other tasks wait to start
    if barrier is not None:
        barrier.wait(timeout=10)  # only passes when two tasks really run at once
    return k * k, inner, threading.current_thread().name


def test_threaded_engine_runs_tasks_at_once_and_returns_every_result():
    barrier = threading.Barrier(2)
    engine = InProcessEngine(threads=2)
    tasks = [(_task, (k, barrier if k < 2 else None), {}) for k in range(6)]
    got = dict(engine.run(tasks))
    assert sorted(got) == list(range(6))
    assert all(got[k][0] == k * k for k in range(6))
    # the work inside a task gets one thread while tasks wait: the tasks fill the threads
    assert got[0][1] == got[1][1] == 1
    assert {v[1] for v in got.values()} <= {1, 2}
    assert all(v[2].startswith("clearaudit-task") for v in got.values())
    assert engine.describe()["threads"] == 2


def test_one_thread_runs_in_the_callers_thread_in_order():
    engine = InProcessEngine(threads=1)
    with run_threads(3):
        got = list(engine.run([(_task, (k,), {}) for k in range(3)]))
    assert [k for k, _ in got] == [0, 1, 2]
    assert {v[2] for _, v in got} == {threading.current_thread().name}
    assert {v[1] for _, v in got} == {3}  # the run's own thread count


def test_costs_start_the_largest_tasks_first_and_keep_positions():
    # Longest-first (common practice, no source: the LPT rule of list scheduling): a large
    # tile that starts last leaves the other threads idle at the end of a stage.
    from clearaudit.distributed import start_order

    assert start_order(4, [1.0, 5.0, 3.0, 5.0]) == [1, 3, 2, 0]  # ties in list order
    assert start_order(3, None) == [0, 1, 2]
    with pytest.raises(ValueError, match="2 costs given for 3 tasks"):
        start_order(3, [1, 2])
    with pytest.raises(ValueError, match="finite"):
        start_order(3, [1.0, float("nan"), 5.0])
    started = []

    def task(k):
        started.append(k)
        return k * 10

    got = list(InProcessEngine(threads=1).run([(task, (k,), {}) for k in range(4)],
                                              costs=[1, 5, 3, 5]))
    assert started == [1, 3, 2, 0] and got == [(1, 10), (3, 30), (2, 20), (0, 0)]
    started.clear()
    got = dict(InProcessEngine(threads=2).run([(task, (k,), {}) for k in range(5)],
                                              costs=[0, 1, 2, 3, 4]))
    assert got == {k: 10 * k for k in range(5)}
    assert started[:2] in ([4, 3], [3, 4]) and sorted(started) == list(range(5))


def _dispatch(order, costs, workers):
    """Each task of ``order`` goes to the worker that frees first (what a thread pool or a
    Dask scheduler does); the stage's end (makespan)."""
    free = [0.0] * workers
    for k in order:
        w = min(range(workers), key=lambda i: (free[i], i))
        free[w] += costs[k]
    return max(free)


def test_start_order_ends_a_stage_no_later_than_longest_first():
    # Reference: the best split found by trying every assignment (brute force), and the LPT
    # rule of list scheduling (common practice, no source). The order must end no later
    # than LPT, and at the optimum for the measured p10M tile costs (seven tiles, two
    # threads: LPT leaves the last tile alone, a 3 + 4 split ends both threads together).
    import itertools

    from clearaudit.distributed import start_order

    def best(costs, workers):
        return min(max(sum(c for c, w in zip(costs, plan, strict=True) if w == i)
                       for i in range(workers))
                   for plan in itertools.product(range(workers), repeat=len(costs)))

    p10m = [1.608, 1.534, 1.638, 1.529, 1.388, 1.377, 1.278]
    lpt = sorted(range(7), key=lambda k: -p10m[k])
    order = start_order(7, p10m, 2)
    assert sorted(order) == list(range(7))
    assert _dispatch(order, p10m, 2) == pytest.approx(best(p10m, 2))
    assert _dispatch(order, p10m, 2) < _dispatch(lpt, p10m, 2) - 0.2
    rng = np.random.default_rng(4)
    for _ in range(60):
        n, workers = int(rng.integers(3, 9)), int(rng.integers(2, 4))
        costs = list(rng.uniform(0.5, 2.0, n))
        order = start_order(n, costs, workers)
        assert sorted(order) == list(range(n))
        lpt = sorted(range(n), key=lambda k: -costs[k])
        assert _dispatch(order, costs, workers) <= _dispatch(lpt, costs, workers) + 1e-12
        assert _dispatch(order, costs, workers) >= best(costs, workers) - 1e-12
    assert start_order(3, [3.0, 1.0, 2.0], 5) == [0, 2, 1]  # more workers than tasks: LPT


def _fails(k: int) -> int:
    if k == 3:
        raise ValueError("tile 3 is broken")
    return k


def test_a_failing_task_raises_in_the_caller():
    with pytest.raises(ValueError, match="tile 3 is broken"):
        list(InProcessEngine(threads=2).run([(_fails, (k,), {}) for k in range(6)]))


def test_thread_settings_nest_and_reject_bad_counts(monkeypatch):
    monkeypatch.setenv("CLEARAUDIT_THREADS", "5")
    assert inner_threads() == 5
    with run_threads(0) as n:  # automatic: the environment's value
        assert n == 5
    with run_threads(2):
        assert inner_threads() == 2
        with thread_limit(1):
            assert inner_threads() == 1
        assert inner_threads() == 2
    assert resolve_threads(4) == 4
    with pytest.raises(ValueError):
        resolve_threads(-1)
    with pytest.raises(ValueError):
        InProcessEngine(threads=0)


def test_run_chunks_raises_a_failing_range_and_rejects_a_bad_chunk():
    from clearaudit.threads import run_chunks

    def work(lo: int, hi: int) -> None:
        if lo <= 500 < hi:
            raise ValueError("range with 500 is broken")

    for threads in (1, 2):
        with pytest.raises(ValueError, match="500"):
            run_chunks(work, 1000, 100, threads)
    with pytest.raises(ValueError):
        run_chunks(work, 10, 0)


def _last_task(k: int) -> int:
    """Quick tasks return at once; task 2 waits until it is the only one left running."""
    import time

    if k < 2:
        return inner_threads()
    t0 = time.monotonic()
    while time.monotonic() - t0 < 10.0:
        if inner_threads() == 2:
            return 2
        time.sleep(0.005)
    return inner_threads()


def test_the_last_running_task_shares_the_idle_threads():
    from clearaudit.threads import PoolShare

    got = dict(InProcessEngine(threads=2).run([(_last_task, (k,), {}) for k in range(3)]))
    assert got[2] == 2  # alone at the end of the stage: both threads for its inner work
    # the share itself: one thread per task while any task waits; then threads // running
    share = PoolShare(4, 5)
    assert share() == 1
    for _ in range(4):
        share.start()
    assert share() == 1  # one task still waits
    share.start()
    assert share() == 1  # five running on four threads
    share.stop()
    share.stop()
    assert share() == 1  # three running: 4 // 3
    share.stop()
    assert share() == 2
    share.stop()
    assert share() == 4
    with thread_limit(share):
        assert inner_threads() == 4


def _blas_counts() -> list[int]:
    """Thread counts of the BLAS libraries loaded (numpy's and scipy's), as threadpoolctl —
    the reference of the tests below — reports them; skips the test where there is none."""
    threadpoolctl = pytest.importorskip("threadpoolctl")
    import scipy.linalg  # noqa: F401

    counts = [i["num_threads"] for i in threadpoolctl.threadpool_info()
              if i["user_api"] == "blas"]
    if not counts:
        pytest.skip("no BLAS library found")
    return counts


def test_blas_one_thread_limits_every_loaded_blas_and_restores_it():
    from clearaudit.threads import blas_one_thread, blas_threads

    before = _blas_counts()
    with blas_one_thread() as limit:
        assert limit == 1 and set(_blas_counts()) == {1} and blas_threads() == 1
        a = np.arange(9.0).reshape(3, 3) + np.eye(3)
        np.testing.assert_allclose(np.linalg.solve(a, a @ np.ones(3)), np.ones(3))
    assert _blas_counts() == before


def test_blas_one_thread_of_overlapping_runs_restores_once_the_last_ends():
    # two runs on two threads of one program, leaving in the order they came: BLAS stays on
    # one thread while either runs and comes back when the last one ends
    from clearaudit.threads import blas_one_thread

    before = _blas_counts()
    a, b = blas_one_thread(), blas_one_thread()
    a.__enter__()
    b.__enter__()
    a.__exit__(None, None, None)
    assert set(_blas_counts()) == {1}
    b.__exit__(None, None, None)
    assert _blas_counts() == before


def test_fewer_gc_passes_raises_the_thresholds_and_restores_them():
    # reference: Python's own gc.get_threshold (common practice, no source: the collector's
    # thresholds only change when it runs, never a result); overlapping runs restore once,
    # a collector the program turned off stays off, thresholds already higher stay
    import gc

    from clearaudit.threads import RUN_GC_THRESHOLDS, fewer_gc_passes

    before = gc.get_threshold()
    try:
        gc.set_threshold(700, 10, 10)
        a, b = fewer_gc_passes(), fewer_gc_passes()
        assert a.__enter__() == (700, 10, 10)
        assert gc.get_threshold() == RUN_GC_THRESHOLDS
        b.__enter__()
        a.__exit__(None, None, None)
        assert gc.get_threshold() == RUN_GC_THRESHOLDS
        b.__exit__(None, None, None)
        assert gc.get_threshold() == (700, 10, 10)
        gc.set_threshold(50_000, 5, 500)
        with fewer_gc_passes():
            assert gc.get_threshold() == (50_000, 50, 500)
        assert gc.get_threshold() == (50_000, 5, 500)
        gc.disable()
        try:
            with fewer_gc_passes() as was:
                assert was is None and gc.get_threshold() == (50_000, 5, 500)
        finally:
            gc.enable()
    finally:
        gc.set_threshold(*before)


def test_shared_setting_applies_once_and_restores_after_the_last_holder():
    # the mechanism of small_pages, kept_heap and blas_one_thread: a process-wide value
    # (here a plain dict) applied by the first holder, restored by the last one out, also
    # after an error; an apply that changes nothing (None) restores nothing
    from clearaudit.threads import SharedSetting

    value = {"v": "default"}
    log = []

    def apply():
        log.append("apply")
        before, value["v"] = value["v"], "set"
        return before

    def restore(before):
        log.append("restore")
        value["v"] = before

    setting = SharedSetting(apply, restore)
    outer, inner = setting.hold(), setting.hold()
    assert outer.__enter__() == "default" and value["v"] == "set"
    assert inner.__enter__() == "default" and setting.state == "default"
    outer.__exit__(None, None, None)
    assert value["v"] == "set"
    inner.__exit__(None, None, None)
    assert value["v"] == "default" and setting.state is None and log == ["apply", "restore"]
    with pytest.raises(RuntimeError), setting.hold():
        raise RuntimeError("restored on errors too")
    assert value["v"] == "default" and log == ["apply", "restore"] * 2
    unchanged = SharedSetting(lambda: None, lambda state: log.append("never"))
    with unchanged.hold() as state:
        assert state is None
    assert log[-1] == "restore"


def _fresh_python(code: str, env: dict[str, str]) -> str:
    """The last line ``code`` prints, run by a fresh Python with the environment ``env``."""
    import subprocess
    import sys

    return subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          env=env, check=True).stdout.strip().splitlines()[-1]


def _without_openblas_setting() -> dict[str, str]:
    import os

    return {k: v for k, v in os.environ.items() if k != "OPENBLAS_NUM_THREADS"}


def test_the_command_line_asks_openblas_for_one_thread_before_numpy_loads_it():
    # threadpoolctl (a reference library) reads the thread count OpenBLAS started with
    code = ("import sys; import clearaudit.cli as c; assert 'numpy' not in sys.modules; "
            "c.main(['conductors']); "
            "from threadpoolctl import threadpool_info; import numpy, scipy.linalg; "
            "print(sorted({i['num_threads'] for i in threadpool_info() "
            "if i.get('user_api') == 'blas'}))")
    env = _without_openblas_setting()
    assert _fresh_python(code, env) == "[1]"
    # a value the user set is kept; with numpy already loaded nothing is changed
    env["OPENBLAS_NUM_THREADS"] = "2"
    code2 = ("import os; from clearaudit.threads import one_blas_thread_from_start as f; "
             "print(f(), os.environ['OPENBLAS_NUM_THREADS'])")
    assert _fresh_python(code2, env) == "False 2"
    env.pop("OPENBLAS_NUM_THREADS")
    code3 = ("import os, numpy; from clearaudit.threads import one_blas_thread_from_start as f; "
             "print(f(), 'OPENBLAS_NUM_THREADS' in os.environ)")
    assert _fresh_python(code3, env) == "False False"


def test_blas_one_thread_from_start_leaves_scipy_linalg_unloaded_and_its_blas_on_one_thread():
    # a run whose OpenBLAS was asked for one thread before numpy loaded (the command line):
    # blas_one_thread does not load scipy.linalg to limit it (0.12-0.17 s on the run's main
    # thread); scipy's OpenBLAS, loaded later, still starts with one thread.
    # Reference: threadpoolctl (a reference library) reads the thread counts
    code = ("import sys; from clearaudit.threads import one_blas_thread_from_start, "
            "blas_one_thread; assert one_blas_thread_from_start()\n"
            "import numpy\n"
            "with blas_one_thread() as limit:\n"
            "    assert limit == 1 and 'scipy.linalg' not in sys.modules\n"
            "    import scipy.linalg\n"
            "from threadpoolctl import threadpool_info\n"
            "print(sorted({i['num_threads'] for i in threadpool_info() "
            "if i.get('user_api') == 'blas'}), "
            "len([i for i in threadpool_info() if i.get('user_api') == 'blas']))")
    counts, libraries = _fresh_python(code, _without_openblas_setting()).rsplit(" ", 1)
    assert counts == "[1]" and int(libraries) >= 1
