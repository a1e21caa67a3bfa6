"""Writing datasets and runs.  Every write is ONE transaction: it is in the store whole or not at all.
"""

from __future__ import annotations

from datetime import date, datetime, timedelta

import numpy as np
import pandas as pd
from sqlalchemy import select
from sqlalchemy.engine import Connection
from sqlalchemy.exc import DBAPIError

from panel.data import Panel, canonical_hash
from panel.store import schema
from panel.store._io import insert_frame
from panel.store.handle import Store
from panel.store.environment import backfill_key, json_ready, run_environment, utc_now
from panel.store.errors import StoreError

#: ``runs`` columns a caller may give (``id`` comes from the sequence).
RUN_FIELDS = tuple(c.name for c in schema.runs.columns if c.name != "id")
_REQUIRED_RUN = ("dataset_hash", "kind", "settings", "status")
_TABLE_ALIASES = {"factor_paths": "factors", "em_trace": "trace"}


# ---------------------------------------------------------------------------------------------
# datasets

def _panel_rows(panel: Panel) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame]:
    values = panel.values
    assets = pd.DataFrame({"position": np.arange(values.shape[1], dtype="int32"),
                           "asset": [str(a) for a in values.columns]})
    dates = pd.DataFrame({"date": values.index.values})
    array = values.to_numpy(dtype="float64")
    keep = ~np.isnan(array)
    rows, cols = np.nonzero(keep)
    cells = pd.DataFrame({"date": values.index.values[rows],
                          "asset": np.asarray(assets["asset"], dtype=object)[cols],
                          "value": array[rows, cols]})
    return assets, dates, cells


def write_dataset(store: Store, panel: Panel, name: str) -> str:
    """Store ``panel`` under ``name``; returns its hash.

    Idempotent by hash: the values are written once; writing the same panel again only (re)points
    ``name`` at it.  A name may be re-ingested with new data: it then resolves to the newest hash,
    and ``dataset_names`` keeps the history.
    """
    store.require_writable("write a dataset")
    store.require_current()
    try:
        with store.engine.begin() as conn:
            return insert_dataset(conn, panel, name)
    except DBAPIError as error:
        raise StoreError(f"could not write dataset {name!r}, nothing was stored: {store.error_line(error)}") from None


def insert_dataset(conn: Connection, panel: Panel, name: str) -> str:
    """The body of :func:`write_dataset` on ``conn``, inside the caller's transaction."""
    if not isinstance(name, str) or not name.strip():
        raise StoreError("a dataset needs a non-empty name; pass name='...'")
    name = name.strip()
    digest = canonical_hash(panel.values)
    if panel.hash != digest:
        raise StoreError(f"panel hash {panel.hash[:12]} does not match its values ({digest[:12]}); "
                         "build it with Panel.from_frame or panel.ingest")
    meta = json_ready(dict(panel.meta), "panel.meta")
    ds, names = schema.datasets, schema.dataset_names
    if conn.execute(select(ds.c.hash).where(ds.c.hash == digest)).first() is None:
        assets, dates, cells = _panel_rows(panel)
        index = panel.values.index
        conn.execute(ds.insert().values(
            hash=digest, name=name, source_file=_text(meta.get("source_file", meta.get("source"))),
            layout=_text(meta.get("layout")), units=_text(meta.get("units")), returns=panel.returns,
            frequency=panel.frequency, periods_per_year=int(panel.periods_per_year),
            n_assets=int(panel.values.shape[1]), n_dates=int(panel.values.shape[0]),
            n_values=int(len(cells)), first_date=index[0].date() if len(index) else None,
            last_date=index[-1].date() if len(index) else None,
            warnings=[str(w) for w in panel.warnings], ingest_meta=meta, created_utc=utc_now()))
        insert_frame(conn, schema.dataset_assets, assets, {"hash": digest})
        insert_frame(conn, schema.dataset_dates, dates, {"hash": digest})
        insert_frame(conn, schema.dataset_values, cells, {"hash": digest})
    latest = conn.execute(select(names.c.revision, names.c.hash).where(names.c.name == name)
                          .order_by(names.c.revision.desc()).limit(1)).first()
    if latest is None or latest.hash != digest:
        conn.execute(names.insert().values(name=name, revision=1 if latest is None else latest.revision + 1,
                                           hash=digest, created_utc=utc_now()))
    return digest


