"""What a run records about where it ran, the backfill key, and what JSON columns accept.

No SQL here: plain values for the ``runs`` row.
"""

from __future__ import annotations

import hashlib
import json
import math
import platform
import subprocess
import sys
from datetime import datetime, timezone
from functools import cache
from importlib.metadata import PackageNotFoundError, version

from panel.store.errors import StoreError
from panel.store.resources import source_root


def utc_now() -> datetime:
    """Now in UTC as a naive datetime (the store's timestamp convention)."""
    return datetime.now(timezone.utc).replace(tzinfo=None)


def _version(dist: str) -> str | None:
    try:
        return version(dist)
    except PackageNotFoundError:
        return None


@cache
def git_commit() -> str | None:
    """Full commit of the source checkout riskprem runs from, ``-dirty`` if it has local changes;
    None for an installed package or when git is unavailable."""
    root = source_root()
    if root is None or not (root / ".git").exists():
        return None
    try:
        done = subprocess.run(["git", "describe", "--always", "--dirty", "--abbrev=40", "--exclude=*"],
                              cwd=root, capture_output=True, text=True, timeout=5, check=False)
    except (OSError, subprocess.SubprocessError):
        return None
    text = done.stdout.strip()
    return text or None


@cache
def _static_environment() -> dict:
    import panel

    return {
        "riskprem_version": panel.__version__,
        "python_version": platform.python_version(),
        "numpy_version": _version("numpy"),
        "scipy_version": _version("scipy"),
        "pandas_version": _version("pandas"),
        "duckdb_version": _version("duckdb"),
        "platform": f"{platform.platform()} ({sys.implementation.name})",
    }


@cache
def _blas_libraries() -> str:
    """The BLAS libraries numpy and scipy load (implementation, version, CPU kernel), e.g.
    ``openblas 0.3.30 (SkylakeX)``: with the thread count they decide the last bits of every
    matrix product."""
    import numpy  # noqa: F401  (both libraries loaded, as during a fit)
    import scipy.linalg  # noqa: F401
    from threadpoolctl import threadpool_info

    found = sorted({f"{i.get('internal_api')} {i.get('version')} ({i.get('architecture')})"
                    for i in threadpool_info() if i.get("user_api") == "blas"})
    return ", ".join(found) or "none found"


def _platform() -> str:
    """The platform with the BLAS libraries and riskprem's BLAS thread limit
    (:mod:`panel.threads`): the same code and data give other last bits, and so other fits, with
    another BLAS kernel or thread count (measured: 2 threads instead of 1 moved a 100-asset fit's
    premia by 1e-5 relative)."""
    from panel.threads import blas_threads

    limit = blas_threads()
    threads = "no thread limit" if limit is None else f"{limit} thread{'s' if limit > 1 else ''}"
    return f"{_static_environment()['platform']}; BLAS {_blas_libraries()}, {threads}"


def run_environment() -> dict:
    """The environment columns of a ``runs`` row: riskprem version, git commit, library versions and
    platform of this process."""
    return {**_static_environment(), "git_commit": git_commit(), "platform": _platform()}


def _non_finite(value, path: str):
    """(path, number) of the first NaN or infinity inside ``value``, or None."""
    if isinstance(value, float) and not math.isfinite(value):
        return path or "(top level)", value
    items = value.items() if isinstance(value, dict) else enumerate(value) if isinstance(value, (list, tuple)) else ()
    for key, item in items:
        found = _non_finite(item, f"{path}.{key}" if path else str(key))
        if found:
            return found
    return None


def json_ready(value, what: str = "settings"):
    """``value`` as the JSON columns store it (plain dicts, lists, numbers, strings; other objects
    as their text).  NaN and infinity are refused: JSON has no such numbers (PostgreSQL rejects them,
    DuckDB would read them back as null), so a run whose settings hold one could not be reproduced."""
    found = _non_finite(value, "")
    if found:
        raise StoreError(f"{what} hold a non-finite number at {found[0]} ({found[1]}), which cannot be "
                         "stored as JSON; give a finite value or leave the option out")
    try:
        return json.loads(json.dumps(value, default=str, allow_nan=False))
    except (TypeError, ValueError) as error:
        raise StoreError(f"{what} cannot be stored as JSON ({error}); pass plain dicts, lists, "
                         "numbers and strings") from None


def canonical_json(value) -> str:
    """JSON with sorted keys and no whitespace: equal settings give equal text."""
    return json.dumps(value, sort_keys=True, separators=(",", ":"), ensure_ascii=False, default=str)


#: Settings that vary from vintage to vintage of one backfill and so stay out of its key.
PER_VINTAGE_SETTINGS = ("as_of", "start", "sampler_seed")


def backfill_key(dataset_hash: str, settings: dict) -> str:
    """sha256 (hex) of the dataset hash and the settings without the per-vintage entries ``as_of``
    (cut-off) and ``start`` (warm-start values).

    Two runs with the same key differ at most in cut-off and starting values, so a backfill that
    finds a run with its key and ``as_of`` (``find_run``) can skip that vintage.
    """
    rest = {k: v for k, v in json_ready(dict(settings), "run settings").items() if k not in PER_VINTAGE_SETTINGS}
    text = dataset_hash + "\0" + canonical_json(rest)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()
