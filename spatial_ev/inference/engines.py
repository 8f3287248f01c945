"""Where independent batches of work run: in this process (sequential or threads), on local
worker processes, or on dask.distributed.

The statistics modules cut their work into independent tasks (e.g. blocks of permutations that
derive their random numbers from the seed and the block number, or one weighting scheme each)
and hand them to :func:`run_tasks`. Results come back in task order, so the outcome does not
depend on the engine, the number of workers or the order in which tasks finish.

Engines (:data:`ENGINES`):

``"local"``
    Threads of this process (numpy releases the GIL in its kernels), BLAS limited to one thread
    per task while the pool runs.
``"processes"``
    A pool of local worker processes (started by ``forkserver`` where the platform has it,
    otherwise ``spawn``; never ``fork``, which is unsafe with threaded BLAS), each limited to
    one BLAS thread by its initializer. The pool is kept between calls, so its start-up cost is
    paid once per session. The function (with the arrays it holds) is pickled once per call and
    loaded once per worker: small functions travel with the tasks and are unpickled only by the
    first task a worker runs (a per-worker cache keyed by a token), large ones are written once
    to a temporary file that each worker reads once. Worker processes import the main module
    of the program, so a script that uses this engine must start its work under
    ``if __name__ == "__main__":`` (the ``spatial-ev`` command does).
``"dask"``
    A ``dask.distributed`` cluster: a scheduler address, an existing Client, or a LocalCluster
    of single-thread worker processes kept for the session. The function is scattered once to
    every worker (``broadcast=True``); each worker process is limited to one BLAS thread.

Tasks that run inside a worker (a pool thread, a worker process or a dask worker) and call
:func:`run_tasks` again run their inner tasks one after the other in that worker: the cores are
already busy. Tasks run one after the other in the calling thread (``n_workers=1``) are not
workers: their inner calls may use a pool.
"""

from __future__ import annotations

import atexit
import contextvars
import multiprocessing
import os
import pickle
import shutil
import tempfile
import threading
import uuid
from collections import OrderedDict
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, ThreadPoolExecutor, \
    as_completed, wait
from contextlib import contextmanager
from typing import Any, TypeVar

from threadpoolctl import threadpool_info, threadpool_limits

from spatial_ev._compat import import_distributed
from spatial_ev._validation import check_int, check_option
from spatial_ev.errors import InputError

__all__ = ["run_tasks", "ENGINES", "one_blas_thread", "worker_status", "close_pools",
           "default_workers"]

ENGINES = ("local", "processes", "dask")
CONNECT_TIMEOUT = "20s"  # how long to wait for a remote dask scheduler
INLINE_LIMIT = 1 << 20   # functions pickled to at most this many bytes travel with the tasks
CACHE_SIZE = 4           # functions a worker process keeps between calls

T = TypeVar("T")
R = TypeVar("R")
Progress = Callable[[int, int], Any]


_DEFAULT_WORKERS: contextvars.ContextVar = contextvars.ContextVar("n_workers", default=None)


@contextmanager
def default_workers(n_workers: int | None) -> Iterator[None]:
    """Worker count of every :func:`run_tasks` call made in this context without its own.

    A whole analysis passes its ``n_workers`` once this way instead of through every test
    function it calls; None keeps each engine's default.

    Parameters
    ----------
    n_workers : int or None
        ≥ 1, or None.

    Examples
    --------
    >>> with default_workers(1):
    ...     run_tasks(abs, [-1, -2], engine="processes")  # doctest: +SKIP
    [1, 2]
    """
    if n_workers is not None:
        n_workers = check_int("n_workers", n_workers, low=1)
    token = _DEFAULT_WORKERS.set(n_workers)
    try:
        yield
    finally:
        _DEFAULT_WORKERS.reset(token)


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
    else:
        n_workers = _DEFAULT_WORKERS.get()
    if progress is not None and not callable(progress):
        raise InputError("parameter `progress` must be a callable progress(done, total) or None; "
                         f"got {type(progress).__name__}")
    if engine != "dask" and scheduler is not None:
        raise InputError(f"parameter `scheduler` is only used with engine='dask'; got "
                         f"{scheduler!r} with engine={engine!r}")
    if scheduler is not None and not isinstance(scheduler, str) \
            and type(scheduler).__name__ != "Client":
        raise InputError("parameter `scheduler` must be a scheduler address such as "
                         f"'tcp://10.0.0.5:8786' or a dask.distributed Client; got {scheduler!r}")
    return tasks, engine, n_workers


