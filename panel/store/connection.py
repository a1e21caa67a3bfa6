"""Opening a store: location resolution, the one-writer lock, schema version checks.

A store is a DuckDB file (default ``./riskprem.duckdb``) or any SQLAlchemy URL
(``duckdb:///path``, ``postgresql+psycopg://user@host/db``).  DuckDB lets ONE process open a file
read-write; while it does, other processes can open it neither read-write nor read-only.  Several
read-only processes may share a file when no writer holds it.

A password in a URL is a secret: it is used to connect and never shown.  Every message and every
fact about the store uses :func:`public_location`, and driver messages are passed through
:func:`panel.store.errors.first_line` with the password masked.
"""

from __future__ import annotations

import importlib.util
import logging
import os
import re
import time
from pathlib import Path

from sqlalchemy import create_engine, event
from sqlalchemy.engine import URL, Engine, make_url
from sqlalchemy.exc import ArgumentError, DBAPIError, NoSuchModuleError
from sqlalchemy.pool import NullPool, StaticPool

from panel.store.errors import DAMAGE_FIX, StoreError, first_line, is_damage, url_secret
from panel.store.handle import Store
from panel.store.migrate import apply_migrations, current_version, head_version, missing_write_privilege

# SQLAlchemy's pool logs (with a traceback) a failed rollback of a connection it takes back, e.g.
# after a damaged DuckDB file was met; the error itself reaches the caller, who reports it in one
# line.  Without a handler, Python would print that log record to stderr; applications that set up
# logging still receive it.
logging.getLogger("sqlalchemy.pool").addHandler(logging.NullHandler())

DEFAULT_LOCATION = "./riskprem.duckdb"
ENV_VAR = "RISKPREM_STORE"


def resolve_location(option: str | None = None) -> str:
    """The store location: ``option`` if given, else ``$RISKPREM_STORE``, else ``./riskprem.duckdb``."""
    if option:
        return str(option)
    return os.environ.get(ENV_VAR) or DEFAULT_LOCATION


_USERINFO = re.compile(r"://([^:/@]*):.*@")
_QUERY_PASSWORD = re.compile(r"([?&]password=)[^&]*")


def _public_url(url: URL) -> str:
    if isinstance(url.query.get("password"), str):
        url = url.update_query_dict({"password": "***"})
    return url.render_as_string(hide_password=True).replace("password=%2A%2A%2A", "password=***")


def public_location(location: str | os.PathLike) -> str:
    """``location`` as it may be shown: a path unchanged, a URL with any password replaced by
    ``***`` (also when the URL cannot be parsed)."""
    text_ = str(location)
    if "://" not in text_:
        return text_
    try:
        return _public_url(make_url(text_))
    except ArgumentError:
        return _QUERY_PASSWORD.sub(r"\1***", _USERINFO.sub(r"://\1:***@", text_))


def _url_of(location: str):
    if "://" in location:
        try:
            url = make_url(location)
        except ArgumentError:
            raise StoreError(f"cannot read store URL {public_location(location)!r}; give a file path or a "
                             "URL like duckdb:///path/riskprem.duckdb") from None
        return url, (Path(url.database).resolve() if url.drivername.startswith("duckdb")
                     and url.database and url.database != ":memory:" else None)
    path = Path(location).expanduser().resolve()
    return make_url(f"duckdb:///{path}"), path


_LOCK_WORD = re.compile(r"\block\b", re.IGNORECASE)


def is_lock_error(line: str) -> bool:
    """Whether a driver message says another process holds the file (DuckDB: 'Could not set lock
    on file ... Conflicting lock is held').  A whole word: a damaged *block* is not a lock."""
    return bool(_LOCK_WORD.search(line)) and "corrupt" not in line.lower()


def _quiet_duckdb(dbapi_connection, _record) -> None:
    """This layer never prints: turn off DuckDB's progress bar on every new connection."""
    dbapi_connection.execute("SET enable_progress_bar = false")


