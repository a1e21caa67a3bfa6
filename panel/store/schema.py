"""The store's schema: the project's ONE ``MetaData``.

The tables mirror the numbered files in the top-level ``migrations/`` folder, which create them (a
test checks that a store built by the migrations has exactly these columns).  The result tables use
the column names of the ``PanelFit`` tables (DEVELOPERS.md) plus ``run_id``, so a fit's DataFrames go
in as they are.

Design rules that keep the schema evolvable on DuckDB:

* no foreign keys and no secondary indexes: DuckDB refuses some ALTERs on tables that other objects
  depend on; the writer checks references inside its transaction instead;
* the bulk tables (``dataset_values``, ``estimates``, ``factor_paths``, ``em_trace``,
  ``diagnostics``, ``parameters``) have no primary key, so millions of rows load without building an
  index; a run's rows are written once, in one transaction, and never updated;
* changes are additive (new tables, new nullable columns).

All timestamps are naive ``TIMESTAMP`` values in UTC (columns end in ``_utc``); dates are ``DATE``.
"""

from __future__ import annotations

from sqlalchemy import (BigInteger, Boolean, Column, Date, DateTime, Double, Integer, JSON, MetaData,
                        PrimaryKeyConstraint, Sequence, String, Table)
from sqlalchemy.dialects.postgresql import JSONB

#: Schema version this code reads and writes (the highest numbered file in ``migrations/``).
SCHEMA_VERSION = 3

metadata = MetaData()

#: JSON document column: DuckDB's JSON type, PostgreSQL's JSONB.
Json = JSON().with_variant(JSONB(), "postgresql")

run_id_seq = Sequence("run_id_seq", start=1, metadata=metadata)

schema_version = Table(
    "schema_version", metadata,
    Column("version", Integer, nullable=False),
    Column("applied_utc", DateTime, nullable=False),
    Column("description", String, nullable=False),
    PrimaryKeyConstraint("version"),
)

store_meta = Table(
    "store_meta", metadata,
    Column("key", String, nullable=False),
    Column("value", String),
    PrimaryKeyConstraint("key"),
)

datasets = Table(
    "datasets", metadata,
    Column("hash", String, nullable=False),             # canonical_hash of the values
    Column("name", String, nullable=False),             # name given at first ingest
    Column("source_file", String),
    Column("layout", String),
    Column("units", String),
    Column("returns", String, nullable=False),          # simple | log
    Column("frequency", String, nullable=False),        # B W M Q A
    Column("periods_per_year", Integer, nullable=False),
    Column("n_assets", Integer, nullable=False),
    Column("n_dates", Integer, nullable=False),
    Column("n_values", BigInteger, nullable=False),     # non-missing cells
    Column("first_date", Date),
    Column("last_date", Date),
    Column("warnings", Json, nullable=False),           # list of str
    Column("ingest_meta", Json, nullable=False),        # Panel.meta: provenance and ingest options
    Column("created_utc", DateTime, nullable=False),
    PrimaryKeyConstraint("hash"),
)

dataset_names = Table(  # a name's history: the newest revision is what the name means now
    "dataset_names", metadata,
    Column("name", String, nullable=False),
    Column("revision", Integer, nullable=False),
    Column("hash", String, nullable=False),
    Column("created_utc", DateTime, nullable=False),
    PrimaryKeyConstraint("name", "revision"),
)

dataset_assets = Table(  # column order of the panel
    "dataset_assets", metadata,
    Column("hash", String, nullable=False),
    Column("position", Integer, nullable=False),
    Column("asset", String, nullable=False),
    PrimaryKeyConstraint("hash", "position"),
)

dataset_dates = Table(  # the full date index, including dates where every asset is missing
    "dataset_dates", metadata,
    Column("hash", String, nullable=False),
    Column("date", Date, nullable=False),
    PrimaryKeyConstraint("hash", "date"),
)

dataset_values = Table(  # the canonical panel, non-missing cells only
    "dataset_values", metadata,
    Column("hash", String, nullable=False),
    Column("date", Date, nullable=False),
    Column("asset", String, nullable=False),
    Column("value", Double, nullable=False),
)

