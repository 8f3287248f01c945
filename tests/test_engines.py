"""Tests of spatial_ev.inference.engines: task order, progress, thread pool, worker processes and
dask.distributed. The oracle of every engine is Python's own ``[function(t) for t in tasks]``."""

from __future__ import annotations

import os
import threading
import time
from collections import Counter

import numpy as np
import pytest

from spatial_ev.inference import engines
from spatial_ev.inference.engines import default_workers, run_tasks, worker_status
from spatial_ev.errors import InputError


def slow_square(task: int) -> int:
    # later tasks finish first, so completion order differs from task order
    time.sleep(0.002 * (10 - task))
    return task * task


LOADS: Counter = Counter()   # unpickling of CountedFunction, per process and name
DUMPS: Counter = Counter()   # pickling of CountedFunction, per process and name


class CountedFunction:
    """A task function that holds an array and counts how often it is pickled (in the calling
    process) and unpickled (in each worker), to observe how often it is shipped."""

    def __init__(self, name: str, size: int) -> None:
        self.name, self.data = name, np.arange(size, dtype=float)

    def __getstate__(self) -> dict:
        DUMPS[self.name] += 1
        return {"name": self.name, "data": self.data}

    def __setstate__(self, state: dict) -> None:
        self.name, self.data = state["name"], state["data"]
        LOADS[self.name] += 1

    def __call__(self, task: int) -> tuple[int, int, float]:
        time.sleep(0.01)
        return os.getpid(), LOADS[self.name], float(self.data[task])


def nested(task: int) -> list:
    # a task that calls the engine again: runs inline in the worker
    return run_tasks(slow_square, range(task), engine="processes", n_workers=2) + \
        [worker_status()["in_worker"]]


def status_with_scipy(task: int) -> dict:
    import scipy.linalg  # noqa: F401  (its BLAS, if it has its own, is loaded too)

    return worker_status()


def blas_libraries() -> int:
    import scipy.linalg  # noqa: F401
    from threadpoolctl import threadpool_info

    return len([i for i in threadpool_info() if i["user_api"] == "blas"])


def fail_on_three(task: int) -> int:
    if task == 3:
        raise ZeroDivisionError(f"task {task}")
    return task


@pytest.fixture(scope="module")
def client():
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                                  dashboard_address=":0") as cluster, \
            distributed.Client(cluster) as c:
        yield c