def _lock_message(display: str, error: BaseException, read_only: bool, waited: float) -> str:
    pid = re.search(r"PID (\d+)", first_line(error))
    holder = f"another process (PID {pid.group(1)})" if pid else "another process"
    if read_only:
        return (f"store {display} is being written by {holder} and DuckDB cannot read a file while "
                f"another process writes it (waited {waited:.0f} s); retry when that process has finished")
    return (f"store {display} is in use by {holder} (waited {waited:.0f} s); one process writes at a time: "
            "wait for it to finish (read-only commands work whenever no process is writing)")


def _patient_connect(display: str, read_only: bool, lock_timeout: float):
    """A ``do_connect`` hook that waits (with backoff, up to ``lock_timeout`` seconds) while another
    process holds the DuckDB file, then raises :class:`StoreError`: every (re)opening of a store
    that does not hold its file is as patient as the first."""
    def do_connect(dialect, _record, cargs, cparams):
        start = time.monotonic()
        delay = 0.05
        while True:
            try:
                return dialect.connect(*cargs, **cparams)
            except dialect.loaded_dbapi.Error as error:
                waited = time.monotonic() - start
                if not is_lock_error(first_line(error)):
                    raise
                if waited + delay > lock_timeout:
                    raise StoreError(_lock_message(display, error, read_only, waited)) from None
                time.sleep(delay)
                delay = min(delay * 2, 1.0)

    return do_connect


def _connect(engine: Engine, display: str, read_only: bool, lock_timeout: float,
             new_file: Path | None = None) -> None:
    """Open the first connection, waiting for another process's lock; ``new_file``: the DuckDB file
    this opening creates (removed again when it fails)."""
    secret = url_secret(engine.url)
    start = time.monotonic()
    delay = 0.05
    while True:
        try:
            engine.connect().close()  # StaticPool keeps this one connection (and DuckDB's lock)
            return
        except DBAPIError as error:
            line = first_line(error, secret)
            waited = time.monotonic() - start
            if is_lock_error(line):
                if waited + delay > lock_timeout:
                    raise StoreError(_lock_message(display, error, read_only, waited)) from None
                time.sleep(delay)
                delay = min(delay * 2, 1.0)
                continue
            if "different configuration" in line:
                raise StoreError(f"store {display} is already open in this process in the other mode; "
                                 "close it before opening it read-only or read-write") from None
            if new_file is not None:
                raise _discard_new(engine, new_file, error) from None
            if is_damage(line):
                raise StoreError(f"store {display} is damaged ({line}); {DAMAGE_FIX}") from None
            raise StoreError(f"cannot open store {display}: {line}") from None
        except (NoSuchModuleError, ImportError) as error:
            raise StoreError(f"cannot open store {display}: {first_line(error, secret)}; install the driver "
                             "for that URL or use a DuckDB file") from None