runs = Table(
    "runs", metadata,
    Column("id", BigInteger, run_id_seq, server_default=run_id_seq.next_value(), nullable=False),
    Column("dataset_hash", String, nullable=False),
    Column("as_of", Date, nullable=False),              # data cut-off of this vintage
    Column("label", String),
    Column("kind", String, nullable=False),             # fit | backfill | ...
    Column("settings", Json, nullable=False),           # ModelSpec.to_dict() and run options
    Column("riskprem_version", String),
    Column("git_commit", String),
    Column("python_version", String),
    Column("numpy_version", String),
    Column("scipy_version", String),
    Column("pandas_version", String),
    Column("duckdb_version", String),
    Column("platform", String),
    Column("status", String, nullable=False),           # PanelFit.status, or failed
    Column("started_utc", DateTime),
    Column("finished_utc", DateTime),
    Column("duration_s", Double),
    Column("loglik", Double),
    Column("aic", Double),
    Column("bic", Double),
    Column("n_params", Integer),
    Column("iterations", Integer),
    Column("converged", Boolean),
    Column("message", String),
    Column("parent_run", BigInteger),                   # warm start source
    Column("backfill_key", String),                     # version 2: see environment.backfill_key
    PrimaryKeyConstraint("id"),
)

parameters = Table(
    "parameters", metadata,
    Column("run_id", BigInteger, nullable=False),
    Column("name", String, nullable=False),
    Column("row", String),
    Column("col", String),
    Column("value", Double),
    Column("std_error", Double),                        # Bayes: the posterior std
    Column("q05", Double),                              # version 3: Bayes posterior (NULL for ML)
    Column("q50", Double),
    Column("q95", Double),
    Column("rhat", Double),
    Column("ess_bulk", Double),
    Column("ess_tail", Double),
)

estimates = Table(
    "estimates", metadata,
    Column("run_id", BigInteger, nullable=False),
    Column("date", Date, nullable=False),
    Column("asset", String, nullable=False),
    Column("filtered_mean", Double),
    Column("filtered_std", Double),
    Column("smoothed_mean", Double),
    Column("smoothed_std", Double),
    Column("predictive_mean", Double),
    Column("predictive_std", Double),
    Column("std_innovation", Double),
    *(Column(name, Double) for name in ("filtered_q05", "filtered_q95", "smoothed_q05",
                                        "smoothed_q95")),                  # version 3: Bayes only
)

factor_paths = Table(
    "factor_paths", metadata,
    Column("run_id", BigInteger, nullable=False),
    Column("date", Date, nullable=False),
    Column("factor", Integer, nullable=False),
    Column("filtered_mean", Double),
    Column("filtered_std", Double),
    Column("smoothed_mean", Double),
    Column("smoothed_std", Double),
    *(Column(name, Double) for name in ("filtered_q05", "filtered_q95", "smoothed_q05",
                                        "smoothed_q95")),                  # version 3: Bayes only
)

em_trace = Table(
    "em_trace", metadata,
    Column("run_id", BigInteger, nullable=False),
    Column("iteration", Integer, nullable=False),
    Column("objective", Double),
    Column("loglik", Double),
    Column("elapsed_s", Double),
    Column("step", String),                             # label of the step taken
)

diagnostics = Table(
    "diagnostics", metadata,
    Column("run_id", BigInteger, nullable=False),
    Column("asset", String, nullable=False),
    Column("statistic", String, nullable=False),
    Column("lags", Integer),
    Column("value", Double),
    Column("pvalue", Double),
)

posterior_draws = Table(  # version 3: a Bayesian run's summary parameter draws (panel.bayes.estimate)
    "posterior_draws", metadata,
    Column("run_id", BigInteger, nullable=False),
    Column("draw", Integer, nullable=False),
    Column("name", String, nullable=False),
    Column("row", String),
    Column("col", String),
    Column("value", Double),
)

#: A run's result tables, keyed by the ``PanelFit`` attribute that holds them (``posterior_draws``:
#: ``PanelFit.tables()`` of a Bayesian run only).
RESULT_TABLES: dict[str, Table] = {
    "estimates": estimates,
    "factors": factor_paths,
    "parameters": parameters,
    "trace": em_trace,
    "diagnostics": diagnostics,
    "posterior_draws": posterior_draws,
}

#: Columns only a Bayesian run fills: a writer may leave them out (NULL), and a reader leaves them
#: out where a run has none, so ML runs read back with exactly the PanelFit columns.
BAYES_COLUMNS: dict[str, tuple[str, ...]] = {
    "estimates": ("filtered_q05", "filtered_q95", "smoothed_q05", "smoothed_q95"),
    "factors": ("filtered_q05", "filtered_q95", "smoothed_q05", "smoothed_q95"),
    "parameters": ("q05", "q50", "q95", "rhat", "ess_bulk", "ess_tail"),
}

#: Keys of the natural row order used when reading a result table back.
RESULT_ORDER: dict[str, tuple[str, ...]] = {
    "estimates": ("date", "asset"),
    "factors": ("factor", "date"),
    "parameters": ("name", "row", "col"),
    "trace": ("iteration",),
    "diagnostics": ("asset", "statistic", "lags"),
    "posterior_draws": ("draw", "name", "row", "col"),
}
