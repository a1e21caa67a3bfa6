"""Moving DataFrames in and out: each database's bulk path, with a portable SQLAlchemy fallback.

Bulk writes use the driver connection beneath the SQLAlchemy connection, so they run inside the
caller's transaction (a run is still stored whole or not at all):

- DuckDB: the DataFrame is registered as an Arrow table and ``INSERT INTO t SELECT ... FROM <frame>``
  copies it;
- PostgreSQL through psycopg 3: ``COPY t (...) FROM STDIN (FORMAT BINARY)`` with psycopg's copy
  protocol, one column list per table column (binary keeps every double bit for bit; NaN and NaT go
  in as NULL, as on the other paths);
- anything else: SQLAlchemy executemany in chunks (measured by ``python -m panel.bench.store``).
"""

from __future__ import annotations

import itertools
import math
from datetime import date, datetime

import numpy as np
import pandas as pd
import pyarrow as pa
from sqlalchemy import (BigInteger, Boolean, Date, DateTime, Double, Integer, SmallInteger, String, Table,
                        bindparam, column, insert, select, table)
from sqlalchemy.engine import Connection
from sqlalchemy.exc import DBAPIError

from panel.data import DAY_RANGE, first_outside_days
from panel.store.errors import StoreError

_stage_numbers = itertools.count()


def _raw(conn: Connection):
    return conn.connection.dbapi_connection


def has_bulk_path(conn: Connection) -> bool:
    """Whether ``conn``'s database has a bulk path here (DuckDB, or PostgreSQL through psycopg 3)."""
    return conn.dialect.name == "duckdb" or (conn.dialect.name == "postgresql" and conn.dialect.driver == "psycopg")


def insert_frame(conn: Connection, target: Table, frame: pd.DataFrame, fixed: dict | None = None,
                 native: bool | None = None) -> int:
    """Insert ``frame`` (columns named as ``target``'s) plus the constant columns ``fixed`` into
    ``target``; returns the row count.  ``native=None`` takes the database's bulk path when there is
    one (:func:`has_bulk_path`), ``True`` insists on it, ``False`` uses executemany."""
    fixed = dict(fixed or {})
    if len(frame) == 0:
        return 0
    names = list(frame.columns)
    if native is None:
        native = has_bulk_path(conn)
    if native and conn.dialect.name == "postgresql":
        return _copy_rows(conn, target, frame, fixed)
    if native:
        stage_name = f"_riskprem_stage_{next(_stage_numbers)}"
        raw = _raw(conn)
        raw.register(stage_name, _arrow(frame))
        try:
            stage = table(stage_name, *(column(n) for n in names))
            consts = [bindparam(f"fixed_{k}", v, type_=target.c[k].type) for k, v in fixed.items()]
            conn.execute(insert(target).from_select(list(fixed) + names,
                                                    select(*consts, *(stage.c[n] for n in names))))
        finally:
            raw.unregister(stage_name)
        return len(frame)
    records = []
    for row in frame.itertuples(index=False, name=None):
        record = dict(fixed)
        for name, value in zip(names, row):
            record[name] = _python(value)
        records.append(record)
    for start in range(0, len(records), 10_000):
        conn.execute(insert(target), records[start:start + 10_000])
    return len(records)


#: psycopg type names of the binary COPY, by SQLAlchemy column type (most specific first).
_COPY_TYPES = ((BigInteger, "int8"), (SmallInteger, "int2"), (Integer, "int4"), (Double, "float8"),
               (Boolean, "bool"), (DateTime, "timestamp"), (Date, "date"), (String, "text"))


def _copy_type(column_) -> str:
    for kind, name in _COPY_TYPES:
        if isinstance(column_.type, kind):
            return name
    raise TypeError(f"no COPY type for column {column_.name} ({column_.type})")