def _text(value) -> str | None:
    return None if value is None else str(value)


# ---------------------------------------------------------------------------------------------
# runs

def _as_date(value, what: str) -> date:
    try:
        stamp = pd.Timestamp(value)
    except (TypeError, ValueError):
        stamp = pd.NaT
    if pd.isna(stamp):
        raise StoreError(f"{what} {value!r} is not a date; give YYYY-MM-DD")
    return stamp.date()


def _check_tables(tables: dict) -> dict[str, pd.DataFrame]:
    checked = {}
    for key, frame in (tables or {}).items():
        kind = _TABLE_ALIASES.get(key, key)
        if kind not in schema.RESULT_TABLES:
            raise StoreError(f"unknown result table {key!r}; use {', '.join(schema.RESULT_TABLES)}")
        if kind in checked:
            raise StoreError(f"result table {kind!r} given twice (as {key!r}); give it once")
        if not isinstance(frame, pd.DataFrame):
            raise StoreError(f"result table {key!r} is a {type(frame).__name__}, not a DataFrame")
        want = [c.name for c in schema.RESULT_TABLES[kind].columns if c.name != "run_id"]
        optional = [c for c in schema.BAYES_COLUMNS.get(kind, ()) if c not in frame.columns]
        if optional:            # an ML run: the Bayesian columns are NULL
            frame = frame.assign(**{c: np.nan for c in optional})
        missing = [c for c in want if c not in frame.columns]
        extra = [str(c) for c in frame.columns if c not in want]
        if missing or extra:
            raise StoreError(f"result table {key!r} has columns {list(map(str, frame.columns))}; expected "
                             f"{want} (missing {missing}, unexpected {extra})")
        checked[kind] = frame[want]
    return checked


def _run_row(run: dict) -> dict:
    unknown = sorted(set(run) - set(RUN_FIELDS))
    if unknown:
        raise StoreError(f"unknown run field(s) {', '.join(unknown)}; known: {', '.join(RUN_FIELDS)}")
    missing = [k for k in _REQUIRED_RUN if run.get(k) in (None, "")]
    if missing:
        raise StoreError(f"run lacks {', '.join(missing)}; give them in the run dict")
    row = {**run_environment(), **{k: v for k, v in run.items()}}
    if not isinstance(row["settings"], dict):
        raise StoreError(f"run settings must be a dict, not {type(row['settings']).__name__}")
    row["settings"] = json_ready(row["settings"], "run settings")
    for key in ("started_utc", "finished_utc"):
        row[key] = _utc(row.get(key), key)
    duration = row.get("duration_s")
    if row["finished_utc"] is None:
        row["finished_utc"] = (row["started_utc"] + timedelta(seconds=float(duration))
                               if row["started_utc"] is not None and duration is not None else utc_now())
    if row["started_utc"] is None:
        row["started_utc"] = row["finished_utc"] - timedelta(seconds=float(duration or 0.0))
    if duration is None:
        row["duration_s"] = (row["finished_utc"] - row["started_utc"]).total_seconds()
    if row.get("backfill_key") is None:
        row["backfill_key"] = backfill_key(row["dataset_hash"], row["settings"])
    for key in ("loglik", "aic", "bic", "duration_s"):
        if row.get(key) is not None:
            row[key] = float(row[key])
    for key in ("n_params", "iterations", "parent_run"):
        if row.get(key) is not None:
            row[key] = int(row[key])
    if row.get("converged") is not None:
        row["converged"] = bool(row["converged"])
    return row


