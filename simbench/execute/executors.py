"""Where tasks run: in this process, in local worker processes, or on a Dask cluster.

A task is a small picklable object and a module-level function that turns it into a result;
what runs it is a separate, swappable piece with one method::

    with open_executor(workers=2) as executor:
        for task, result in executor.map_unordered(function, tasks):
            ...    # results arrive as tasks finish, in any order

Results must not depend on which executor ran a task: a task draws its random numbers from
its own identity (:func:`simbench.measure.noise.rng_for`), never from the order of execution
or the worker. Three executors:

- :class:`InProcess` (the default): the tasks one after another in this process, with
  numba's usual threads.
- ``workers=N``: a Dask ``LocalCluster`` of N processes, one task at a time each, started for
  the command and stopped after it. Each worker runs numba on ``cores // N`` threads (set
  before numba starts, through the worker's environment), so N workers do not fight over the
  cores. A task whose worker dies (killed, out of memory) is run once more on another worker
  (the scheduler's ``allowed-failures`` is 1); a second death stops the command.
- ``scheduler=ADDRESS``: a running Dask scheduler (``tcp://host:8786``); its workers must see
  the output folder at the same path (a shared file system). An address that does not answer
  within :data:`CONNECT_TIMEOUT_S` seconds is one line of error. The cluster's own settings
  (threads, retries after a worker's death) apply.

A task's exception reaches the caller unchanged (a bad-input error keeps its one line).

Dask is the engine: this module only starts or connects to it and turns its failures into
one-line messages.
"""

from __future__ import annotations

import contextlib
import os
import re
from typing import Any, Callable, Iterable, Iterator

from simbench.errors import InputError, Where

#: seconds to wait for a scheduler to answer
CONNECT_TIMEOUT_S = 10.0
#: seconds to wait for a connected cluster to have at least one worker
WORKER_WAIT_S = 60.0
#: the most local worker processes ``--workers`` starts
MAX_LOCAL_WORKERS = 256
#: resident memory of one idle local worker (Python, numba, simbench and Dask imported);
#: measured at 230-300 MiB on Linux, numba 0.68, with a small 2-D task
WORKER_BASE_BYTES = 256 * 2**20

_ADDRESS = re.compile(r"^(tcp|tls|inproc|ucx|ws|wss)://[^\s/]+$")
_SCHEDULER_VALID = "the address of a running Dask scheduler, such as tcp://host:8786"


class InProcess:
    """Run the tasks one after another in this process."""

    description = "in this process"
    workers = 1

    def map_unordered(self, function: Callable, tasks: Iterable, *, label: Callable = str
                      ) -> Iterator[tuple[Any, Any]]:
        """Yield ``(task, function(task))`` for every task.

        Parameters
        ----------
        function : callable
            A module-level function of one task.
        tasks : iterable
        label : callable
            Names a task in messages (unused here).
        """
        for task in tasks:
            yield task, function(task)

    def close(self) -> None:
        """Nothing to release."""

    def __enter__(self) -> "InProcess":
        return self

    def __exit__(self, *exc) -> None:
        self.close()


class DaskExecutor:
    """Run tasks on a Dask ``distributed`` client (a local cluster or a remote scheduler).

    Parameters
    ----------
    client : distributed.Client
    cluster : distributed.LocalCluster, optional
        A cluster started for this executor, closed with it.
    description : str
        For messages (``"on 2 local worker processes"``).
    """

    def __init__(self, client, cluster=None, description: str = "on a Dask cluster"):
        self.client, self.cluster, self.description = client, cluster, description
        self.workers = max(1, len(client.scheduler_info().get("workers", {})))

    def map_unordered(self, function: Callable, tasks: Iterable, *, label: Callable = str
                      ) -> Iterator[tuple[Any, Any]]:
        """Submit every task; yield ``(task, result)`` as each finishes.

        A task's exception is raised here unchanged (the rest are cancelled); a task whose
        worker died each time it was tried is one line naming it (``label(task)``).
        """
        from distributed import as_completed
        from distributed.scheduler import KilledWorker

        futures = {}
        for task in tasks:
            future = self.client.submit(_call, function, task, pure=False)
            futures[future] = task
        try:
            for future in as_completed(list(futures)):
                task = futures[future]
                try:
                    result = future.result()
                except KilledWorker:
                    raise InputError(Where(label(task)), "the worker running this task died "
                                     "each time it was tried (killed, or out of memory); "
                                     "finished work is kept", "run the command again to "
                                     "resume, with fewer --workers or a smaller "
                                     "--memory-budget") from None
                yield task, result
                future.release()
        finally:
            pending = [f for f in futures if not f.done()]
            if pending:
                self.client.cancel(pending)

    def close(self) -> None:
        """Disconnect, and stop the cluster if this executor started it."""
        with contextlib.suppress(Exception):
            self.client.close()
        if self.cluster is not None:
            with contextlib.suppress(Exception):
                self.cluster.close()

    def __enter__(self) -> "DaskExecutor":
        return self

    def __exit__(self, *exc) -> None:
        self.close()


class _TaskInputError(InputError):
    """An :class:`InputError` that survives pickling on its way back from a worker."""

    def __reduce__(self):
        return (_TaskInputError, (self.where, self.problem, self.valid))