def _copy_rows(conn: Connection, target: Table, frame: pd.DataFrame, fixed: dict) -> int:
    """PostgreSQL's COPY through psycopg 3, on the connection of the caller's transaction."""
    names = list(fixed) + list(frame.columns)
    kinds = [_copy_type(target.c[n]) for n in names]
    n = len(frame)
    columns = [itertools.repeat(_python(v), n) for v in fixed.values()]
    columns += [_copy_values(frame[name], kind) for name, kind in zip(frame.columns, kinds[len(fixed):])]
    quote = conn.dialect.identifier_preparer.quote
    sql = (f"COPY {quote(target.name)} ({', '.join(quote(n) for n in names)}) "
           "FROM STDIN (FORMAT BINARY)")
    driver = conn.connection.driver_connection
    try:
        with driver.cursor() as cursor, cursor.copy(sql) as copy:
            copy.set_types(kinds)
            for row in zip(*columns):
                copy.write_row(row)
    except conn.dialect.loaded_dbapi.Error as error:
        raise DBAPIError.instance(sql, None, error, conn.dialect.loaded_dbapi.Error) from None
    return n


def _copy_values(values: pd.Series, kind: str) -> list:
    """One frame column as Python values of the COPY type ``kind``; missing values are None."""
    missing = values.isna().to_numpy()
    if kind in ("date", "timestamp"):
        stamps = pd.to_datetime(values)
        if stamps.dt.tz is not None:
            stamps = stamps.dt.tz_convert("UTC").dt.tz_localize(None)
        # few distinct dates in a long table: convert each once
        unique, where = np.unique(stamps.to_numpy(dtype="datetime64[us]"), return_inverse=True)
        as_python = [None if np.isnat(u) else pd.Timestamp(u).to_pydatetime() for u in unique]
        if kind == "date":
            as_python = [None if v is None else v.date() for v in as_python]
        out = [as_python[i] for i in where.ravel()]
    elif kind == "float8":
        out = values.to_numpy(dtype="float64").tolist()
    elif kind in ("int8", "int4", "int2"):
        out = ([None if m else int(v) for v, m in zip(values.to_numpy(dtype=object), missing)]
               if missing.any() else values.to_numpy(dtype="int64").tolist())
    elif kind == "bool":
        out = [bool(v) for v in values.to_numpy(dtype=object)]
    else:
        out = [str(v) for v in values.to_numpy(dtype=object)]
    if missing.any():
        for i in np.flatnonzero(missing):
            out[i] = None
    return out


def _arrow(frame: pd.DataFrame):
    """The frame as an Arrow table (DuckDB scans it about twice as fast as pandas string columns);
    the frame itself when Arrow cannot type a column (DuckDB then converts it)."""
    try:
        return pa.Table.from_pandas(frame, preserve_index=False)
    except (pa.ArrowException, TypeError, ValueError):
        return frame


def _python(value):
    if value is None or value is pd.NaT:
        return None
    if isinstance(value, pd.Timestamp):
        return value.to_pydatetime()
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and math.isnan(value):
        return None
    try:
        if pd.isna(value):
            return None
    except (TypeError, ValueError):
        pass
    return value


def read_frame(conn: Connection, statement, params: dict | None = None) -> pd.DataFrame:
    """Run ``statement`` and return its rows as a DataFrame (DuckDB: straight from the result).

    Other databases give the same column types as DuckDB's result: dates and timestamps as
    ``datetime64[us]`` (drivers return ``datetime.date`` objects, which pandas keeps as objects)."""
    result = conn.execute(statement, params or {})
    if conn.dialect.name == "duckdb":
        return _days_checked(result.cursor.fetch_df())
    frame = pd.DataFrame(result.fetchall(), columns=list(result.keys()))
    for name in frame.columns:
        column = frame[name]
        if column.dtype == object:
            present = column.dropna()
            if len(present) and all(isinstance(v, (date, datetime)) for v in present):
                frame[name] = pd.to_datetime(column).astype("datetime64[us]")
        elif isinstance(column.dtype, np.dtype) and column.dtype.kind == "M":
            frame[name] = column.astype("datetime64[us]")
    return _days_checked(frame)


def _days_checked(frame: pd.DataFrame) -> pd.DataFrame:
    """``frame``, refusing a stored date that a panel cannot hold (written by another program: riskprem
    never stores one), before it is cast to nanoseconds somewhere and shifted by centuries."""
    for name in frame.columns:
        column = frame[name]
        if isinstance(column.dtype, np.dtype) and column.dtype.kind == "M":
            outside = first_outside_days(column.to_numpy())
            if outside is not None:
                raise StoreError(f"the store holds the date {str(column.iloc[outside])[:10]} (column {name}), "
                                 f"outside the dates riskprem can hold ({DAY_RANGE}); it was changed "
                                 "outside riskprem: restore it from a backup or ingest the data again")
    return frame
