"""Where independent pieces of work run: this process, a local process pool, or Dask.

``sweep`` sends whole parameter boxes and ``prove`` sends the flow batches of a round
(:meth:`Runner.map`); both check their options with :func:`check_executor` and
open their workers with :func:`local_pool` or :func:`dask_client`. The functions sent
must be importable module-level functions taking and returning picklable data.
"""

from __future__ import annotations

import contextlib
import multiprocessing
import os
import time
import uuid

from certify.errors import UsageError

__all__ = ["EXECUTORS", "MOST_FLOW_WORKERS", "DeadlineReached", "Runner", "check_executor",
           "dask_client", "default_workers", "flow_workers", "local_pool", "open_runner"]

#: Where the work can run.
EXECUTORS = ("local", "dask")
#: Most processes `certify prove` flows on by default (each holds a piece of a round).
MOST_FLOW_WORKERS = 4


class DeadlineReached(Exception):
    """:meth:`Runner.map` was given a deadline and it passed before every task was done."""


def check_executor(executor, scheduler, workers):
    """Raise UsageError for a bad choice of executor, scheduler address or workers.

    Parameters
    ----------
    executor : str
        One of :data:`EXECUTORS`.
    scheduler : str or None
        Address of a running Dask scheduler (dask only).
    workers : int or None
        Processes of a local pool or of a Dask ``LocalCluster`` (not with a scheduler).
    """
    if executor not in EXECUTORS:
        raise UsageError(f"executor must be one of {', '.join(EXECUTORS)}, got {executor!r}")
    if scheduler is not None and executor != "dask":
        raise UsageError("a scheduler address (--scheduler) needs the dask executor (--executor dask)")
    if workers is not None:
        if isinstance(workers, bool) or not isinstance(workers, int) or workers < 1:
            raise UsageError("workers (--workers) must be a whole number of at least 1")
        if scheduler is not None:
            raise UsageError("workers (--workers) applies to a local pool or a LocalCluster; "
                             "a running Dask scheduler brings its own workers")


def default_workers(workers=None):
    """`workers`, or by default one process per core of this machine."""
    return workers or os.cpu_count() or 1


def flow_workers():
    """Processes for the flows of a 3D or 4D proof by default: one per core, at most
    MOST_FLOW_WORKERS; None (the flows run in this process) on a machine of one core."""
    workers = min(default_workers(), MOST_FLOW_WORKERS)
    return workers if workers > 1 else None


def _start_method():
    methods = multiprocessing.get_all_start_methods()
    return "forkserver" if "forkserver" in methods else "spawn"


def local_pool(workers):
    """A process pool of `workers` processes (default: all cores) on this machine.

    Returns
    -------
    concurrent.futures.ProcessPoolExecutor
        Started with ``forkserver`` (else ``spawn``): no state of this process is copied.
    """
    from concurrent.futures import ProcessPoolExecutor

    return ProcessPoolExecutor(max_workers=default_workers(workers),
                               mp_context=multiprocessing.get_context(_start_method()))


@contextlib.contextmanager
def dask_client(scheduler, workers):
    """A Dask client of the scheduler at `scheduler`, or of a loopback ``LocalCluster``.

    Parameters
    ----------
    scheduler : str or None
        Address such as ``tcp://10.0.0.5:8786``; None starts a ``LocalCluster`` on
        127.0.0.1 with `workers` single-threaded processes (default: all cores), closed
        on exit.
    workers : int or None

    Raises
    ------
    UsageError
        When dask.distributed is missing or the scheduler cannot be reached.
    """
    try:
        from distributed import Client, LocalCluster
    except ImportError:
        raise UsageError("the dask executor needs dask.distributed: "
                         "pip install 'dask[distributed]'") from None
    with contextlib.ExitStack() as stack:
        if scheduler is None:
            cluster = stack.enter_context(LocalCluster(
                n_workers=default_workers(workers), threads_per_worker=1, processes=True,
                host="127.0.0.1", dashboard_address=None))
            address = cluster.scheduler_address
        else:
            address = scheduler
        try:
            client = stack.enter_context(Client(address, timeout="20s"))
        except (OSError, TimeoutError, ValueError) as exc:
            raise UsageError(f"cannot reach the Dask scheduler at {address}: {exc}") from None
        yield client


