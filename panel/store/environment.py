"""What a run records about where it ran, and the backfill key.

No SQL here: plain values for the ``runs`` row.
"""

from __future__ import annotations

import hashlib
import json
import platform
import subprocess
import sys
from datetime import datetime, timezone
from functools import cache
from importlib.metadata import PackageNotFoundError, version

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


def run_environment() -> dict:
    """The environment columns of a ``runs`` row: riskprem version, git commit, library versions and
    platform of this process."""
    return {**_static_environment(), "git_commit": git_commit()}


def canonical_json(value) -> str:
    """JSON with sorted keys and no whitespace: equal settings give equal text."""
    return json.dumps(value, sort_keys=True, separators=(",", ":"), ensure_ascii=False, default=str)


#: Settings that vary from vintage to vintage of one backfill and so stay out of its key.
PER_VINTAGE_SETTINGS = ("as_of", "start")


def backfill_key(dataset_hash: str, settings: dict) -> str:
    """sha256 (hex) of the dataset hash and the settings without the per-vintage entries ``as_of``
    (cut-off) and ``start`` (warm-start values).

    Two runs with the same key differ at most in cut-off and starting values, so a backfill that
    finds a run with its key and ``as_of`` (``find_run``) can skip that vintage.
    """
    rest = {k: v for k, v in dict(settings).items() if k not in PER_VINTAGE_SETTINGS}
    text = dataset_hash + "\0" + canonical_json(rest)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()
