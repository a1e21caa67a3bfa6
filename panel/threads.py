"""BLAS threads around riskprem's own kernels.

riskprem's matrices are small (N x N per date): a multi-threaded BLAS spends more time waking its
threads than computing (measured up to 30x slower on a 2-core machine).  :func:`blas_limited` wraps
the estimator's entry points (``fit``, ``evaluate``, cross-sections) in a ``threadpoolctl`` limit,
so the Python API is fast without setting ``OPENBLAS_NUM_THREADS`` by hand; the limit is lifted
when they return.  ``RISKPREM_BLAS_THREADS=N`` sets another limit, ``=0`` none.
"""

from __future__ import annotations

import functools
import os

#: Environment variable: BLAS threads inside riskprem's kernels (default 1; 0 = leave BLAS alone).
ENV_VAR = "RISKPREM_BLAS_THREADS"


def blas_threads() -> int | None:
    """The BLAS thread limit to apply (None: no limit)."""
    text = os.environ.get(ENV_VAR, "1").strip()
    try:
        value = int(text)
    except ValueError:
        raise ValueError(f"{ENV_VAR}={text!r} is not a whole number; use 1 (default), N, or 0 for "
                         "no limit") from None
    return None if value <= 0 else value


def blas_limited(func):
    """Run ``func`` with BLAS limited to :func:`blas_threads` threads (nested calls pay nothing)."""

    @functools.wraps(func)
    def wrapper(*args, **kwargs):
        limit = blas_threads()
        if limit is None or _depth[0]:
            return func(*args, **kwargs)
        from threadpoolctl import threadpool_limits

        _depth[0] += 1
        try:
            with threadpool_limits(limits=limit, user_api="blas"):
                return func(*args, **kwargs)
        finally:
            _depth[0] -= 1

    return wrapper


_depth = [0]  # > 0 while a limited call runs in this process
