"""Opening a store: location resolution, the one-writer lock, schema version checks.

A store is a DuckDB file (default ``./riskprem.duckdb``) or any SQLAlchemy URL
(``duckdb:///path``, ``postgresql://...``).  DuckDB lets ONE process open a file read-write; while it
does, other processes can open it neither read-write nor read-only.  Several read-only processes may
share a file when no writer holds it.
"""

from __future__ import annotations

import os
import re
import time
from pathlib import Path

from sqlalchemy import create_engine, event, text
from sqlalchemy.engine import Connection, Engine, make_url
from sqlalchemy.exc import ArgumentError, DBAPIError, NoSuchModuleError
from sqlalchemy.pool import StaticPool

from panel.store.errors import StoreError

DEFAULT_LOCATION = "./riskprem.duckdb"
ENV_VAR = "RISKPREM_STORE"


def resolve_location(option: str | None = None) -> str:
    """The store location: ``option`` if given, else ``$RISKPREM_STORE``, else ``./riskprem.duckdb``."""
    if option:
        return str(option)
    return os.environ.get(ENV_VAR) or DEFAULT_LOCATION


def _first_line(error: BaseException) -> str:
    inner = getattr(error, "orig", None) or error
    return (str(inner).strip().splitlines() or [type(inner).__name__])[0]


def engine_facts(conn: Connection) -> dict:
    """DuckDB library version and the storage version of the attached file (DuckDB only)."""
    if conn.dialect.name != "duckdb":
        return {"server_version": ".".join(str(p) for p in (conn.dialect.server_version_info or ()))}
    library = conn.execute(text("SELECT library_version FROM pragma_version()")).scalar_one()
    tags = conn.execute(text("SELECT tags FROM duckdb_databases() WHERE database_name = current_database()")
                        ).scalar_one_or_none()
    storage = None
    if isinstance(tags, dict):
        storage = tags.get("storage_version")
        storage = storage[0] if isinstance(storage, list) and storage else storage
    return {"duckdb_library": library, "storage_version": storage}


class Store:
    """An open store: the SQLAlchemy engine plus what was learnt when opening it.

    Use as a context manager or call :meth:`close`; a read-write DuckDB store holds the file lock
    until then.
    """

    def __init__(self, engine: Engine, *, display: str, path: Path | None, read_only: bool,
                 schema_version: int):
        self.engine = engine
        self.display = display
        self.path = path
        self.read_only = read_only
        self.schema_version = schema_version

    @property
    def is_duckdb(self) -> bool:
        return self.engine.dialect.name == "duckdb"

    def close(self) -> None:
        self.engine.dispose()

    def __enter__(self) -> "Store":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def __repr__(self) -> str:
        mode = "read-only" if self.read_only else "read-write"
        return f"Store({self.display!r}, {mode}, schema {self.schema_version})"

    def require_writable(self, action: str = "write") -> None:
        if self.read_only:
            raise StoreError(f"store {self.display} is open read-only; open it read-write to {action}")

    def require_current(self) -> None:
        from panel.store.migrate import head_version

        head = head_version()
        if self.schema_version < head:
            raise StoreError(f"store {self.display} has schema version {self.schema_version}, this riskprem "
                             f"uses {head}; upgrade it with `riskprem store upgrade` (back the file up first)")
        if self.schema_version > head:
            raise StoreError(self.newer_message(head))

    def newer_message(self, head: int) -> str:
        return (f"store {self.display} has schema version {self.schema_version}, newer than this riskprem "
                f"knows ({head}); install a newer riskprem to use it")


def _url_of(location: str):
    if "://" in location:
        try:
            url = make_url(location)
        except ArgumentError:
            raise StoreError(f"cannot read store URL {location!r}; give a file path or a URL like "
                             "duckdb:///path/riskprem.duckdb") from None
        return url, (Path(url.database).resolve() if url.drivername.startswith("duckdb")
                     and url.database and url.database != ":memory:" else None)
    path = Path(location).expanduser().resolve()
    return make_url(f"duckdb:///{path}"), path