def open_store(location: str | os.PathLike | None = None, *, read_only: bool = False,
               lock_timeout: float = 10.0, hold: bool = True) -> Store:
    """Open (and, read-write, create if new) the store at ``location`` (see :func:`resolve_location`).

    A new or empty DuckDB file opened read-write gets the full schema.  An existing store must be a
    riskprem store no newer than this code; an older one opens, but reading or writing runs needs
    :func:`panel.store.upgrade` first.  While another process writes a DuckDB store, opening retries
    with backoff for ``lock_timeout`` seconds, then raises :class:`StoreError`.

    ``hold=False`` (DuckDB files): keep the file open only while a read or a write transaction runs,
    so other processes can read and write between them; each use waits up to ``lock_timeout``
    seconds for the file like opening does.  A long backfill opens its store this way.  Database
    servers need no such thing: they serve many readers and writers at once.
    """
    url, path = _url_of(resolve_location(None if location is None else str(location)))
    display = str(path) if path is not None else _public_url(url)
    kwargs: dict = {}
    if url.drivername.startswith("duckdb"):
        if path is not None:
            if read_only and not path.exists():
                raise StoreError(f"no store at {path}; write a dataset to create it, or give another "
                                 "store location")
            if not path.parent.is_dir():
                raise StoreError(f"cannot create store {path}: folder {path.parent} does not exist")
        kwargs = {"poolclass": StaticPool if hold else NullPool,
                  "connect_args": {"read_only": bool(read_only)}}
    elif url.drivername.startswith("postgresql"):
        if url.drivername == "postgresql" and importlib.util.find_spec("psycopg") is not None:
            url = url.set(drivername="postgresql+psycopg")   # the driver of riskprem[postgres]
        if read_only:   # the server refuses writes in every transaction of a read-only store
            options = " ".join(filter(None, [str(url.query.get("options") or ""),
                                             "-c default_transaction_read_only=on"]))
            url = url.update_query_dict({"options": options})
    try:
        engine = create_engine(url, **kwargs)
    except (ArgumentError, NoSuchModuleError, ImportError) as error:
        raise StoreError(f"cannot use store location {display!r}: {first_line(error, url_secret(url))}; "
                         "give a file path or a URL like duckdb:///path/riskprem.duckdb") from None
    if engine.dialect.name == "duckdb":
        event.listen(engine, "connect", _quiet_duckdb)
        if not hold:
            event.listen(engine, "do_connect", _patient_connect(display, read_only, lock_timeout))
    new_file = path is not None and not read_only and not path.exists()
    try:
        _connect(engine, display, read_only, lock_timeout, path if new_file else None)
        try:
            version = _prepare(engine, display, read_only)
            if new_file:
                _checkpoint(engine, path)
        except DBAPIError as error:   # e.g. a database user without the privileges it needs
            if new_file:
                raise _discard_new(engine, path, error) from None
            raise StoreError(f"cannot use store {display}: {first_line(error, url_secret(url))}; ask the "
                             "store's owner for access (README: Team store)") from None
        head = head_version()
        store = Store(engine, display=display, path=path, read_only=read_only, schema_version=version)
        if version > head:
            raise StoreError(store.newer_message(head))
        return store
    except BaseException:
        engine.dispose()
        raise


def _checkpoint(engine: Engine, path: Path) -> None:
    """Write a new DuckDB store's schema into its file now.  DuckDB checkpoints again on closing,
    but silently: on a nearly full device a new store would report success and then be unreadable
    (its log cannot be replayed)."""
    raw = engine.raw_connection()
    try:
        raw.driver_connection.execute("CHECKPOINT")
    except engine.dialect.loaded_dbapi.Error as error:
        raw.invalidate()   # the database is unusable now: close it without the pool's rollback
        raise _discard_new(engine, path, error) from None
    raw.close()


def _discard_new(engine: Engine, path: Path, error: BaseException) -> StoreError:
    """Remove the half-made files of a new store that could not be created; the one-line error."""
    engine.dispose()
    for leftover in (path, Path(str(path) + ".wal")):
        try:
            leftover.unlink(missing_ok=True)
        except OSError:
            pass
    reason = first_line(error)
    reason = reason[reason.rfind(": ") + 2:] if "No space left" in reason else reason
    return StoreError(f"cannot create store {path}: {reason}; free space on that device or give another "
                      "store location (nothing was written)")


def _prepare(engine: Engine, display: str, read_only: bool) -> int:
    """The store's schema version after creating the schema in an empty database (read-write)."""
    with engine.connect() as conn:
        try:
            version = current_version(conn)
        except StoreError as error:
            raise StoreError(f"store {display}: {error}") from None
    if version is None:
        raise StoreError(f"{display} is not a riskprem store (it has tables but no schema_version); "
                         "give another store location")
    if version == 0:
        if read_only and engine.dialect.name == "postgresql":   # tables without SELECT are invisible
            raise StoreError(f"{display} has no riskprem tables this user can see; write a dataset to create "
                             "the store, or ask the store's owner for the reader role (README: Team store)")
        if read_only:
            raise StoreError(f"{display} is empty, not a riskprem store; write a dataset to create it")
        apply_migrations(engine)
        version = head_version()
    if not read_only:
        with engine.connect() as conn:
            missing = missing_write_privilege(conn)
        if missing is not None:
            user = engine.url.username or "this database user"
            raise StoreError(f"{user} may not write store {display} (no privilege on {missing}); use "
                             "read commands, or ask the store's owner for the writer role (README: Team store)")
    return version