class Runner:
    """Runs a function over argument tuples here, in a process pool, or on Dask.

    Parameters
    ----------
    pool : concurrent.futures.Executor or None
    client : distributed.Client or None
        At most one of the two; with neither the calls run in this process.
    n_workers : int
        Processes that take calls (1 in this process).
    """

    def __init__(self, pool=None, client=None, n_workers=1):
        self.pool = pool
        self.client = client
        self.n_workers = n_workers

    @property
    def parallel(self):
        """bool: the calls run in other processes."""
        return self.pool is not None or self.client is not None

    def map(self, function, tasks, deadline=None):
        """``[function(*args) for args in tasks]``, the results in the order of `tasks`
        (:meth:`in_order`)."""
        return list(self.in_order(function, tasks, deadline))

    def in_order(self, function, tasks, deadline=None):
        """Yield ``function(*args)`` for each of `tasks`, in their order.

        All calls are submitted at once; each result is let go of once yielded, so the
        results held are those finished ahead of the one awaited.

        Parameters
        ----------
        function : callable
            A module-level function (it is pickled by reference).
        tasks : list of tuple
        deadline : float, optional
            A :func:`time.monotonic` time; when it passes before the last result
            arrives, the outstanding calls are cancelled and :class:`DeadlineReached`
            is raised. Calls in this process are not interrupted (the function should
            watch the deadline itself).
        """
        if not self.parallel:
            for args in tasks:
                yield function(*args)
            return
        futures = list(self._submit(function, dict(enumerate(tasks))))
        try:
            for k in range(len(futures)):
                timeout = None if deadline is None else max(deadline - time.monotonic(), 0.0)
                try:
                    result = futures[k].result(timeout=timeout)
                except TimeoutError:
                    raise DeadlineReached from None
                futures[k] = None
                yield result
        finally:
            self._cancel([future for future in futures if future is not None])

    def results(self, function, tasks):
        """Yield ``(key, function(*args))`` for ``tasks = {key: args}`` as they finish.

        Closing the generator early cancels the tasks not yet started.
        """
        if not self.parallel:
            for key, args in tasks.items():
                yield key, function(*args)
            return
        if self.pool is not None:
            from concurrent.futures import as_completed
        else:
            from distributed import as_completed
        futures = self._submit(function, tasks)
        try:
            for future in as_completed(futures):
                yield futures[future], future.result()
        finally:
            self._cancel(futures)

    def _submit(self, function, tasks):
        """Submit ``function(*args)`` for ``tasks = {key: args}``; ``{future: key}`` in
        the order of `tasks`."""
        if self.pool is not None:
            return {self.pool.submit(function, *args): key for key, args in tasks.items()}
        token = uuid.uuid4().hex[:12]
        return {self.client.submit(function, *args, key=f"certify-{token}-{key}",
                                   pure=False): key for key, args in tasks.items()}

    def _cancel(self, futures):
        """Cancel the calls of `futures` not yet finished."""
        if self.pool is not None:
            for future in futures:
                future.cancel()
        else:
            self.client.cancel(list(futures))


@contextlib.contextmanager
def open_runner(executor="local", scheduler=None, workers=None, *, pooled=False,
                at_most=None):
    """A :class:`Runner` for the options of ``--executor``, ``--scheduler``, ``--workers``.

    ``local`` without `workers` runs in this process (with ``pooled``, a process pool of
    all cores); ``local`` with `workers` opens a process pool of that many processes;
    ``dask`` opens :func:`dask_client`. Pools and clusters opened here are closed on
    exit, and hold at most `at_most` processes when that is given (e.g. the number of
    tasks; a running scheduler keeps its own workers).

    Raises
    ------
    UsageError
        For a bad combination (:func:`check_executor`) or an unreachable scheduler.
    """
    check_executor(executor, scheduler, workers)
    if at_most is not None and scheduler is None:
        workers = min(default_workers(workers), at_most)
    if executor == "dask":
        with dask_client(scheduler, workers) as client:
            threads = sum(w.get("nthreads", 1)
                          for w in client.scheduler_info()["workers"].values())
            yield Runner(client=client, n_workers=max(threads, 1))
    elif workers is not None or pooled:
        n = default_workers(workers)
        pool = local_pool(n)
        try:
            yield Runner(pool=pool, n_workers=n)
        finally:
            pool.shutdown(wait=True, cancel_futures=True)
    else:
        yield Runner()

