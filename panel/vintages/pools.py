"""Where backfill fits run: in this process, on a local process pool, or on a Dask cluster.

Each pool takes :func:`panel.vintages.backfill.fit_vintage` tasks and hands back futures; only the
coordinating process (which holds the store) writes.  No printing, no SQL.

Dask workers must run what the coordinator runs
-----------------------------------------------
A vintage is only reproducible if it was computed by the code and numerical stack the store records
for it, so opening a Dask pool checks the cluster before any fit is submitted: it waits up to
:data:`DASK_CONNECT_TIMEOUT` for at least one worker, then asks every worker, in one ``client.run``
round trip, for its :func:`environment_fingerprint` (riskprem, Python, numpy, scipy and pandas
versions, as recorded in every run's environment columns) and compares each with the coordinator's.
A cluster with no workers, a worker that cannot run riskprem at all, or the first worker (by address)
whose versions differ is refused with a one-line :class:`BackfillError` naming the worker, the package
and both versions; nothing has been written by then.  Workers that join the cluster after the pool
opened are not checked.
"""

from __future__ import annotations

import concurrent.futures as cf
import multiprocessing
import os
import re
import signal
import socket
import threading
import time

import numpy as np

from panel.store.environment import run_environment
from panel.vintages.errors import BackfillError


#: How long to try reaching a Dask scheduler, and then for its first worker, before giving up.
DASK_CONNECT_TIMEOUT = "10s"
#: How long a first plain TCP connection to the scheduler's port may take (an address where nothing
#: listens is refused at once, instead of after Dask's retries).
PROBE_TIMEOUT = 3.0

#: A scheduler address: ``[PROTOCOL://]HOST:PORT`` (Dask's form; tcp when no protocol is given).
_ADDRESS = re.compile(r"^(?:(?P<scheme>tcp|tls|ws|wss)://)?(?P<host>\[[0-9A-Fa-f:.]+\]|[A-Za-z0-9._-]+)"
                      r":(?P<port>\d{1,5})/?$")

#: What must agree between the coordinator and every Dask worker: (name in messages, column of
#: :func:`~panel.store.environment.run_environment`).
FINGERPRINT = (("riskprem", "riskprem_version"), ("Python", "python_version"), ("numpy", "numpy_version"),
               ("scipy", "scipy_version"), ("pandas", "pandas_version"))

#: The fix named by every refused cluster.
_SAME_STACK = "install the same riskprem and libraries on the workers, or run without --scheduler"


#: Seconds between a local worker's checks that its coordinator still lives.
PARENT_POLL = 0.25


def _worker_start(coordinator: int) -> None:
    """Initializer of each local worker process: Ctrl-C is the coordinator's to handle, and the
    worker ends itself when the coordinator is gone (killed, even by SIGKILL, which leaves no chance
    to stop the pool): orphaned fits would otherwise run on for minutes."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    threading.Thread(target=_watch_coordinator, args=(coordinator,), daemon=True,
                     name="riskprem-coordinator-watch").start()


def _watch_coordinator(coordinator: int) -> None:
    # An orphan is re-parented (to init or a subreaper), so its parent id changes.  Portable, unlike
    # Linux's PR_SET_PDEATHSIG, and the check runs while a fit holds the GIL (threads switch).
    while os.getppid() == coordinator:
        time.sleep(PARENT_POLL)
    os._exit(70)


def environment_fingerprint() -> dict[str, str | None]:
    """This process's versions of riskprem, Python, numpy, scipy and pandas (None: not installed),
    keyed by the names of :data:`FINGERPRINT`; the same values a stored run records."""
    environment = run_environment()
    return {name: environment[column] for name, column in FINGERPRINT}


def _worker_fingerprint() -> dict[str, str | None]:
    # What client.run executes on each worker.  Module-level, so it pickles by reference and reports
    # the worker's own installation; a name apart from the coordinator's call, so that replacing the
    # coordinator's fingerprint (as the tests do) never changes what is shipped to the workers.
    return environment_fingerprint()


def _first_line(error: BaseException) -> str:
    return (str(error).strip().splitlines() or [type(error).__name__])[0]


def _check_workers(client, address: str) -> None:
    """Refuse (:class:`BackfillError`) a cluster without workers or with a worker whose
    :func:`environment_fingerprint` differs from this process's."""
    from dask.utils import parse_timedelta

    if not client.nthreads():
        try:
            client.wait_for_workers(1, timeout=parse_timedelta(DASK_CONNECT_TIMEOUT))
        except TimeoutError:
            raise BackfillError(f"the Dask scheduler at {address} has no workers after {DASK_CONNECT_TIMEOUT}; "
                                "start workers for it (dask worker ADDRESS), or run without --scheduler") from None
    ours = environment_fingerprint()
    try:
        theirs = client.run(_worker_fingerprint)
    except Exception as error:  # e.g. a worker without riskprem cannot even unpickle the function
        # Dask relays a worker's error as a plain Exception whose text names the original type.
        detail = _first_line(error) if type(error) is Exception else f"{type(error).__name__}: {_first_line(error)}"
        raise BackfillError(f"the Dask workers of {address} cannot report their environment ({detail}); "
                            f"{_SAME_STACK}") from None
    for worker in sorted(theirs):
        for name, _ in FINGERPRINT:
            if theirs[worker].get(name) != ours[name]:
                raise BackfillError(f"Dask worker {worker} has {name} {theirs[worker].get(name) or 'not installed'}, "
                                    f"this process {name} {ours[name] or 'not installed'} (every vintage must be "
                                    f"computed with the same code and libraries); {_SAME_STACK}")


