"""Reading datasets and runs back, and exporting a run's rows to Parquet or CSV."""

from __future__ import annotations

import json
import re
from pathlib import Path

import numpy as np
import pandas as pd
from sqlalchemy import String, and_, func, select

from panel.data import Panel, canonical_hash
from panel.files import FORMULA_STARTS, OutputError, check_target, formula_safe_frame, write_atomically
from panel.store import schema
from panel.store._io import read_frame
from panel.store.handle import Store
from panel.store.errors import StoreError

#: Statuses that do not count as a finished vintage (``find_run`` ignores them).
FAILED_STATUSES = ("failed",)
_HEX = re.compile(r"^[0-9a-f]{6,64}$")


def resolve_dataset(store: Store, name_or_hash: str) -> str:
    """The dataset hash for a full hash, a dataset name (its newest revision) or a unique hash
    prefix of at least 6 hex digits."""
    store.require_current()
    key = str(name_or_hash).strip()
    ds, names = schema.datasets, schema.dataset_names
    with store.engine.connect() as conn:
        if conn.execute(select(ds.c.hash).where(ds.c.hash == key)).first() is not None:
            return key
        named = conn.execute(select(names.c.hash).where(names.c.name == key)
                             .order_by(names.c.revision.desc()).limit(1)).first()
        if named is not None:
            return named.hash
        if _HEX.match(key):
            hits = conn.execute(select(ds.c.hash).where(ds.c.hash.startswith(key, autoescape=True))
                                .limit(2)).scalars().all()
            if len(hits) == 1:
                return hits[0]
            if len(hits) > 1:
                raise StoreError(f"dataset prefix {key!r} matches several datasets in {store.display}; "
                                 "give more digits of the hash")
    raise StoreError(f"no dataset {key!r} in {store.display}; list datasets with `riskprem datasets`")


def list_datasets(store: Store) -> pd.DataFrame:
    """One row per dataset, oldest first, with the names that currently resolve to it and its run
    count."""
    store.require_current()
    ds, names, runs = schema.datasets, schema.dataset_names, schema.runs
    n_runs = (select(runs.c.dataset_hash, func.count().label("n_runs"))
              .group_by(runs.c.dataset_hash).subquery())
    statement = (select(ds.c.hash, ds.c.name, ds.c.source_file, ds.c.frequency, ds.c.returns,
                        ds.c.n_assets, ds.c.n_dates, ds.c.n_values, ds.c.first_date, ds.c.last_date,
                        ds.c.created_utc, func.coalesce(n_runs.c.n_runs, 0).label("n_runs"))
                 .select_from(ds.outerjoin(n_runs, n_runs.c.dataset_hash == ds.c.hash))
                 .order_by(ds.c.created_utc, ds.c.hash))
    with store.engine.connect() as conn:
        frame = read_frame(conn, statement)
        history = conn.execute(select(names.c.name, names.c.revision, names.c.hash)
                               .order_by(names.c.name, names.c.revision)).all()
    current: dict[str, str] = {}
    for name, _, digest in history:
        current[name] = digest
    by_hash: dict[str, list[str]] = {}
    for name, digest in sorted(current.items()):
        by_hash.setdefault(digest, []).append(name)
    frame.insert(2, "current_names", [", ".join(by_hash.get(h, [])) for h in frame["hash"]])
    return frame


def load_panel(store: Store, hash_or_name: str) -> Panel:
    """Rebuild the stored :class:`Panel` (same values, asset order, dates, hash, warnings, meta)."""
    digest = resolve_dataset(store, hash_or_name)
    ds = schema.datasets
    assets_t, dates_t, values_t = schema.dataset_assets, schema.dataset_dates, schema.dataset_values
    with store.engine.connect() as conn:
        row = conn.execute(select(ds).where(ds.c.hash == digest)).mappings().one()
        assets = conn.execute(select(assets_t.c.asset).where(assets_t.c.hash == digest)
                              .order_by(assets_t.c.position)).scalars().all()
        dates = read_frame(conn, select(dates_t.c.date).where(dates_t.c.hash == digest)
                           .order_by(dates_t.c.date))
        cells = read_frame(conn, select(values_t.c.date, values_t.c.asset, values_t.c.value)
                           .where(values_t.c.hash == digest))
    index = pd.DatetimeIndex(pd.to_datetime(dates["date"]), name="date").as_unit("us")
    array = np.full((len(index), len(assets)), np.nan)
    if len(cells):
        rows = index.get_indexer(pd.DatetimeIndex(pd.to_datetime(cells["date"])).as_unit("us"))
        cols = pd.Index(assets).get_indexer(cells["asset"])  # vectorised: 600,000 cells in 40 ms
        if (rows < 0).any() or (cols < 0).any():
            raise StoreError(f"dataset {digest[:12]} in {store.display} is damaged (cells outside its "
                             "dates or assets); ingest the source file again")
        array[rows, cols] = cells["value"].to_numpy(dtype="float64")
    values = pd.DataFrame(array, index=index)
    values.columns = [str(a) for a in assets]  # as Panel.from_frame builds them
    if canonical_hash(values) != digest:
        raise StoreError(f"dataset {digest[:12]} in {store.display} does not match its hash; "
                         "ingest the source file again")
    return Panel(values=values, frequency=row["frequency"], periods_per_year=int(row["periods_per_year"]),
                 returns=row["returns"], hash=digest, warnings=tuple(row["warnings"] or ()),
                 meta=dict(row["ingest_meta"] or {}))


