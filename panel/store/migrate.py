"""Schema migrations: numbered SQL files in the top-level ``migrations/`` folder, applied in order.

A file ``NNNN_words.sql`` brings the store from version ``NNNN - 1`` to ``NNNN``.  Each file runs in
ONE transaction together with its ``schema_version`` row, so a store is always at a whole version.
Files hold portable SQL (DuckDB and PostgreSQL); the runner drops ``--`` comment lines, splits on
semicolons and, on PostgreSQL only, reads the type word ``JSON`` as ``JSONB``.  A version whose data
change portable SQL cannot express (e.g. a hash) registers a Python step in ``_AFTER``; it runs in the
same transaction right after the file.

Why a small runner instead of Alembic: Alembic needs dialect glue for DuckDB, and its autogenerate
cannot work because schema read-back through SQLAlchemy's inspector is incomplete for DuckDB; plain
numbered files are easy to review and run unchanged on both databases.
"""

from __future__ import annotations

from pathlib import Path
from typing import Callable

from sqlalchemy import Boolean, Date, DateTime, Double, Integer, BigInteger, JSON, String, func, select, text
from sqlalchemy.engine import Connection, Engine

from panel.store import schema
from panel.store.environment import backfill_key, utc_now
from panel.store.errors import StoreError
from panel.store.handle import Store
from panel.store.versions import Migration, head_version, migrations

__all__ = ["Migration", "apply_migrations", "current_version", "engine_facts", "head_version", "live_tables",
           "migrations", "missing_write_privilege", "schema_drift", "store_info", "upgrade"]


# ---------------------------------------------------------------------------------------------
# reading the live catalog (information_schema works on DuckDB and PostgreSQL)

_TABLES = text("SELECT table_name FROM information_schema.tables "
               "WHERE table_schema = current_schema() AND table_catalog = current_database()")
_COLUMNS = text("SELECT table_name, column_name, data_type, is_nullable, ordinal_position "
                "FROM information_schema.columns "
                "WHERE table_schema = current_schema() AND table_catalog = current_database() "
                "ORDER BY table_name, ordinal_position")
_PRIMARY_KEYS = text(
    "SELECT tc.table_name, kcu.column_name, kcu.ordinal_position "
    "FROM information_schema.table_constraints tc "
    "JOIN information_schema.key_column_usage kcu "
    "  ON kcu.constraint_name = tc.constraint_name AND kcu.table_name = tc.table_name "
    "  AND kcu.table_schema = tc.table_schema "
    "WHERE tc.constraint_type = 'PRIMARY KEY' AND tc.table_schema = current_schema() "
    "  AND tc.table_catalog = current_database() "
    "ORDER BY tc.table_name, kcu.ordinal_position")


def live_tables(conn: Connection) -> set[str]:
    return {row[0] for row in conn.execute(_TABLES)}


def current_version(conn: Connection) -> int | None:
    """Schema version of the connected database: 0 when it has no tables, None when it has tables
    but is not a riskprem store."""
    tables = live_tables(conn)
    if "schema_version" in tables:
        version = conn.execute(select(func.max(schema.schema_version.c.version))).scalar_one()
        if version is None and len(tables) > 1:   # every migration writes its row with its tables
            raise StoreError("its schema_version table is empty (changed outside riskprem), so its schema "
                             "is unknown; restore the store from a backup copy")
        return int(version or 0)
    return 0 if not tables else None


def engine_facts(conn: Connection) -> dict:
    """DuckDB library version and the storage version of the attached file (DuckDB only); the
    server version elsewhere."""
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


#: Tables a writer inserts into (the others change only in migrations, which the owner runs).
_WRITTEN = ("datasets", "dataset_names", "dataset_assets", "dataset_dates", "dataset_values", "runs",
            "parameters", "estimates", "factor_paths", "em_trace", "diagnostics")


def missing_write_privilege(conn: Connection) -> str | None:
    """On PostgreSQL: the first table (or the run-id sequence) the connected user may not write,
    or None; on DuckDB always None (the file lock is the only gate)."""
    if conn.dialect.name != "postgresql":
        return None
    if not conn.execute(text("SELECT has_sequence_privilege('run_id_seq', 'USAGE')")).scalar_one():
        return "sequence run_id_seq (USAGE)"
    for name in _WRITTEN:
        if not conn.execute(text("SELECT has_table_privilege(:t, 'INSERT')"), {"t": name}).scalar_one():
            return f"table {name} (INSERT)"
    return None


_FAMILIES = {
    "bigint": "bigint", "int8": "bigint",
    "integer": "integer", "int4": "integer", "int": "integer",
    "double": "double", "double precision": "double", "float8": "double",
    "varchar": "text", "character varying": "text", "text": "text",
    "boolean": "boolean", "date": "date",
    "timestamp": "timestamp", "timestamp without time zone": "timestamp",
    "json": "json", "jsonb": "json",
}


def _family_of(column_type) -> str:
    for kind, family in ((BigInteger, "bigint"), (Integer, "integer"), (Double, "double"),
                         (Boolean, "boolean"), (DateTime, "timestamp"), (Date, "date"),
                         (JSON, "json"), (String, "text")):
        if isinstance(column_type, kind):
            return family
    return type(column_type).__name__.lower()


