-- 0001 initial: datasets (canonical panels), runs (vintages) and their result tables.
--
-- Portable SQL for DuckDB and PostgreSQL.  The runner (panel/store/migrate.py) drops comment lines,
-- splits the rest on semicolons (so none may appear inside a statement) and applies it in ONE
-- transaction together with its schema_version row.  JSON is written JSON; the runner reads it as
-- JSONB on PostgreSQL.  No foreign keys, no secondary indexes (DuckDB limits ALTERs on tables that
-- other objects depend on); bulk tables have no primary key.  Timestamps are UTC, without zone.

CREATE TABLE schema_version (
    version INTEGER NOT NULL,
    applied_utc TIMESTAMP NOT NULL,
    description VARCHAR NOT NULL,
    PRIMARY KEY (version)
);

CREATE TABLE store_meta (
    key VARCHAR NOT NULL,
    value VARCHAR,
    PRIMARY KEY (key)
);

CREATE TABLE datasets (
    hash VARCHAR NOT NULL,
    name VARCHAR NOT NULL,
    source_file VARCHAR,
    layout VARCHAR,
    units VARCHAR,
    returns VARCHAR NOT NULL,
    frequency VARCHAR NOT NULL,
    periods_per_year INTEGER NOT NULL,
    n_assets INTEGER NOT NULL,
    n_dates INTEGER NOT NULL,
    n_values BIGINT NOT NULL,
    first_date DATE,
    last_date DATE,
    warnings JSON NOT NULL,
    ingest_meta JSON NOT NULL,
    created_utc TIMESTAMP NOT NULL,
    PRIMARY KEY (hash)
);

CREATE TABLE dataset_names (
    name VARCHAR NOT NULL,
    revision INTEGER NOT NULL,
    hash VARCHAR NOT NULL,
    created_utc TIMESTAMP NOT NULL,
    PRIMARY KEY (name, revision)
);

CREATE TABLE dataset_assets (
    hash VARCHAR NOT NULL,
    position INTEGER NOT NULL,
    asset VARCHAR NOT NULL,
    PRIMARY KEY (hash, position)
);

CREATE TABLE dataset_dates (
    hash VARCHAR NOT NULL,
    date DATE NOT NULL,
    PRIMARY KEY (hash, date)
);

CREATE TABLE dataset_values (
    hash VARCHAR NOT NULL,
    date DATE NOT NULL,
    asset VARCHAR NOT NULL,
    value DOUBLE PRECISION NOT NULL
);

CREATE SEQUENCE run_id_seq START WITH 1;

CREATE TABLE runs (
    id BIGINT DEFAULT nextval('run_id_seq') NOT NULL,
    dataset_hash VARCHAR NOT NULL,
    as_of DATE NOT NULL,
    label VARCHAR,
    kind VARCHAR NOT NULL,
    settings JSON NOT NULL,
    riskprem_version VARCHAR,
    git_commit VARCHAR,
    python_version VARCHAR,
    numpy_version VARCHAR,
    scipy_version VARCHAR,
    pandas_version VARCHAR,
    duckdb_version VARCHAR,
    platform VARCHAR,
    status VARCHAR NOT NULL,
    started_utc TIMESTAMP,
    finished_utc TIMESTAMP,
    duration_s DOUBLE PRECISION,
    loglik DOUBLE PRECISION,
    aic DOUBLE PRECISION,
    bic DOUBLE PRECISION,
    n_params INTEGER,
    iterations INTEGER,
    converged BOOLEAN,
    message VARCHAR,
    parent_run BIGINT,
    PRIMARY KEY (id)
);

CREATE TABLE parameters (
    run_id BIGINT NOT NULL,
    name VARCHAR NOT NULL,
    row VARCHAR,
    col VARCHAR,
    value DOUBLE PRECISION,
    std_error DOUBLE PRECISION
);

CREATE TABLE estimates (
    run_id BIGINT NOT NULL,
    date DATE NOT NULL,
    asset VARCHAR NOT NULL,
    filtered_mean DOUBLE PRECISION,
    filtered_std DOUBLE PRECISION,
    smoothed_mean DOUBLE PRECISION,
    smoothed_std DOUBLE PRECISION,
    predictive_mean DOUBLE PRECISION,
    predictive_std DOUBLE PRECISION,
    std_innovation DOUBLE PRECISION
);

CREATE TABLE factor_paths (
    run_id BIGINT NOT NULL,
    date DATE NOT NULL,
    factor INTEGER NOT NULL,
    filtered_mean DOUBLE PRECISION,
    filtered_std DOUBLE PRECISION,
    smoothed_mean DOUBLE PRECISION,
    smoothed_std DOUBLE PRECISION
);

CREATE TABLE em_trace (
    run_id BIGINT NOT NULL,
    iteration INTEGER NOT NULL,
    objective DOUBLE PRECISION,
    loglik DOUBLE PRECISION,
    elapsed_s DOUBLE PRECISION,
    step VARCHAR
);

CREATE TABLE diagnostics (
    run_id BIGINT NOT NULL,
    asset VARCHAR NOT NULL,
    statistic VARCHAR NOT NULL,
    lags INTEGER,
    value DOUBLE PRECISION,
    pvalue DOUBLE PRECISION
);