def list_runs(store: Store, dataset: str | None = None) -> pd.DataFrame:
    """All runs (or those of one dataset, by name or hash), in id order; ``settings`` as dicts."""
    store.require_current()
    runs = schema.runs
    statement = select(runs).order_by(runs.c.id)
    if dataset is not None:
        statement = statement.where(runs.c.dataset_hash == resolve_dataset(store, dataset))
    with store.engine.connect() as conn:
        frame = read_frame(conn, statement)
    frame["settings"] = [json.loads(s) if isinstance(s, str) else s for s in frame["settings"]]
    return frame


def get_run(store: Store, run_id: int) -> dict:
    """The ``runs`` row of ``run_id`` as a dict (``settings`` a dict, ``as_of`` a date)."""
    store.require_current()
    try:
        key = int(run_id)
    except (TypeError, ValueError):
        raise StoreError(f"run id {run_id!r} is not a number; list runs with `riskprem runs`") from None
    with store.engine.connect() as conn:
        row = conn.execute(select(schema.runs).where(schema.runs.c.id == key)).mappings().first()
    if row is None:
        raise StoreError(f"no run {key} in {store.display}; list runs with `riskprem runs`")
    return dict(row)


def is_bayes(run: dict) -> bool:
    """Whether a ``runs`` row is a Bayesian run (its recorded spec says ``estimation: bayes``)."""
    settings = run.get("settings")
    settings = json.loads(settings) if isinstance(settings, str) else (settings or {})
    return (settings.get("spec") or {}).get("estimation") == "bayes"


def run_tables(store: Store, run_id: int, kinds=None) -> dict[str, pd.DataFrame]:
    """A run's result tables keyed by ``PanelFit`` attribute, with the PanelFit columns, rows sorted by
    their keys (see ``schema.RESULT_ORDER``); ``kinds``: only these tables (default all the run
    has: ``posterior_draws`` only for a Bayesian run)."""
    run = get_run(store, run_id)
    key = run["id"]
    if kinds is None:           # every table of the run: posterior draws only for a Bayesian one
        kinds = [k for k in schema.RESULT_TABLES if k != "posterior_draws" or is_bayes(run)]
    out = {}
    with store.engine.connect() as conn:
        for kind, table in schema.RESULT_TABLES.items():
            if kind not in kinds:
                continue
            statement = (select(*(c for c in table.columns if c.name != "run_id"))
                         .where(table.c.run_id == key)
                         .order_by(*(table.c[n] for n in schema.RESULT_ORDER[kind])))
            out[kind] = _without_empty_bayes(read_frame(conn, statement), kind)
    return out


def _without_empty_bayes(frame: pd.DataFrame, kind: str) -> pd.DataFrame:
    """``frame`` without the Bayesian columns (``schema.BAYES_COLUMNS``) when they are all NULL:
    an ML run reads back with exactly the PanelFit columns."""
    empty = [c for c in schema.BAYES_COLUMNS.get(kind, ()) if c in frame and frame[c].isna().all()]
    return frame.drop(columns=empty) if len(empty) == len(schema.BAYES_COLUMNS.get(kind, ())) else frame


def run_estimates(store: Store, run_id: int, assets=None, last: int | None = None,
                  columns=None, with_return: bool = False) -> tuple[pd.DataFrame, int]:
    """``(rows, n_dates)``: a run's estimates (``columns``, default all; sorted by date and asset)
    of ``assets`` (default all) at its last ``last`` dates (None or 0: all), selected in the
    database; ``n_dates`` counts the dates of those assets before the cut.  ``with_return`` adds
    ``has_return``: whether the run's dataset has the asset's return at that date (where it has
    none, the premium is the model's prediction)."""
    run = get_run(store, run_id)
    est = schema.estimates
    where = [est.c.run_id == run["id"]]
    if assets is not None:
        where.append(est.c.asset.in_(list(assets)))
    names = [c for c in est.columns if c.name != "run_id" and (columns is None or c.name in columns)]
    with store.engine.connect() as conn:
        n_dates = conn.execute(select(func.count(est.c.date.distinct())).where(*where)).scalar_one()
        statement = select(*names).where(*where)
        if with_return:
            dv = schema.dataset_values
            statement = statement.add_columns(dv.c.value.is_not(None).label("has_return")).select_from(
                est.outerjoin(dv, and_(dv.c.hash == run["dataset_hash"], dv.c.date == est.c.date,
                                       dv.c.asset == est.c.asset)))
        if last:
            recent = (select(est.c.date).where(*where).group_by(est.c.date)
                      .order_by(est.c.date.desc()).limit(int(last)))
            statement = statement.where(est.c.date.in_(recent.scalar_subquery()))
        frame = read_frame(conn, statement.order_by(est.c.date, est.c.asset))
    if columns is None:
        frame = _without_empty_bayes(frame, "estimates")
    return frame, int(n_dates)