def schema_drift(store: Store) -> list[str]:
    """Differences between the store's tables and ``schema.metadata`` (empty = none): column names
    and order, type family, nullability and primary keys."""
    with store.engine.connect() as conn:
        return _drift(conn)


def _drift(conn: Connection) -> list[str]:
    columns: dict[str, list[tuple[str, str, bool]]] = {}
    for table, name, data_type, nullable, _ in conn.execute(_COLUMNS):
        family = _FAMILIES.get(str(data_type).lower(), str(data_type).lower())
        columns.setdefault(table, []).append((name, family, nullable == "YES"))
    keys: dict[str, list[str]] = {}
    for table, name, _ in conn.execute(_PRIMARY_KEYS):
        keys.setdefault(table, []).append(name)
    problems = []
    for table in schema.metadata.sorted_tables:
        want = [(c.name, _family_of(c.type), bool(c.nullable)) for c in table.columns]
        have = columns.get(table.name)
        if have is None:
            problems.append(f"table {table.name} is missing")
            continue
        if have != want:
            problems.append(f"table {table.name}: store has {have}, schema.py has {want}")
        want_key = [c.name for c in table.primary_key.columns]
        if keys.get(table.name, []) != want_key:
            problems.append(f"table {table.name}: primary key {keys.get(table.name, [])} != {want_key}")
    extra = set(columns) - set(schema.metadata.tables)
    problems.extend(f"table {name} is not in schema.py" for name in sorted(extra))
    return problems


# ---------------------------------------------------------------------------------------------
# applying migrations

def _fill_backfill_keys(conn: Connection) -> None:
    runs = schema.runs
    rows = conn.execute(select(runs.c.id, runs.c.dataset_hash, runs.c.settings)).all()
    for run_id, dataset_hash, settings in rows:
        conn.execute(runs.update().where(runs.c.id == run_id)
                     .values(backfill_key=backfill_key(dataset_hash, settings or {})))


_AFTER: dict[int, Callable[[Connection], None]] = {2: _fill_backfill_keys}


def _creation_meta(conn: Connection) -> None:
    import panel

    facts = {"created_utc": utc_now().isoformat(timespec="seconds"), "created_by": f"riskprem {panel.__version__}",
             **{f"created_{k}": v for k, v in engine_facts(conn).items()}}
    conn.execute(schema.store_meta.insert(), [{"key": k, "value": v} for k, v in facts.items()])


def apply_migrations(engine: Engine, target: int | None = None) -> list[int]:
    """Bring the database behind ``engine`` to ``target`` (default: the newest); returns the
    versions applied.  Each version commits on its own, with its ``schema_version`` row."""
    todo = migrations()
    target = todo[-1].version if target is None else target
    with engine.connect() as conn:
        start = current_version(conn)
    if start is None:
        raise StoreError(f"{engine.url.database or engine.url} is not a riskprem store (it has tables "
                         "but no schema_version); point the store option at another file")
    applied = []
    for migration in todo:
        if not start < migration.version <= target:
            continue
        with engine.begin() as conn:
            for statement in migration.statements(engine.dialect.name):
                conn.execute(text(statement))
            if migration.version in _AFTER:
                _AFTER[migration.version](conn)
            conn.execute(schema.schema_version.insert().values(
                version=migration.version, applied_utc=utc_now(), description=migration.description))
            if migration.version == 1:
                _creation_meta(conn)
        applied.append(migration.version)
    return applied


def upgrade(store: Store, target: int | None = None) -> list[int]:
    """Migrate an existing store in place to ``target`` (default: this riskprem's schema); returns
    the versions applied (empty when already current).  Existing rows are kept."""
    store.require_writable("upgrade")
    head = head_version()
    target = head if target is None else target
    if store.schema_version > head:
        raise StoreError(store.newer_message(head))
    applied = apply_migrations(store.engine, target)
    if applied:
        with store.engine.begin() as conn:
            meta = schema.store_meta
            conn.execute(meta.delete().where(meta.c.key == "upgraded_utc"))
            conn.execute(meta.insert().values(key="upgraded_utc", value=utc_now().isoformat(timespec="seconds")))
            store.schema_version = current_version(conn)
    return applied


def store_info(store: Store) -> dict:
    """Facts about a store: location, schema version (and this riskprem's), DuckDB library and
    storage version, file size in bytes (database plus write-ahead log), row count per table, and the
    ``store_meta`` entries recorded at creation and upgrade."""
    with store.engine.connect() as conn:
        present = live_tables(conn)
        counts = {t.name: int(conn.execute(select(func.count()).select_from(t)).scalar_one())
                  for t in schema.metadata.sorted_tables if t.name in present}
        meta = ({k: v for k, v in conn.execute(select(schema.store_meta.c.key, schema.store_meta.c.value))}
                if "store_meta" in present else {})
        facts = engine_facts(conn)
        version = current_version(conn)
    size = None
    if store.path is not None:
        size = sum(p.stat().st_size for p in (store.path, Path(str(store.path) + ".wal")) if p.exists())
    return {"location": store.display, "dialect": store.engine.dialect.name, "schema_version": version,
            "code_schema_version": head_version(), **facts, "file_size": size, "counts": counts,
            "meta": meta}