def _utc(value, what: str) -> datetime | None:
    """A naive UTC datetime from a datetime/Timestamp/str (aware values are converted to UTC)."""
    if value is None or (not isinstance(value, str) and pd.isna(value)):
        return None
    try:
        stamp = pd.Timestamp(value)
    except (TypeError, ValueError):
        raise StoreError(f"{what} {value!r} is not a timestamp; give an ISO date-time in UTC") from None
    if stamp.tzinfo is not None:
        stamp = stamp.tz_convert("UTC").tz_localize(None)
    return stamp.to_pydatetime()


def insert_run(conn: Connection, row: dict, tables: dict[str, pd.DataFrame], native: bool | None = None) -> int:
    """Insert a prepared run row and its result tables on ``conn`` (inside the caller's transaction);
    returns the new run id.  Used by :func:`write_run`; checks references, not shapes."""
    ds, runs = schema.datasets, schema.runs
    dataset = conn.execute(select(ds.c.last_date).where(ds.c.hash == row["dataset_hash"])).first()
    if dataset is None:
        raise StoreError(f"dataset {row['dataset_hash'][:12]} is not in the store; write_dataset it first")
    row = dict(row)
    if row.get("as_of") is None:
        row["as_of"] = dataset.last_date
    row["as_of"] = _as_date(row["as_of"], "as_of")
    if row.get("parent_run") is not None:
        if conn.execute(select(runs.c.id).where(runs.c.id == row["parent_run"])).first() is None:
            raise StoreError(f"parent run {row['parent_run']} is not in the store; give an existing run id")
    run_id = int(conn.execute(select(schema.run_id_seq.next_value())).scalar_one())
    conn.execute(runs.insert().values(id=run_id, **row))
    for kind, frame in tables.items():
        insert_frame(conn, schema.RESULT_TABLES[kind], frame, {"run_id": run_id}, native=native)
    return run_id


def write_run(store: Store, run: dict, tables: dict[str, pd.DataFrame] | None = None, *,
              native: bool | None = None) -> int:
    """Write one run (a vintage) and all its result rows in ONE transaction; returns the run id.

    ``run``: ``runs`` columns (:data:`RUN_FIELDS`); required ``dataset_hash``, ``kind``, ``settings``
    (dict), ``status``.  Defaults: ``as_of`` = the dataset's last date, environment columns = this
    process, ``finished_utc`` = ``started_utc + duration_s`` or now, ``started_utc`` =
    ``finished_utc - duration_s``, ``duration_s`` from the two (aware timestamps become UTC),
    ``backfill_key`` from dataset hash and settings.  ``tables``: DataFrames keyed by the ``PanelFit``
    attribute (``estimates``, ``factors``, ``parameters``, ``trace``, ``diagnostics``; the table names
    ``factor_paths`` and ``em_trace`` work too) with exactly the PanelFit columns.  ``native`` forces
    (True) or avoids (False) DuckDB's bulk path; default: use it on DuckDB.
    """
    store.require_writable("write a run")
    store.require_current()
    row = _run_row(dict(run))
    checked = _check_tables(tables or {})
    try:
        with store.engine.begin() as conn:
            return insert_run(conn, row, checked, native=native)
    except DBAPIError as error:
        raise StoreError(f"could not write the run, nothing was stored: {store.error_line(error)}") from None


def from_fit(fit, **run) -> tuple[dict, dict[str, pd.DataFrame]]:
    """``(run, tables)`` for :func:`write_run` from a ``PanelFit``.

    Fills ``dataset_hash`` (the fitted panel's hash), ``as_of`` (its last date), ``settings``
    (``fit.settings()``), status, fit statistics and duration; ``run`` gives the rest (``kind``,
    ``label``, ``parent_run``, ``started_utc``, ...) and overrides.  When a backfill fits cut panels,
    pass the full dataset's hash as ``dataset_hash`` and the cut-off as ``as_of``.
    """
    fields = {"dataset_hash": fit.panel.hash, "as_of": fit.dates[-1], "settings": fit.settings(),
              "status": fit.status, "loglik": fit.loglik, "aic": fit.aic, "bic": fit.bic,
              "n_params": fit.n_params, "iterations": fit.n_iter, "converged": fit.converged,
              "message": fit.message, "duration_s": fit.elapsed}
    fields.update(run)
    return fields, dict(fit.tables())
