"""Tests of spatial_ev.inference.engines: task order, progress, thread pool and dask.distributed."""

from __future__ import annotations

import threading
import time

import pytest

from spatial_ev.inference import engines
from spatial_ev.inference.engines import run_tasks
from spatial_ev.errors import InputError


def slow_square(task: int) -> int:
    # later tasks finish first, so completion order differs from task order
    time.sleep(0.002 * (10 - task))
    return task * task


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


class TestTemporaryCluster:
    def test_dask_without_scheduler_starts_and_closes_a_local_cluster(self):
        pytest.importorskip("distributed")
        assert run_tasks(slow_square, range(4), engine="dask", n_workers=1) == [0, 1, 4, 9]
