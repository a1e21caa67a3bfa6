"""Upgrading a store in place: a version-1 file with data reaches the current schema with every row
kept."""

import pytest
from sqlalchemy import create_engine, select

from panel.store import (StoreError, backfill_key, find_run, get_run, list_runs, load_panel, open_store,
                         run_query, schema_drift, store_info, upgrade, write_run)
from panel.store import schema
from panel.store.migrate import apply_migrations
from panel.store.writer import _check_tables, _run_row, insert_dataset, insert_run
from tests.store_fixtures import VINTAGES, result_tables, run_record, sleeves_panel
from tests.backends import BOTH


def _version_one_store(location):
    """A store at schema version 1 holding the Larkspur panel and three vintages (``location``: a
    DuckDB file path or a database URL)."""
    engine = create_engine(location if "://" in str(location) else f"duckdb:///{location}")
    apply_migrations(engine, target=1)
    panel = sleeves_panel()
    with engine.begin() as conn:
        digest = insert_dataset(conn, panel, "larkspur")
        for i, as_of in enumerate(VINTAGES[:3]):
            row = _run_row(run_record(digest, as_of))
            del row["backfill_key"]                                  # not a column at version 1
            tables = _check_tables(result_tables(panel, as_of, seed=i))
            insert_run(conn, row, {kind: frame.drop(columns=list(schema.BAYES_COLUMNS.get(kind, ())))
                                   for kind, frame in tables.items()})     # version 3's columns
    engine.dispose()
    return panel, digest


def _snapshot(store):
    """Every row of every table, in a stable order, without the columns and tables versions 2 and 3
    added."""
    out = {}
    later = {"backfill_key"} | {c for cols in schema.BAYES_COLUMNS.values() for c in cols}
    with store.engine.connect() as conn:
        for table in schema.metadata.sorted_tables:
            if table.name in ("schema_version", "posterior_draws"):
                continue
            cols = [c for c in table.columns if c.name not in later]
            rows = conn.execute(select(*cols)).all()
            out[table.name] = sorted((tuple(map(repr, r)) for r in rows))
    return out


@BOTH
def test_upgrade_from_version_one_keeps_every_row(backend):
    path = backend.location("v1")
    panel, digest = _version_one_store(path)
    with open_store(path) as old:
        assert old.schema_version == 1
        before = _snapshot(old)
        assert len(before["runs"]) == 3 and len(before["estimates"]) > 500
        with pytest.raises(StoreError, match="schema version 1, this riskprem uses 3.*riskprem store upgrade"):
            list_runs(old)
        with pytest.raises(StoreError, match="upgrade"):
            write_run(old, run_record(digest, VINTAGES[3]), {})
        assert upgrade(old) == [2, 3]
        assert old.schema_version == 3
        assert schema_drift(old) == []
        after = _snapshot(old)
        assert set(before["store_meta"]) < set(after.pop("store_meta"))       # adds upgraded_utc
        assert after == {k: v for k, v in before.items() if k != "store_meta"}
        runs = list_runs(old)
        for _, run in runs.iterrows():                      # version 2 filled the key of old runs
            assert run["backfill_key"] == backfill_key(digest, run["settings"])
        assert upgrade(old) == []                           # already current: nothing to do
        info = store_info(old)
        assert info["schema_version"] == 3 and "upgraded_utc" in info["meta"]
    with open_store(path, read_only=True) as reopened:        # the upgrade is on disk
        assert load_panel(reopened, "larkspur").hash == panel.hash
        key = get_run(reopened, 1)["backfill_key"]
        assert find_run(reopened, digest, key, VINTAGES[1]) == 2
        assert len(run_query(reopened, "dataset_runs", {"dataset": "larkspur"})) == 3


def test_read_only_store_cannot_be_upgraded(tmp_path):
    path = tmp_path / "v1.duckdb"
    _version_one_store(path)
    with open_store(path, read_only=True) as old:
        with pytest.raises(StoreError, match="open read-only; open it read-write to upgrade"):
            upgrade(old)
    with open_store(path, read_only=True) as old:
        assert old.schema_version == 1


@BOTH
def test_a_failing_migration_leaves_the_store_at_its_version(backend, monkeypatch):
    path = backend.location("v1")
    _version_one_store(path)
    from panel.store import migrate

    def broken(conn):
        migrate._fill_backfill_keys(conn)
        raise RuntimeError("disk full")

    monkeypatch.setitem(migrate._AFTER, 2, broken)
    with open_store(path) as old:
        before = _snapshot(old)
        with pytest.raises(RuntimeError, match="disk full"):
            upgrade(old)
    with open_store(path) as again:
        assert again.schema_version == 1
        assert _snapshot(again) == before
        with again.engine.connect() as conn:
            assert "backfill_key" not in {c["name"] for c in _columns(conn, "runs")}


def _columns(conn, table):
    from panel.store.migrate import _COLUMNS

    return [{"name": r[1]} for r in conn.execute(_COLUMNS) if r[0] == table]