class TestRunTasks:
    @pytest.mark.parametrize("n_workers", [None, 1, 3])
    def test_results_in_task_order_locally(self, n_workers):
        assert run_tasks(slow_square, range(10), n_workers=n_workers) == \
            [t * t for t in range(10)]

    def test_thread_pool_uses_several_threads(self):
        seen = set()

        def record(task):
            seen.add(threading.get_ident())
            time.sleep(0.01)
            return task

        run_tasks(record, range(8), n_workers=4)
        assert len(seen) > 1

    def test_blas_threads_restored_after_overlapping_pools(self):
        threadpoolctl = pytest.importorskip("threadpoolctl")

        def blas_threads():
            return [i["num_threads"] for i in threadpoolctl.threadpool_info()
                    if i["user_api"] == "blas"]

        before = blas_threads()
        inside = []

        def outer(task):
            inside.append(blas_threads())
            return run_tasks(slow_square, range(4), n_workers=2)

        run_tasks(outer, range(3), n_workers=3)
        assert all(t == [1] * len(before) for t in inside)
        assert blas_threads() == before

    def test_nested_calls_in_pool_threads_run_inline(self):
        def outer(task):
            me = threading.get_ident()
            inner = run_tasks(lambda t: threading.get_ident(), range(4), n_workers=2)
            return set(inner) == {me}

        assert run_tasks(outer, range(3), n_workers=3) == [True] * 3
        # called in turn (one worker), the tasks are not pool workers: their calls use a pool
        def pause(task):
            time.sleep(0.02)
            return threading.get_ident()

        seen = run_tasks(lambda t: run_tasks(pause, range(6), n_workers=3), [0],
                         n_workers=1)[0]
        assert len(set(seen)) > 1

    def test_progress_counts_every_task(self):
        calls = []
        run_tasks(slow_square, range(5), n_workers=2,
                  progress=lambda done, total: calls.append((done, total)))
        assert calls == [(1, 5), (2, 5), (3, 5), (4, 5), (5, 5)]

    def test_dask_client_same_results_and_reused(self, client):
        calls = []
        out = run_tasks(slow_square, range(10), engine="dask", scheduler=client,
                        progress=lambda d, t: calls.append(d))
        assert out == [t * t for t in range(10)]
        assert calls == list(range(1, 11))
        assert client.status == "running"  # a Client that was passed in is not closed

    def test_dask_function_scattered_once(self, client):
        function = CountedFunction("dask", 1000)
        out = run_tasks(function, range(10), engine="dask", scheduler=client)
        assert [value for _, _, value in out] == [float(t) for t in range(10)]
        assert DUMPS["dask"] <= 1   # at most one pickling for all tasks (none in-process)

    def test_dask_scheduler_address(self, client):
        address = client.scheduler.address
        assert run_tasks(abs, [-2, 3], engine="dask", scheduler=address) == [2, 3]

    def test_errors_propagate(self):
        def fail(task):
            raise ZeroDivisionError(f"task {task}")

        with pytest.raises(ZeroDivisionError, match="task"):
            run_tasks(fail, [1, 2], n_workers=2)

    def test_no_tasks(self):
        assert run_tasks(abs, []) == []

    # input validation -------------------------------------------------------------------------
    def test_bad_engine(self):
        with pytest.raises(InputError, match=r"`engine` must be one of 'local', 'processes', 'dask'; got 'ray'"):
            run_tasks(abs, [1], engine="ray")

    def test_scheduler_with_local_engine(self):
        with pytest.raises(InputError, match=r"`scheduler` is only used with engine='dask'"):
            run_tasks(abs, [1], scheduler="tcp://127.0.0.1:8786")

    def test_bad_workers_function_progress(self):
        with pytest.raises(InputError, match=r"`n_workers` must be >= 1; got 0"):
            run_tasks(abs, [1], n_workers=0)
        with pytest.raises(InputError, match=r"`function` must be callable"):
            run_tasks(42, [1])
        with pytest.raises(InputError, match=r"`progress` must be a callable"):
            run_tasks(abs, [1], progress="bar")
        with pytest.raises(InputError, match=r"`tasks` must be a sequence"):
            run_tasks(abs, 5)

    def test_unreachable_scheduler(self, monkeypatch):
        pytest.importorskip("distributed")
        monkeypatch.setattr(engines, "CONNECT_TIMEOUT", "1s")
        with pytest.raises(InputError, match="could not reach the dask scheduler"):
            run_tasks(abs, [1], engine="dask", scheduler="tcp://127.0.0.1:1")