def _quiet_duckdb(dbapi_connection, _record) -> None:
    """This layer never prints: turn off DuckDB's progress bar on every new connection."""
    dbapi_connection.execute("SET enable_progress_bar = false")


def _lock_message(display: str, error: BaseException, read_only: bool, waited: float) -> str:
    pid = re.search(r"PID (\d+)", _first_line(error))
    holder = f"another process (PID {pid.group(1)})" if pid else "another process"
    if read_only:
        return (f"store {display} is being written by {holder} and DuckDB cannot read a file while "
                f"another process writes it (waited {waited:.0f} s); retry when that process has finished")
    return (f"store {display} is in use by {holder} (waited {waited:.0f} s); one process writes at a time: "
            "wait for it to finish (read-only commands work whenever no process is writing)")


def _connect(engine: Engine, display: str, read_only: bool, lock_timeout: float) -> None:
    start = time.monotonic()
    delay = 0.05
    while True:
        try:
            engine.connect().close()  # StaticPool keeps this one connection (and DuckDB's lock)
            return
        except DBAPIError as error:
            line = _first_line(error)
            waited = time.monotonic() - start
            if "lock" in line.lower():
                if waited + delay > lock_timeout:
                    raise StoreError(_lock_message(display, error, read_only, waited)) from None
                time.sleep(delay)
                delay = min(delay * 2, 1.0)
                continue
            if "different configuration" in line:
                raise StoreError(f"store {display} is already open in this process in the other mode; "
                                 "close it before opening it read-only or read-write") from None
            raise StoreError(f"cannot open store {display}: {line}") from None
        except (NoSuchModuleError, ImportError) as error:
            raise StoreError(f"cannot open store {display}: {_first_line(error)}; install the driver "
                             "for that URL or use a DuckDB file") from None


def open_store(location: str | os.PathLike | None = None, *, read_only: bool = False,
               lock_timeout: float = 10.0) -> Store:
    """Open (and, read-write, create if new) the store at ``location`` (see :func:`resolve_location`).

    A new or empty DuckDB file opened read-write gets the full schema.  An existing store must be a
    riskprem store no newer than this code; an older one opens, but reading or writing runs needs
    :func:`panel.store.upgrade` first.  While another process writes a DuckDB store, opening retries
    with backoff for ``lock_timeout`` seconds, then raises :class:`StoreError`.
    """
    from panel.store.migrate import apply_migrations, current_version, head_version

    url, path = _url_of(resolve_location(None if location is None else str(location)))
    display = str(path) if path is not None else url.render_as_string(hide_password=True)
    kwargs: dict = {}
    if url.drivername.startswith("duckdb"):
        if path is not None:
            if read_only and not path.exists():
                raise StoreError(f"no store at {path}; write a dataset to create it, or give another "
                                 "store location")
            if not path.parent.is_dir():
                raise StoreError(f"cannot create store {path}: folder {path.parent} does not exist")
        kwargs = {"poolclass": StaticPool,
                  "connect_args": {"read_only": bool(read_only)}}
    try:
        engine = create_engine(url, **kwargs)
    except (ArgumentError, NoSuchModuleError, ImportError) as error:
        raise StoreError(f"cannot use store location {display!r}: {_first_line(error)}; give a file path "
                         "or a URL like duckdb:///path/riskprem.duckdb") from None
    if engine.dialect.name == "duckdb":
        event.listen(engine, "connect", _quiet_duckdb)
    try:
        _connect(engine, display, read_only, lock_timeout)
        with engine.connect() as conn:
            version = current_version(conn)
        if version is None:
            raise StoreError(f"{display} is not a riskprem store (it has tables but no schema_version); "
                             "give another store location")
        head = head_version()
        if version == 0:
            if read_only:
                raise StoreError(f"{display} is empty, not a riskprem store; write a dataset to create it")
            apply_migrations(engine)
            version = head
        store = Store(engine, display=display, path=path, read_only=read_only, schema_version=version)
        if version > head:
            raise StoreError(store.newer_message(head))
        return store
    except BaseException:
        engine.dispose()
        raise