# ----------------------------------------------------------------------------------------------
# BLAS threads
# ----------------------------------------------------------------------------------------------

_BLAS_LOCK = threading.Lock()
_blas_users = 0
_blas_limiter = None


@contextmanager
def one_blas_thread() -> Iterator[None]:
    """Limit BLAS to one thread while the block runs.

    Reference counted, so that overlapping pools started from different threads restore the
    original setting once, when the last of them ends.

    Examples
    --------
    >>> with one_blas_thread():
    ...     pass
    """
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


# ----------------------------------------------------------------------------------------------
# worker side (local worker processes and dask worker processes)
# ----------------------------------------------------------------------------------------------

_in_worker = False          # this process is one of our local worker processes
_initialisations = 0        # calls of the worker initializer in this process
_loads = 0                  # functions unpickled by this process for the process engine
_worker_limiter = None      # keeps this worker process at one BLAS thread
_cache: OrderedDict = OrderedDict()
_cache_lock = threading.Lock()


def _one_blas_thread_for_good():
    """Keep this (worker) process at one BLAS thread: for the libraries loaded now (scipy's
    own BLAS is loaded first, so that it is among them) and, through the environment, for any
    loaded later."""
    for name in ("OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "OMP_NUM_THREADS",
                 "BLIS_NUM_THREADS"):
        os.environ[name] = "1"
    try:
        import scipy.linalg  # noqa: F401  (scipy may carry a BLAS of its own)
    except ImportError:  # pragma: no cover - scipy is a dependency
        pass
    return threadpool_limits(limits=1, user_api="blas")


def _initialise_worker() -> None:
    """Initializer of a local worker process: one BLAS thread, nested pools run inline."""
    global _in_worker, _initialisations, _worker_limiter
    _in_worker = True
    _initialisations += 1
    _worker_limiter = _one_blas_thread_for_good()


def _cached_function(token: str, payload: bytes | None, path: str | None) -> Callable:
    """The function of call ``token``: from this worker's cache, else unpickled once."""
    global _loads
    with _cache_lock:
        function = _cache.get(token)
        if function is not None:
            _cache.move_to_end(token)
            return function
        if payload is None:
            with open(path, "rb") as handle:
                payload = handle.read()
        function = pickle.loads(payload)
        _loads += 1
        _cache[token] = function
        while len(_cache) > CACHE_SIZE:
            _cache.popitem(last=False)
        return function


_task_state = threading.local()


def _inside_task() -> bool:
    """Whether the calling thread runs a task of a pool (threads, processes or dask)."""
    return _in_worker or getattr(_task_state, "depth", 0) > 0


def _as_task(function, task):
    _task_state.depth = getattr(_task_state, "depth", 0) + 1
    try:
        return function(task)
    finally:
        _task_state.depth -= 1


def _process_call(token: str, payload: bytes | None, path: str | None, task: Any) -> Any:
    return _as_task(_cached_function(token, payload, path), task)


def worker_status(task: Any = None) -> dict:
    """State of the calling process as an engine worker (for diagnostics and tests).

    Parameters
    ----------
    task : any, optional
        Ignored; lets :func:`run_tasks` call this function in its workers.

    Returns
    -------
    dict
        ``pid``; ``in_worker`` (a local worker process); ``initialisations`` (calls of the
        worker initializer, 1 in a worker); ``functions_loaded`` (functions unpickled for the
        process engine); ``blas_threads`` (threads of each BLAS library loaded).

    Examples
    --------
    >>> worker_status()["in_worker"]
    False
    >>> run_tasks(worker_status, [0], engine="processes", n_workers=1)[0]["in_worker"]
    True
    """
    return {"pid": os.getpid(), "in_worker": _in_worker, "initialisations": _initialisations,
            "functions_loaded": _loads,
            "blas_threads": [i["num_threads"] for i in threadpool_info()
                             if i["user_api"] == "blas"]}


_dask_limited = False