class TestWorkerProcesses:
    @pytest.mark.parametrize("n_workers", [1, 2, 3])
    def test_results_in_task_order(self, n_workers):
        assert run_tasks(slow_square, range(10), engine="processes", n_workers=n_workers) == \
            [t * t for t in range(10)]

    def test_workers_initialised_once_with_one_blas_thread(self):
        status = run_tasks(status_with_scipy, range(12), engine="processes", n_workers=2)
        assert all(s["in_worker"] and s["initialisations"] == 1 for s in status)
        # every BLAS the parent has (numpy's and scipy's) runs one thread in the workers
        assert all(len(s["blas_threads"]) == blas_libraries() for s in status)
        assert all(set(s["blas_threads"]) == {1} for s in status)
        assert {s["pid"] for s in status} <= set(c.pid for c in _pool_processes())
        assert os.getpid() not in {s["pid"] for s in status}
        assert not worker_status()["in_worker"]

    @pytest.mark.parametrize("size", [100, 400_000])   # inline bytes, and a shipped file
    def test_function_shipped_once_per_worker(self, size):
        name = f"array-{size}"
        function = CountedFunction(name, size)
        out = run_tasks(function, range(16), engine="processes", n_workers=2)
        assert [value for _, _, value in out] == [float(t) for t in range(16)]
        assert DUMPS[name] == 1                              # pickled once for the call
        assert {loads for _, loads, _ in out} == {1}         # each worker unpickled it once
        per_worker = Counter(pid for pid, _, _ in out)
        assert sum(per_worker.values()) == 16 and len(per_worker) <= len(_pool_processes())
        assert LOADS[name] == 0                              # never unpickled here
        assert not any(f.endswith(".pickle") for f in _shipped_files())  # file removed

    def test_same_as_threads_for_numpy_work(self):
        rng = np.random.default_rng(7)
        mats = [rng.normal(size=(40, 40)) for _ in range(6)]
        expected = [np.linalg.qr(m)[1] for m in mats]
        for engine in ("local", "processes"):
            out = run_tasks(np.linalg.qr, mats, engine=engine, n_workers=2)
            for (_, r), e in zip(out, expected):
                np.testing.assert_allclose(r, e, rtol=1e-12, atol=1e-12)

    def test_nested_calls_run_inline(self):
        assert run_tasks(nested, [2, 3], engine="processes", n_workers=2) == \
            [[0, 1, True], [0, 1, 4, True]]

    def test_progress_and_errors(self):
        calls = []
        run_tasks(slow_square, range(5), engine="processes", n_workers=2,
                  progress=lambda done, total: calls.append((done, total)))
        assert calls == [(1, 5), (2, 5), (3, 5), (4, 5), (5, 5)]
        with pytest.raises(ZeroDivisionError, match="task 3"):
            run_tasks(fail_on_three, range(8), engine="processes", n_workers=2)
        # the pool survives a failing task
        assert run_tasks(abs, [-4], engine="processes", n_workers=2) == [4]

    def test_unpicklable_function_is_refused(self):
        with pytest.raises(InputError, match=r"must be picklable .* use engine='local'"):
            run_tasks(lambda t: t, [1], engine="processes")

    def test_scheduler_refused(self):
        with pytest.raises(InputError, match=r"only used with engine='dask'; got .* with "
                                             r"engine='processes'"):
            run_tasks(abs, [1], engine="processes", scheduler="tcp://127.0.0.1:8786")


def _pool_processes():
    pool = engines._pool
    return list(pool._processes.values()) if pool is not None else []


def _shipped_files():
    folder = engines._ship_dir
    return os.listdir(folder) if folder and os.path.isdir(folder) else []


class TestDefaultWorkers:
    def test_applies_to_calls_without_a_count(self):
        seen = set()

        def record(task):
            seen.add(threading.get_ident())
            time.sleep(0.005)
            return task

        with default_workers(1):
            assert run_tasks(record, range(6)) == list(range(6))
        assert seen == {threading.get_ident()}     # one worker: the calling thread
        seen.clear()
        with default_workers(1):
            run_tasks(record, range(6), n_workers=3)  # an explicit count wins
        assert len(seen) > 1

    def test_validation(self):
        with pytest.raises(InputError, match=r"`n_workers` must be >= 1; got 0"):
            with default_workers(0):
                pass


class TestTemporaryCluster:
    def test_dask_without_scheduler_starts_and_closes_a_local_cluster(self):
        pytest.importorskip("distributed")
        assert run_tasks(slow_square, range(4), engine="dask", n_workers=1) == [0, 1, 4, 9]

    def test_local_cluster_runs_single_thread_worker_processes(self):
        pytest.importorskip("distributed")
        status = run_tasks(status_with_scipy, range(4), engine="dask", n_workers=2)
        assert os.getpid() not in {s["pid"] for s in status}     # processes, not threads
        assert all(len(s["blas_threads"]) == blas_libraries() for s in status)
        assert all(set(s["blas_threads"]) == {1} for s in status)
        client = engines._dask_own["client"]
        assert all(w["nthreads"] == 1 for w in client.scheduler_info()["workers"].values())
        engines.close_pools()
        assert not engines._dask_own
