"""Schema and migrations: the numbered SQL files build exactly the tables of panel/store/schema.py."""

import re

import pytest
from sqlalchemy import create_engine

from panel.store import StoreError, open_store, schema_drift
from panel.store import schema
from panel.store.migrate import apply_migrations, head_version, migrations
from panel.store.connection import Store
from tests.store_fixtures import store  # noqa: F401
from tests.backends import BOTH


def test_migration_files_are_numbered_from_one_and_reach_the_code_schema():
    found = migrations()
    assert [m.version for m in found] == list(range(1, len(found) + 1))
    assert len(found) >= 2
    assert head_version() == schema.SCHEMA_VERSION


@BOTH
def test_store_built_by_migrations_matches_the_metadata(store):
    assert store.schema_version == schema.SCHEMA_VERSION
    assert schema_drift(store) == []


def test_drift_check_sees_a_store_at_an_older_version(tmp_path):
    engine = create_engine(f"duckdb:///{tmp_path / 'v2.duckdb'}")
    assert apply_migrations(engine, target=2) == [1, 2]
    old = Store(engine, display="v2", path=None, read_only=False, schema_version=2)
    problems = schema_drift(old)
    engine.dispose()
    # version 3 added the Bayesian columns and the posterior_draws table
    named = {name for name in ("estimates", "factor_paths", "parameters", "posterior_draws")
             if any(name in p for p in problems)}
    assert len(problems) == 4 and len(named) == 4
    assert "filtered_q05" in " ".join(problems) and "rhat" in " ".join(problems)


def test_every_table_has_run_id_or_hash_and_no_foreign_keys():
    for table in schema.metadata.sorted_tables:
        assert not table.foreign_keys, table.name
    for table in schema.RESULT_TABLES.values():
        assert table.c.run_id.nullable is False


def test_result_tables_use_the_panelfit_column_names():
    # DEVELOPERS.md, "PanelFit" section: the long tables' columns
    # (plus the Bayesian columns of schema version 3, NULL for ML runs)
    quantiles = ", filtered_q05, filtered_q95, smoothed_q05, smoothed_q95"
    contract = {
        "estimates": "date, asset, filtered_mean, filtered_std, smoothed_mean, smoothed_std, "
                     "predictive_mean, predictive_std, std_innovation" + quantiles,
        "factors": "date, factor, filtered_mean, filtered_std, smoothed_mean, smoothed_std" + quantiles,
        "parameters": "name, row, col, value, std_error, q05, q50, q95, rhat, ess_bulk, ess_tail",
        "posterior_draws": "draw, name, row, col, value",
        "trace": "iteration, objective, loglik, elapsed_s, step",
        "diagnostics": "asset, statistic, lags, value, pvalue",
    }
    for key, columns in contract.items():
        names = [c.name for c in schema.RESULT_TABLES[key].columns]
        assert names == ["run_id"] + columns.split(", ")


def test_migration_sql_is_portable():
    duckdb_only = [r"\bCREATE\s+OR\s+REPLACE\b", r"::", r"\bSERIAL\b", r"\bIDENTITY\b", r"\bUBIGINT\b",
                   r"\bHUGEINT\b", r"\bSTRUCT\b", r"\bMAP\b", r"\bLIST\b", r"\bUSING\s+\w+\s*\(", r"\bINSERT\s+OR\b",
                   r"\bREFERENCES\b", r"\bCREATE\s+(UNIQUE\s+)?INDEX\b"]
    for migration in migrations():
        for statement in migration.statements("duckdb"):
            for pattern in duckdb_only:
                assert not re.search(pattern, statement, re.I), (migration.path.name, pattern)


def test_postgresql_reads_json_as_jsonb():
    first = migrations()[0]
    assert any(" JSON " in s or " JSON\n" in s or "JSON NOT" in s for s in first.statements("duckdb"))
    pg = "\n".join(first.statements("postgresql"))
    assert "JSONB" in pg and not re.search(r"\bJSON\b", pg)


def test_each_migration_commits_with_its_version_row(tmp_path):
    engine = create_engine(f"duckdb:///{tmp_path / 'steps.duckdb'}")
    assert apply_migrations(engine, target=1) == [1]
    assert apply_migrations(engine, target=2) == [2]
    assert apply_migrations(engine) == [3]
    assert apply_migrations(engine) == []
    engine.dispose()
    with open_store(tmp_path / "steps.duckdb", read_only=True) as opened:
        assert opened.schema_version == 3
        assert schema_drift(opened) == []


def test_a_duckdb_file_of_another_program_is_refused(tmp_path):
    engine = create_engine(f"duckdb:///{tmp_path / 'other.duckdb'}")
    with engine.begin() as conn:
        conn.exec_driver_sql("CREATE TABLE orders (id INTEGER)")
    engine.dispose()
    with pytest.raises(StoreError, match="not a riskprem store"):
        open_store(tmp_path / "other.duckdb")


def test_pyproject_ships_every_sql_file_as_data_files():
    import tomllib
    from pathlib import Path

    root = Path(__file__).resolve().parents[1]
    entries = tomllib.loads((root / "pyproject.toml").read_text())["tool"]["setuptools"]["data-files"]
    for kind in ("migrations", "queries"):
        shipped = {p for pattern in entries[f"share/riskprem/{kind}"] for p in root.glob(pattern)}
        assert shipped == set((root / kind).glob("*.sql")) and shipped


def test_installed_copies_are_found_when_not_running_from_a_checkout(tmp_path, monkeypatch):
    import shutil
    import sys

    from panel.store import resources

    for kind in ("migrations", "queries"):
        shutil.copytree(resources.resource_dir(kind), tmp_path / "share" / "riskprem" / kind)
    monkeypatch.setattr(resources, "source_root", lambda: None)
    monkeypatch.setattr(sys, "prefix", str(tmp_path))
    resources.resource_dir.cache_clear()
    try:
        assert resources.resource_dir("migrations") == tmp_path / "share" / "riskprem" / "migrations"
        assert [m.version for m in migrations()] == [1, 2, 3]
        monkeypatch.setattr(resources, "_candidates", lambda kind: [tmp_path / "nothing" / kind])
        resources.resource_dir.cache_clear()
        with pytest.raises(StoreError, match="cannot find riskprem's queries/ SQL files"):
            resources.resource_dir("queries")
    finally:
        resources.resource_dir.cache_clear()