def _call(function, task):
    """A task on a dask worker, with one BLAS thread: a worker in its own process is limited
    once; a worker thread of an in-process cluster limits this process while tasks run (as the
    local thread pool does)."""
    global _dask_limited, _worker_limiter
    if multiprocessing.parent_process() is None:           # an in-process cluster
        with one_blas_thread():
            return _as_task(function, task)
    if not _dask_limited:
        _dask_limited = True
        _worker_limiter = _one_blas_thread_for_good()
    return _as_task(function, task)


# ----------------------------------------------------------------------------------------------
# parent side
# ----------------------------------------------------------------------------------------------

def _sequential(function, tasks, report):
    results = []
    for task in tasks:
        results.append(function(task))
        report()
    return results


def _run_local(function, tasks, n_workers, report):
    inside = _inside_task()
    threads = min(n_workers or (1 if inside else os.cpu_count() or 1), len(tasks))
    if threads <= 1 or inside:
        return _sequential(function, tasks, report)
    results: list = [None] * len(tasks)
    # one BLAS thread per task thread: the threads already fill the cores, and BLAS threads on
    # top of them would compete for the same cores (measured: slower, and much noisier)
    with one_blas_thread(), ThreadPoolExecutor(max_workers=threads) as pool:
        futures = {pool.submit(_as_task, function, task): i for i, task in enumerate(tasks)}
        for future in as_completed(futures):
            results[futures[future]] = future.result()
            report()
    return results


_POOL_LOCK = threading.Lock()
_pool: ProcessPoolExecutor | None = None
_pool_size = 0
_ship_dir: str | None = None


def _context():
    methods = multiprocessing.get_all_start_methods()
    context = multiprocessing.get_context("forkserver" if "forkserver" in methods else "spawn")
    if context.get_start_method() == "forkserver":
        # forked from a server that has already imported numpy and this module
        context.set_forkserver_preload(["spatial_ev.inference.engines"])
    return context


def _process_pool(workers: int) -> ProcessPoolExecutor:
    """The session's pool, with at least ``workers`` processes (it grows, never shrinks, so
    that calls asking for different counts do not restart it; a call uses at most its own
    count of workers at a time)."""
    global _pool, _pool_size
    with _POOL_LOCK:
        if _pool is not None and (_pool_size < workers or getattr(_pool, "_broken", False)):
            workers = max(workers, _pool_size)
            _pool.shutdown(wait=True, cancel_futures=True)
            _pool = None
        if _pool is None:
            _pool = ProcessPoolExecutor(max_workers=workers, mp_context=_context(),
                                        initializer=_initialise_worker)
            _pool_size = workers
        return _pool


def _ship(function) -> tuple[str, bytes | None, str | None]:
    """Pickle ``function`` once: inline bytes when small, else a temporary file."""
    global _ship_dir
    try:
        payload = pickle.dumps(function, protocol=pickle.HIGHEST_PROTOCOL)
    except (pickle.PicklingError, AttributeError, TypeError) as exc:
        raise InputError(f"with engine='processes' the task function must be picklable (a "
                         f"top-level function or an instance of a top-level class); "
                         f"{type(function).__name__} is not ({exc}); use engine='local'") \
            from None
    token = uuid.uuid4().hex
    if len(payload) <= INLINE_LIMIT:
        return token, payload, None
    with _POOL_LOCK:
        if _ship_dir is None:
            _ship_dir = tempfile.mkdtemp(prefix="spatial_ev-tasks-")
    path = os.path.join(_ship_dir, f"{token}.pickle")
    with open(path, "wb") as handle:
        handle.write(payload)
    return token, None, path


def _run_processes(function, tasks, n_workers, report):
    if _inside_task():
        return _sequential(function, tasks, report)
    workers = n_workers or os.cpu_count() or 1
    token, payload, path = _ship(function)
    results: list = [None] * len(tasks)
    running: dict = {}
    try:
        pool = _process_pool(workers)
        pending = iter(enumerate(tasks))

        def submit_next() -> None:
            for i, task in pending:
                running[pool.submit(_process_call, token, payload, path, task)] = i
                return

        try:
            for _ in range(workers):        # at most `workers` tasks at a time
                submit_next()
            while running:
                finished, _ = wait(list(running), return_when=FIRST_COMPLETED)
                for future in finished:
                    results[running.pop(future)] = future.result()
                    report()
                    submit_next()
        except BaseException:
            for future in running:
                future.cancel()
            wait(list(running))     # none still reads the shipped file when it is removed
            raise
        return results
    finally:
        if path is not None:
            try:
                os.remove(path)
            except OSError:
                pass


