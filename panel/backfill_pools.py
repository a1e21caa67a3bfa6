"""Where backfill fits run: in this process, on a local process pool, or on a Dask cluster.

Each pool takes :func:`panel.backfill.fit_vintage` tasks and hands back futures; only the
coordinating process (which holds the store) writes.  No printing, no SQL.
"""

from __future__ import annotations

import concurrent.futures as cf
import multiprocessing
import os
import signal

import numpy as np


#: How long to try reaching a Dask scheduler before giving up.
DASK_CONNECT_TIMEOUT = "10s"


class BackfillError(ValueError):
    """A backfill (or a look-up of one) that cannot be done as asked; the message is one line.
    Import it from :mod:`panel.backfill`."""


def _ignore_sigint() -> None:  # worker processes: Ctrl-C is the coordinator's to handle
    signal.signal(signal.SIGINT, signal.SIG_IGN)


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
        self.executor = cf.ProcessPoolExecutor(max_workers=workers, initializer=_ignore_sigint,
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


class _DaskPool:
    """Fits submitted to an existing Dask distributed scheduler."""

    def __init__(self, address: str, workers: int | None):
        from distributed import Client, as_completed

        try:
            self.client = Client(address, timeout=DASK_CONNECT_TIMEOUT, set_as_default=False)
        except (OSError, TimeoutError, ValueError) as error:
            first = (str(error).strip().splitlines() or [type(error).__name__])[0]
            raise BackfillError(f"cannot reach the Dask scheduler at {address}: {first}; check the "
                                "address (tcp://HOST:PORT) and that the scheduler runs") from None
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


