"""Moving DataFrames in and out: DuckDB's native path, with a portable SQLAlchemy fallback.

Native writes register the DataFrame on the raw DuckDB connection beneath the SQLAlchemy connection,
so ``INSERT INTO t SELECT ... FROM <frame>`` runs inside the caller's transaction.
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pandas as pd
import pyarrow as pa
from sqlalchemy import Table, bindparam, column, insert, select, table
from sqlalchemy.engine import Connection

_stage_numbers = itertools.count()


def _raw(conn: Connection):
    return conn.connection.dbapi_connection


def insert_frame(conn: Connection, target: Table, frame: pd.DataFrame, fixed: dict | None = None,
                 native: bool | None = None) -> int:
    """Insert ``frame`` (columns named as ``target``'s) plus the constant columns ``fixed`` into
    ``target``; returns the row count.  ``native=None`` picks DuckDB's path when available."""
    fixed = dict(fixed or {})
    if len(frame) == 0:
        return 0
    names = list(frame.columns)
    if native is None:
        native = conn.dialect.name == "duckdb"
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
    """Run ``statement`` and return its rows as a DataFrame (DuckDB: straight from the result)."""
    result = conn.execute(statement, params or {})
    if conn.dialect.name == "duckdb":
        return result.cursor.fetch_df()
    return pd.DataFrame(result.fetchall(), columns=list(result.keys()))