_DASK_LOCK = threading.Lock()
_dask_own: dict = {}


def _own_dask_client(distributed, n_workers):
    """A LocalCluster of single-thread worker processes, kept for the session."""
    workers = n_workers or min(4, os.cpu_count() or 1)
    with _DASK_LOCK:
        old = _dask_own.get("workers")
        if old is not None and (old != workers or _dask_own["client"].status != "running"):
            _close_dask()
        if not _dask_own:
            cluster = distributed.LocalCluster(n_workers=workers, threads_per_worker=1,
                                               processes=True, dashboard_address=":0")
            _dask_own.update(cluster=cluster, client=distributed.Client(cluster),
                             workers=workers)
        return _dask_own["client"]


def _close_dask() -> None:
    client, cluster = _dask_own.pop("client", None), _dask_own.pop("cluster", None)
    _dask_own.clear()
    if client is not None:
        client.close()
    if cluster is not None:
        cluster.close()


def close_pools() -> None:
    """Stop the worker processes the engines keep between calls (the process pool and the
    temporary dask cluster); the next call starts them again. Also runs at exit.

    Examples
    --------
    >>> close_pools()
    """
    global _pool, _ship_dir
    with _POOL_LOCK:
        if _pool is not None:
            _pool.shutdown(wait=True, cancel_futures=True)
            _pool = None
        if _ship_dir is not None:
            shutil.rmtree(_ship_dir, ignore_errors=True)
            _ship_dir = None
    with _DASK_LOCK:
        _close_dask()


atexit.register(close_pools)


def _run_dask(function, tasks, scheduler, n_workers, report):
    distributed = import_distributed()
    own_client = None
    try:
        if scheduler is None:
            client = _own_dask_client(distributed, n_workers)
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


def run_tasks(function: Callable[[T], R], tasks: Sequence[T], *, engine: str = "local",
              scheduler: Any = None, n_workers: int | None = None,
              progress: Progress | None = None) -> list[R]:
    """Apply ``function`` to every task and return the results in task order.

    Parameters
    ----------
    function : callable
        ``function(task) -> result``. With ``engine="processes"`` or ``"dask"`` it must be
        picklable (a top-level function or an instance of a top-level class); it is sent to
        each worker once per call, however many tasks the worker runs.
    tasks : sequence
        Task descriptions (small picklable objects, e.g. ``(start, stop)`` ranges).
    engine : {"local", "processes", "dask"}
        ``"local"``: in this process, on a pool of ``n_workers`` threads (default: one per
        core; numpy releases the GIL). While the pool runs, BLAS is limited to one thread per
        call (process-wide, restored afterwards), so that task threads and BLAS threads do not
        compete for the cores. ``n_workers=1`` runs the tasks one after the other in the
        calling thread with BLAS untouched. ``"processes"``: on ``n_workers`` local worker
        processes (default: one per core) with one BLAS thread each, kept between calls.
        ``"dask"``: on a ``dask.distributed`` cluster, given by ``scheduler`` or a LocalCluster
        of single-thread worker processes kept between calls.
    scheduler : str or distributed.Client, optional
        Scheduler address (``"tcp://host:8786"``) or an existing Client (reused, not closed).
        Only with ``engine="dask"``.
    n_workers : int, optional
        Threads of the local pool (default: ``os.cpu_count()``), worker processes (default:
        ``os.cpu_count()``), or workers of the temporary LocalCluster (default: up to 4).
        Inside a task of a pool (thread, worker process or dask worker), nested calls run
        their tasks one after the other. None takes the count of an enclosing
        :func:`default_workers`, if any.
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
    >>> run_tasks(abs, [-1, 2, -3], engine="processes", n_workers=2)  # doctest: +SKIP
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
    if engine == "processes":
        return _run_processes(function, tasks, n_workers, report)
    return _run_local(function, tasks, n_workers, report)
