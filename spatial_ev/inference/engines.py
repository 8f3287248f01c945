"""Where independent batches of work run: locally (sequential or threads) or on dask.distributed.

The statistics modules cut their work into independent tasks (e.g. blocks of permutations that
derive their random numbers from the seed and the block number) and hand them to
:func:`run_tasks`. Results come back in task order, so the outcome does not depend on the engine,
the number of workers or the order in which tasks finish.
"""

from __future__ import annotations

import os
import threading
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import ThreadPoolExecutor, as_completed
from contextlib import contextmanager
from typing import Any, TypeVar

from threadpoolctl import threadpool_limits

from spatial_ev._compat import import_distributed
from spatial_ev._validation import check_int, check_option
from spatial_ev.errors import InputError

__all__ = ["run_tasks", "ENGINES"]

ENGINES = ("local", "dask")
CONNECT_TIMEOUT = "20s"  # how long to wait for a remote dask scheduler

T = TypeVar("T")
R = TypeVar("R")
Progress = Callable[[int, int], Any]


def _check_run(function, tasks, engine, scheduler, n_workers, progress):
    if not callable(function):
        raise InputError(f"parameter `function` must be callable; got {type(function).__name__}")
    try:
        tasks = list(tasks)
    except TypeError:
        raise InputError(f"parameter `tasks` must be a sequence of task descriptions; got "
                         f"{type(tasks).__name__}") from None
    engine = check_option("engine", engine, ENGINES)
    if n_workers is not None:
        n_workers = check_int("n_workers", n_workers, low=1)
    if progress is not None and not callable(progress):
        raise InputError("parameter `progress` must be a callable progress(done, total) or None; "
                         f"got {type(progress).__name__}")
    if engine == "local" and scheduler is not None:
        raise InputError("parameter `scheduler` is only used with engine='dask'; got "
                         f"{scheduler!r} with engine='local'")
    if scheduler is not None and not isinstance(scheduler, str) \
            and type(scheduler).__name__ != "Client":
        raise InputError("parameter `scheduler` must be a scheduler address such as "
                         f"'tcp://10.0.0.5:8786' or a dask.distributed Client; got {scheduler!r}")
    return tasks, engine, n_workers


_BLAS_LOCK = threading.Lock()
_blas_users = 0
_blas_limiter = None


@contextmanager
def one_blas_thread() -> Iterator[None]:
    """Limit BLAS to one thread while any local pool runs (reference counted, so that
    overlapping pools started from different threads restore the original setting once)."""
    global _blas_users, _blas_limiter
    with _BLAS_LOCK:
        if _blas_users == 0:
            _blas_limiter = threadpool_limits(limits=1, user_api="blas")
        _blas_users += 1
    try:
        yield
    finally:
        with _BLAS_LOCK:
            _blas_users -= 1
            if _blas_users == 0:
                _blas_limiter.restore_original_limits()
                _blas_limiter = None


def _run_local(function, tasks, n_workers, report):
    threads = min(n_workers or os.cpu_count() or 1, len(tasks))
    if threads <= 1:
        results = []
        for task in tasks:
            results.append(function(task))
            report()
        return results
    results: list = [None] * len(tasks)
    # one BLAS thread per task thread: the threads already fill the cores, and BLAS threads on
    # top of them would compete for the same cores (measured: slower, and much noisier)
    with one_blas_thread(), ThreadPoolExecutor(max_workers=threads) as pool:
        futures = {pool.submit(function, task): i for i, task in enumerate(tasks)}
        for future in as_completed(futures):
            results[futures[future]] = future.result()
            report()
    return results


def _call(function, task):
    return function(task)


def _run_dask(function, tasks, scheduler, n_workers, report):
    distributed = import_distributed()
    own_cluster = own_client = None
    try:
        if scheduler is None:
            own_cluster = distributed.LocalCluster(
                n_workers=n_workers or min(4, os.cpu_count() or 1), threads_per_worker=1,
                processes=False, dashboard_address=":0")
            client = own_client = distributed.Client(own_cluster)
        elif isinstance(scheduler, str):
            try:
                client = own_client = distributed.Client(scheduler, timeout=CONNECT_TIMEOUT)
            except (OSError, TimeoutError) as exc:
                raise InputError(f"could not reach the dask scheduler at {scheduler!r} ({exc}); "
                                 "check the address or use engine='local'") from None
        else:
            client = scheduler
        # ship the function (and the arrays it holds) once per worker, not once per task
        shared = client.scatter(function, broadcast=True, hash=False)
        futures = client.map(_call, [shared] * len(tasks), tasks, pure=False)
        position = {f.key: i for i, f in enumerate(futures)}
        results: list = [None] * len(tasks)
        for future in distributed.as_completed(futures):
            results[position[future.key]] = future.result()
            report()
        return results
    finally:
        if own_client is not None:
            own_client.close()
        if own_cluster is not None:
            own_cluster.close()


def run_tasks(function: Callable[[T], R], tasks: Sequence[T], *, engine: str = "local",
              scheduler: Any = None, n_workers: int | None = None,
              progress: Progress | None = None) -> list[R]:
    """Apply ``function`` to every task and return the results in task order.

    Parameters
    ----------
    function : callable
        ``function(task) -> result``. With ``engine="dask"`` it must be picklable (a top-level
        function or an instance of a top-level class); it is sent to each worker once.
    tasks : sequence
        Task descriptions (small picklable objects, e.g. ``(start, stop)`` ranges).
    engine : {"local", "dask"}
        ``"local"``: in this process, on a pool of ``n_workers`` threads (default: one per
        core; numpy releases the GIL). While the pool runs, BLAS is limited to one thread per
        call (process-wide, restored afterwards), so that task threads and BLAS threads do not
        compete for the cores. ``n_workers=1`` runs the tasks one after the other in the
        calling thread with BLAS untouched. ``"dask"``: on a ``dask.distributed`` cluster,
        given by ``scheduler`` or a temporary in-process LocalCluster.
    scheduler : str or distributed.Client, optional
        Scheduler address (``"tcp://host:8786"``) or an existing Client (reused, not closed).
        Only with ``engine="dask"``; None starts a LocalCluster of ``n_workers`` threads.
    n_workers : int, optional
        Threads of the local pool (default: ``os.cpu_count()``), or workers of the temporary
        LocalCluster (default: up to 4).
    progress : callable, optional
        ``progress(done, total)``, called in the calling thread after each finished task.

    Returns
    -------
    list
        ``[function(task) for task in tasks]``, whatever the engine and completion order.

    Examples
    --------
    >>> run_tasks(abs, [-1, 2, -3])
    [1, 2, 3]
    >>> run_tasks(abs, [-1, 2, -3], n_workers=2)
    [1, 2, 3]
    """
    tasks, engine, n_workers = _check_run(function, tasks, engine, scheduler, n_workers, progress)
    total, done = len(tasks), 0

    def report() -> None:
        nonlocal done
        done += 1
        if progress is not None:
            progress(done, total)

    if not tasks:
        return []
    if engine == "dask":
        return _run_dask(function, tasks, scheduler, n_workers, report)
    return _run_local(function, tasks, n_workers, report)
