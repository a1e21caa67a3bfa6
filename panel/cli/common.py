"""What every command shares: the global options, the user-error boundary, opening the store,
progress bars and the parsers of option values.  No SQL, no numerics."""

from __future__ import annotations

import contextlib
import math
import os
import sys
from dataclasses import dataclass
from enum import Enum
from pathlib import Path
from typing import Annotated, Iterator, NoReturn

import typer

from panel.cli import output

#: Seconds a command waits for another process's write lock on the store before giving up.
DEFAULT_LOCK_WAIT = 10.0


def user_error_types() -> tuple[type[BaseException], ...]:
    """The library errors that mean "bad input": printed as one line, exit code 1."""
    from panel.ingest import IngestError
    from panel.model.spec import SpecError
    from panel.store import StoreError
    from panel.files import OutputError
    from panel.vintages.backfill import BackfillError

    return (SpecError, IngestError, StoreError, BackfillError, OutputError)


@dataclass
class State:
    """Global options (``riskprem --store ... --quiet --verbose --lock-wait ...``)."""

    store: str | None = None
    quiet: bool = False
    verbose: bool = False
    lock_wait: float = DEFAULT_LOCK_WAIT

    @property
    def location(self) -> str:
        from panel.store import resolve_location

        return resolve_location(self.store)

    @property
    def shown(self) -> str:
        """The location as it may be printed: a URL's password masked."""
        from panel.store import public_location

        return public_location(self.location)


def state(ctx: typer.Context | None) -> State:
    root = ctx.find_root() if ctx is not None else None
    obj = getattr(root, "obj", None)
    return obj if isinstance(obj, State) else State()


def fail(message: str, code: int = 1) -> NoReturn:
    """Print ``error: message`` (one line) and exit with ``code``."""
    output.error_line(message)
    raise typer.Exit(code)


@contextlib.contextmanager
def user_errors() -> Iterator[None]:
    """Turn the library's user errors into one line on stderr and exit code 1."""
    try:
        yield
    except user_error_types() as error:
        fail(str(error))
    except Exception as error:   # a damaged store file or a lost server: one line, not a traceback
        from panel.store.errors import database_failure

        problem = database_failure(error)
        if problem is None:
            raise
        fail(str(problem))


@contextlib.contextmanager
def store_for(st: State, write: bool = False, hold: bool = True):
    """Open the store read-only (default) or read-write; errors become one line, exit 1.
    ``hold=False``: a DuckDB file is held only while each read or write runs (long commands)."""
    from panel.store import open_store

    with user_errors():
        store = open_store(st.location, read_only=not write, lock_timeout=st.lock_wait, hold=hold)
    try:
        yield store
    finally:
        store.close()


def store_exists(st: State) -> bool:
    """Whether the store location is an existing file (True for URLs: they cannot be checked here)."""
    location = st.location
    if "://" in location:
        return not location.startswith("duckdb:///") or Path(location[len("duckdb:///"):]).exists()
    return Path(location).expanduser().exists()


def info(st: State, message: str) -> None:
    """A progress note on stderr with ``--verbose``."""
    if st.verbose:
        output.note(message)


# ---------------------------------------------------------------------------------------------
# progress

class _Silent:
    def update(self, done: float | None = None, description: str | None = None, total=None) -> None:
        pass


class _Bar:
    def __init__(self, progress, task):
        self.progress, self.task = progress, task

    def update(self, done: float | None = None, description: str | None = None, total=None) -> None:
        fields = {}
        if description is not None:
            fields["description"] = description
        if total is not None:
            fields["total"] = total
        self.progress.update(self.task, completed=done, **fields)


def progress_enabled(st: State) -> bool:
    return not st.quiet and sys.stderr.isatty() and os.environ.get("TERM") != "dumb"


@contextlib.contextmanager
def progress(st: State, description: str, total: float | None = None):
    """A rich progress bar on stderr (a spinner when ``total`` is None); silent with ``--quiet`` or
    when stderr is not a terminal."""
    if not progress_enabled(st):
        yield _Silent()
        return
    from rich.progress import (BarColumn, MofNCompleteColumn, Progress, SpinnerColumn, TextColumn,
                               TimeElapsedColumn)

    columns = [SpinnerColumn(), TextColumn("{task.description}")]
    if total is not None:
        columns += [BarColumn(), MofNCompleteColumn()]
    columns.append(TimeElapsedColumn())
    with Progress(*columns, console=output.err(), transient=True) as bar:
        task = bar.add_task(description, total=total)
        yield _Bar(bar, task)


# ---------------------------------------------------------------------------------------------
# option types and parsers (syntax errors are usage errors: exit 2)

class Kind(str, Enum):
    filtered = "filtered"
    smoothed = "smoothed"


class KindOrBoth(str, Enum):
    filtered = "filtered"
    smoothed = "smoothed"
    both = "both"


JsonFlag = Annotated[bool, typer.Option("--json", help="Machine-readable JSON on stdout "
                                        "(per-period decimal units).")]
CsvFlag = Annotated[bool, typer.Option("--csv", help="CSV on stdout (per-period decimal units).")]
RunArg = Annotated[int, typer.Argument(metavar="RUN", help="Run id (see `riskprem runs`).", show_default=False)]


def run_ppy(inputs) -> int:
    """Periods a year of a stored run's inputs (``panel.vintages.reproduce.run_inputs``): its
    spec's, else its panel's."""
    return int(inputs.spec.periods_per_year or inputs.panel.periods_per_year)


def parse_date(value: str | None, option: str):
    """``value`` as a normalised ``pd.Timestamp`` (None stays None); not a date: exit 2."""
    if value is None:
        return None
    import pandas as pd

    try:
        stamp = pd.Timestamp(str(value).strip())
    except (TypeError, ValueError):
        stamp = pd.NaT
    if pd.isna(stamp):
        raise typer.BadParameter(f"{value!r} is not a date; write YYYY-MM-DD", param_hint=option)
    return stamp.normalize()


def parse_number(text: str, option: str, what: str) -> float:
    try:
        value = float(text)
    except (TypeError, ValueError):
        raise typer.BadParameter(f"{what} {text!r} is not a number", param_hint=option) from None
    if not math.isfinite(value):
        raise typer.BadParameter(f"{what} {text!r} is not a finite number", param_hint=option)
    return value


def parse_pair(text: str, option: str, first: str, second: str) -> tuple[float, float]:
    """``A:B`` -> two numbers."""
    left, sep, right = str(text).partition(":")
    if not sep:
        raise typer.BadParameter(f"{text!r} is not {first.upper()}:{second.upper()}", param_hint=option)
    return parse_number(left, option, first), parse_number(right, option, second)


def parse_assignments(items, option: str) -> dict[str, str]:
    """``NAME=VALUE`` items -> dict (split at the last ``=``, so names may hold ``=``-free text)."""
    found = {}
    for item in items or ():
        name, sep, value = str(item).rpartition("=")
        if not sep or not name.strip() or not value.strip():
            raise typer.BadParameter(f"{item!r} is not NAME=VALUE", param_hint=option)
        found[name.strip()] = value.strip()
    return found


def existing_folder(path: Path, option: str) -> Path:
    """A file path whose folder exists (exit 1 otherwise)."""
    if not path.parent.is_dir():
        fail(f"{option} {path}: folder {path.parent} does not exist; create it or give another path")
    return path