class _InlinePool:
    """Runs each task at submission, in this process (one worker, no pool)."""

    capacity = 1
    where = "in-process"

    def submit(self, fn, arg):
        future: cf.Future = cf.Future()
        try:
            future.set_result(fn(arg))
        except Exception as error:  # KeyboardInterrupt propagates: the coordinator stops
            future.set_exception(error)
        return future

    def wait_first(self, futures):
        return list(futures)

    def close(self, abort: bool = False) -> None:
        pass


class _ProcessPool:
    """A local ``ProcessPoolExecutor`` (spawned processes: the coordinator holds an open store)."""

    def __init__(self, workers: int):
        self.capacity = workers
        self.where = f"{workers} local processes"
        self.executor = cf.ProcessPoolExecutor(max_workers=workers, initializer=_worker_start,
                                               initargs=(os.getpid(),),
                                               mp_context=multiprocessing.get_context("spawn"))

    def submit(self, fn, arg):
        return self.executor.submit(fn, arg)

    def wait_first(self, futures):
        done, _ = cf.wait(list(futures), return_when=cf.FIRST_COMPLETED)
        return list(done)

    def close(self, abort: bool = False) -> None:
        if not abort:
            self.executor.shutdown(wait=True)
            return
        # Running fits are not interruptible through the executor's API: stop the processes.
        processes = list(getattr(self.executor, "_processes", {}).values())
        self.executor.shutdown(wait=False, cancel_futures=True)
        for process in processes:
            if process.is_alive():
                process.terminate()
        for process in processes:
            process.join(timeout=5)


def scheduler_address(text: str) -> str:
    """``text`` if it has the form of a Dask scheduler address (``tcp://HOST:PORT``, ``tls://``,
    ``ws://``, ``wss://`` or plain ``HOST:PORT``), else a one-line :class:`BackfillError`.  Checked
    before connecting: Dask takes 20 s to give up on a malformed address."""
    found = _ADDRESS.match(str(text).strip())
    if found is None or not 0 < int(found["port"]) < 65536:
        raise BackfillError(f"--scheduler {text!r} is not a scheduler address; give tcp://HOST:PORT (the "
                            "address `dask scheduler` prints, e.g. tcp://10.0.0.5:8786)")
    return str(text).strip()


def _probe(address: str) -> None:
    """Refuse at once a scheduler address whose host is unknown or where nothing listens."""
    found = _ADDRESS.match(address)
    host, port = found["host"].strip("[]"), int(found["port"])
    try:
        socket.create_connection((host, port), timeout=PROBE_TIMEOUT).close()
    except OSError as error:
        reason = error.strerror or (str(error) or type(error).__name__)
        raise BackfillError(f"cannot reach the Dask scheduler at {address} ({reason.lower()}); check the "
                            "address (tcp://HOST:PORT) and that the scheduler runs") from None


class _DaskPool:
    """Fits submitted to an existing Dask distributed scheduler."""

    def __init__(self, address: str, workers: int | None):
        from distributed import Client, as_completed

        address = scheduler_address(address)
        _probe(address)
        try:
            self.client = Client(address, timeout=DASK_CONNECT_TIMEOUT, set_as_default=False)
        except (OSError, TimeoutError, ValueError) as error:
            raise BackfillError(f"cannot reach the Dask scheduler at {address}: {_first_line(error)}; check the "
                                "address (tcp://HOST:PORT) and that the scheduler runs") from None
        try:
            _check_workers(self.client, address)
        except BaseException:  # refused (or Ctrl-C while waiting): leave no client behind
            self.client.close()
            raise
        threads = sum(self.client.nthreads().values())
        self.capacity = max(1, workers or threads)
        self.where = f"Dask scheduler {address} ({threads} worker threads)"
        self.submitted: list = []
        self.finished = as_completed(loop=self.client.loop)

    def submit(self, fn, arg):
        future = self.client.submit(fn, arg, pure=False)
        self.submitted.append(future)
        self.finished.add(future)
        return future

    def wait_first(self, futures):
        first = next(self.finished)            # blocks until one is done
        return [first, *self.finished.next_batch(block=False)]

    def close(self, abort: bool = False) -> None:
        if abort:
            self.client.cancel([f for f in self.submitted if not f.done()])
        self.client.close()


def open_pool(workers: int | None, scheduler: str | None, n_tasks: int = 1):
    """The pool for ``workers`` local processes (1: in this process) or for the Dask scheduler at
    ``scheduler``; with nothing to do (``n_tasks == 0``) no pool is started."""
    if workers is not None and (not isinstance(workers, (int, np.integer)) or isinstance(workers, bool)
                                or workers < 1):
        raise BackfillError(f"workers must be a whole number >= 1, got {workers!r}")
    if n_tasks == 0:
        return _InlinePool()
    if scheduler:
        return _DaskPool(str(scheduler), workers)
    if (workers or 1) == 1:
        return _InlinePool()
    return _ProcessPool(int(workers))


def default_workers() -> int:
    """Local worker processes by default: the CPUs this process may use."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # not on Linux
        return max(1, os.cpu_count() or 1)