def _call(function: Callable, task: Any) -> Any:
    """Run one task on a worker; a bad-input error comes back as the same one line."""
    try:
        return function(task)
    except InputError as error:
        raise _TaskInputError(error.where, error.problem, error.valid) from None


def _distributed(option: str):
    """The ``distributed`` package, or one line saying how to install it."""
    try:
        import distributed
    except ImportError:
        raise InputError(Where("<command line>", field=option), f"{option} needs Dask "
                         "distributed, which is not installed", "pip install 'dask[distributed]', "
                         "or leave the option out to run in this process") from None
    return distributed


def local_processes(n_workers: int, threads: int | None = None) -> DaskExecutor:
    """A Dask ``LocalCluster`` of ``n_workers`` processes with one task slot each.

    Parameters
    ----------
    n_workers : int
    threads : int, optional
        numba threads of each worker (default ``max(1, cores // n_workers)``).

    Notes
    -----
    A task whose worker dies is run once more (``distributed.scheduler.allowed-failures``
    is 1 on this cluster); a second death is one line of error.
    """
    import logging

    import dask

    _distributed("--workers")
    from distributed import Client, LocalCluster

    where = Where("<command line>", field="--workers")
    if not 1 <= n_workers <= MAX_LOCAL_WORKERS:
        raise InputError(where, f"{n_workers} worker processes", f"1 to {MAX_LOCAL_WORKERS}")
    from simbench.budget import check_bytes
    from simbench.errors import warn_input

    check_bytes(n_workers * WORKER_BASE_BYTES, where, f"{n_workers} worker processes (about "
                f"{WORKER_BASE_BYTES / 2**20:.0f} MiB each for Python, numba and simbench, "
                "before any task)", "fewer --workers")
    cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count()
    if cores and n_workers > cores:
        warn_input(where, f"{n_workers} worker processes on {cores} CPUs share them and run no "
                   f"faster than {cores} (the results are the same bits either way)")
    threads = threads or max(1, (cores or 1) // n_workers)
    environment = {"NUMBA_NUM_THREADS": str(threads), "OMP_NUM_THREADS": "1"}
    with dask.config.set({"distributed.scheduler.allowed-failures": 1}):
        cluster = LocalCluster(n_workers=n_workers, threads_per_worker=1, processes=True,
                               dashboard_address=":0", silence_logs=logging.ERROR,
                               env=environment)
        client = Client(cluster)
    return DaskExecutor(client, cluster, f"on {n_workers} local worker process"
                        f"{'es' if n_workers > 1 else ''} ({threads} numba thread"
                        f"{'s' if threads > 1 else ''} each)")


def connect(address: str, timeout_s: float = CONNECT_TIMEOUT_S) -> DaskExecutor:
    """Connect to a running Dask scheduler; one line of error if it does not answer.

    Parameters
    ----------
    address : str
        ``tcp://host:port`` (or another Dask protocol).
    timeout_s : float
        Seconds to wait for the scheduler.
    """
    where = Where("<command line>", field="--scheduler")
    if not _ADDRESS.match(address or ""):
        raise InputError(where, f"'{address}' is not a scheduler address", _SCHEDULER_VALID)
    import logging

    _distributed("--scheduler")
    from distributed import Client

    logging.getLogger("distributed").setLevel(logging.CRITICAL)
    try:
        client = Client(address, timeout=f"{timeout_s:g}s")
    except MemoryError:  # a server that is not Dask's: its first bytes read as a frame size
        raise InputError(where, f"the server at {address} is not a Dask scheduler (its reply "
                         "is not the Dask protocol)", _SCHEDULER_VALID) from None
    except Exception as exc:  # noqa: BLE001 - whatever fails on the way, the address is unusable
        reason = " ".join(str(exc).split())[:160] or type(exc).__name__
        raise InputError(where, f"no Dask scheduler answered at {address} within "
                         f"{timeout_s:g} s ({reason})", _SCHEDULER_VALID) from None
    try:
        client.wait_for_workers(1, timeout=WORKER_WAIT_S)
    except (OSError, TimeoutError):
        client.close()
        raise InputError(where, f"the scheduler at {address} has no workers after "
                         f"{WORKER_WAIT_S:g} s", "a scheduler with workers started") from None
    return DaskExecutor(client, None, f"on the Dask cluster at {address}")


def open_executor(workers: int | None = None, scheduler: str | None = None):
    """The executor the command line asks for: ``--scheduler``, else ``--workers``, else
    in this process.

    Parameters
    ----------
    workers : int, optional
        Local worker processes (``--workers``); None or 0: in this process.
    scheduler : str, optional
        Address of a running Dask scheduler (``--scheduler``).

    Returns
    -------
    InProcess or DaskExecutor
        A context manager; leaving it stops what it started.
    """
    if scheduler is not None and workers:
        raise InputError(Where("<command line>", field="--scheduler"),
                         "--scheduler and --workers cannot be used together",
                         "--workers N for local processes, or --scheduler ADDRESS for a cluster")
    if scheduler is not None:
        return connect(scheduler)
    if workers:
        return local_processes(int(workers))
    return InProcess()