def dataset_layout(store: Store, digest: str) -> dict:
    """``{"assets": [...] in stored order, "frequency": ..., "periods_per_year": ...}`` of a stored
    dataset, without reading its values."""
    ds, assets_t = schema.datasets, schema.dataset_assets
    with store.engine.connect() as conn:
        row = conn.execute(select(ds.c.frequency, ds.c.periods_per_year).where(ds.c.hash == digest)).first()
        if row is None:
            raise StoreError(f"no dataset {digest[:12]} in {store.display}; list datasets with "
                             "`riskprem datasets`")
        assets = conn.execute(select(assets_t.c.asset).where(assets_t.c.hash == digest)
                              .order_by(assets_t.c.position)).scalars().all()
    return {"assets": [str(a) for a in assets], "frequency": row.frequency,
            "periods_per_year": int(row.periods_per_year)}


def find_run(store: Store, dataset_hash: str, backfill_key: str, as_of) -> int | None:
    """Newest finished run of ``dataset_hash`` with ``backfill_key`` and cut-off ``as_of``, or None
    (an idempotent backfill skips vintages that have one)."""
    store.require_current()
    runs = schema.runs
    day = pd.Timestamp(as_of).date()
    with store.engine.connect() as conn:
        found = conn.execute(select(runs.c.id)
                             .where(runs.c.dataset_hash == dataset_hash, runs.c.backfill_key == backfill_key,
                                    runs.c.as_of == day, runs.c.status.not_in(FAILED_STATUSES))
                             .order_by(runs.c.id.desc()).limit(1)).scalar_one_or_none()
    return None if found is None else int(found)


def export_run(store: Store, run_id: int, path, table: str = "estimates", overwrite: bool = False) -> Path:
    """Write one result table of a run (default ``estimates``; per-period units, PanelFit columns) to
    ``path``: Parquet for ``.parquet``/``.pq``, CSV for ``.csv``.  DuckDB writes the file itself
    (COPY); other databases go through pandas.  Returns the path.

    The store itself is never a target; an existing file is replaced only with ``overwrite``; the
    file appears whole or not at all (:mod:`panel.files`).  In CSV, text that a spreadsheet would run
    as a formula (an asset named ``=1+2``) gets a single quote in front; Parquet keeps it as stored."""
    target = Path(path)
    suffix = target.suffix.lower()
    if suffix not in (".parquet", ".pq", ".csv"):
        raise StoreError(f"cannot export to {target.name}: use a .parquet or .csv file name")
    if table not in schema.RESULT_TABLES:
        raise StoreError(f"unknown result table {table!r}; use {', '.join(schema.RESULT_TABLES)}")
    store_files = () if store.path is None else (store.path, Path(str(store.path) + ".wal"))
    try:
        target = check_target(target, protected=store_files, overwrite=overwrite)
    except OutputError as error:
        raise StoreError(str(error)) from None
    run = get_run(store, run_id)
    key = run["id"]
    source = schema.RESULT_TABLES[table]
    skip = () if is_bayes(run) else schema.BAYES_COLUMNS.get(table, ())    # NULL for ML runs
    columns = [c for c in source.columns if c.name != "run_id" and c.name not in skip]
    csv = suffix == ".csv"
    with store.engine.connect() as conn:
        if store.is_duckdb:
            quote = conn.dialect.identifier_preparer.quote
            names = ", ".join(f"{_formula_safe_sql(quote(c.name))} AS {quote(c.name)}"
                              if csv and isinstance(c.type, String) else quote(c.name) for c in columns)
            order = ", ".join(quote(n) for n in schema.RESULT_ORDER[table])
            sql = f"SELECT {names} FROM {quote(source.name)} WHERE run_id = ? ORDER BY {order}"
            relation = conn.connection.dbapi_connection.sql(sql, params=[key])

            def write(file: Path) -> None:
                if csv:
                    relation.write_csv(str(file), header=True)
                else:
                    relation.write_parquet(str(file))
        else:
            frame = read_frame(conn, select(*columns).where(source.c.run_id == key)
                               .order_by(*(source.c[n] for n in schema.RESULT_ORDER[table])))

            def write(file: Path) -> None:
                if csv:
                    formula_safe_frame(frame).to_csv(file, index=False)
                else:
                    frame.to_parquet(file, index=False)
        try:
            write_atomically(target, write)
        except OutputError as error:
            raise StoreError(str(error)) from None
    return target


def _formula_safe_sql(column: str) -> str:
    """:func:`panel.files.formula_safe` in SQL, for a text column (DuckDB writes the CSV itself)."""
    starts = ", ".join("'" + c.replace("'", "''") + "'" for c in FORMULA_STARTS)
    return f"CASE WHEN substr({column}, 1, 1) IN ({starts}) THEN '''' || {column} ELSE {column} END"
