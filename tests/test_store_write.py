"""Writing datasets and runs: exact round trips, idempotence, and all-or-nothing transactions
(including a writer process killed midway)."""

import re
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from panel.data import Panel
from panel.store import (StoreError, backfill_key, get_run, list_datasets, list_runs, load_panel,
                         open_store, resolve_dataset, run_tables, store_info, write_dataset, write_run)
from tests.backends import BOTH
from tests.store_fixtures import big_estimates, result_tables, run_record, sleeves_panel, store  # noqa: F401

REPO = Path(__file__).resolve().parents[1]


def _sorted(frame, keys):
    return frame.sort_values(list(keys)).reset_index(drop=True)


@BOTH
def test_dataset_round_trip_rebuilds_the_exact_panel(store):
    panel = sleeves_panel()
    digest = write_dataset(store, panel, "larkspur")
    assert digest == panel.hash
    back = load_panel(store, "larkspur")
    assert back.hash == panel.hash
    pd.testing.assert_frame_equal(back.values, panel.values, check_freq=False)
    assert list(back.values.columns) == list(panel.values.columns)        # ingest order, not sorted
    assert np.signbit(back.values.iloc[3, 0]) == np.signbit(panel.values.iloc[3, 0])
    assert back.values.iloc[len(panel.values) // 2].isna().all()        # the empty month is kept
    assert (back.frequency, back.periods_per_year, back.returns) == ("M", 12, "simple")
    assert back.warnings == panel.warnings and back.meta == panel.meta
    row = list_datasets(store).iloc[0]
    assert row["source_file"] == "larkspur_sleeves.csv"
    assert row["n_values"] == int(panel.values.notna().sum().sum())
    assert store_info(store)["counts"]["dataset_values"] == row["n_values"]


@BOTH
def test_writing_a_dataset_twice_is_idempotent(store):
    panel = sleeves_panel()
    assert write_dataset(store, panel, "larkspur") == write_dataset(store, panel, "larkspur")
    counts = store_info(store)["counts"]
    assert counts["datasets"] == 1 and counts["dataset_names"] == 1
    assert counts["dataset_values"] == int(panel.values.notna().sum().sum())


@BOTH
def test_a_name_reingested_with_new_data_resolves_to_the_newest_hash(store):
    old, new = sleeves_panel(n_dates=36), sleeves_panel(n_dates=48)
    h_old = write_dataset(store, old, "larkspur")
    h_new = write_dataset(store, new, "larkspur")
    assert h_old != h_new and resolve_dataset(store, "larkspur") == h_new
    assert load_panel(store, h_old).hash == h_old                       # the old snapshot stays
    assert write_dataset(store, old, "larkspur") == h_old                # pointing back is a new revision
    assert resolve_dataset(store, "larkspur") == h_old
    assert store_info(store)["counts"]["datasets"] == 2
    listing = list_datasets(store).set_index("hash")
    assert listing.loc[h_old, "current_names"] == "larkspur" and listing.loc[h_new, "current_names"] == ""


def test_dataset_resolution_by_prefix_and_unknown_names(store):
    digest = write_dataset(store, sleeves_panel(), "larkspur")
    assert resolve_dataset(store, digest[:10]) == digest
    with pytest.raises(StoreError, match="no dataset 'harbour'.*riskprem datasets"):
        resolve_dataset(store, "harbour")


def test_a_panel_whose_hash_does_not_match_is_refused(store):
    panel = sleeves_panel()
    forged = Panel(values=panel.values * 2, frequency="M", periods_per_year=12, hash=panel.hash)
    with pytest.raises(StoreError, match="does not match its values"):
        write_dataset(store, forged, "larkspur")
    assert store_info(store)["counts"]["datasets"] == 0


@BOTH
def test_run_round_trip_keeps_every_row_and_field(store):
    panel = sleeves_panel()
    digest = write_dataset(store, panel, "larkspur")
    tables = result_tables(panel, "2019-06-30")
    run_id = write_run(store, run_record(digest, "2019-06-30"), tables)
    run = get_run(store, run_id)
    assert run["as_of"] == pd.Timestamp("2019-06-30").date() and run["status"] == "converged"
    assert run["settings"] == {"k": 2, "max_iter": 200, "tol": 1e-8, "as_of": "2019-06-30"}
    assert run["started_utc"] == pd.Timestamp("2024-03-01 09:00:00").to_pydatetime()
    assert run["finished_utc"] == pd.Timestamp("2024-03-01 09:00:01.250").to_pydatetime()
    assert run["backfill_key"] == backfill_key(digest, run["settings"])
    assert run["python_version"] == sys.version.split()[0] and run["numpy_version"] == np.__version__
    back = run_tables(store, run_id)
    for key, frame in tables.items():
        order = list(frame.columns[:2]) if key != "parameters" else ["name", "row", "col"]
        pd.testing.assert_frame_equal(_sorted(back[key], order), _sorted(frame, order),
                                      check_dtype=False, check_column_type=False)


def test_factor_paths_and_em_trace_keys_are_accepted(store):
    panel = sleeves_panel()
    digest = write_dataset(store, panel, "larkspur")
    tables = result_tables(panel)
    run_id = write_run(store, run_record(digest, "2019-12-31"),
                       {"factor_paths": tables["factors"], "em_trace": tables["trace"]})
    back = run_tables(store, run_id)
    assert len(back["factors"]) == len(tables["factors"]) and len(back["trace"]) == 12
    assert back["trace"]["step"].iloc[-1] == "accelerated"
    assert len(back["estimates"]) == 0


@BOTH
def test_timezone_aware_timestamps_are_stored_in_utc(store):
    digest = write_dataset(store, sleeves_panel(), "larkspur")
    run_id = write_run(store, run_record(digest, "2019-12-31", duration_s=None,
                                         started_utc=pd.Timestamp("2024-03-01 10:00", tz="Europe/Zurich"),
                                         finished_utc="2024-03-01T09:30:00+00:00"))
    run = get_run(store, run_id)
    assert run["started_utc"] == pd.Timestamp("2024-03-01 09:00").to_pydatetime()
    assert run["duration_s"] == 1800.0


@pytest.mark.parametrize("change, words", [
    ({"color": "red"}, "unknown run field"),
    ({"status": None}, "run lacks status"),
    ({"settings": "k=2"}, "settings must be a dict"),
    ({"settings": {"when": {1, 2}}}, None),
    ({"as_of": "not a date"}, "is not a date"),
    ({"parent_run": 404}, "parent run 404 is not in the store"),
    ({"dataset_hash": "0" * 64}, "write_dataset it first"),
])
def test_bad_run_fields_raise_and_write_nothing(store, change, words):
    panel = sleeves_panel()
    digest = write_dataset(store, panel, "larkspur")
    record = run_record(digest, "2019-12-31")
    record.update(change)
    if words is None:   # a set is not JSON; default=str keeps it as text, the write goes through
        write_run(store, record, {})
        return
    with pytest.raises(StoreError, match=words) as caught:
        write_run(store, record, result_tables(panel))
    assert "\n" not in str(caught.value)
    assert store_info(store)["counts"]["runs"] == 0 and store_info(store)["counts"]["estimates"] == 0


def test_bad_result_tables_raise_and_write_nothing(store):
    panel = sleeves_panel()
    digest = write_dataset(store, panel, "larkspur")
    tables = result_tables(panel)
    with pytest.raises(StoreError, match="unknown result table 'forecasts'"):
        write_run(store, run_record(digest, "2019-12-31"), {"forecasts": tables["estimates"]})
    with pytest.raises(StoreError, match=r"missing \['std_innovation'\]"):
        write_run(store, run_record(digest, "2019-12-31"),
                  {"estimates": tables["estimates"].drop(columns="std_innovation")})
    with pytest.raises(StoreError, match=r"unexpected \['sharpe'\]"):
        write_run(store, run_record(digest, "2019-12-31"),
                  {"diagnostics": tables["diagnostics"].assign(sharpe=1.0)})
    assert store_info(store)["counts"]["runs"] == 0


@BOTH
def test_a_failure_midway_rolls_back_the_whole_run(store):
    panel = sleeves_panel()
    digest = write_dataset(store, panel, "larkspur")
    first = write_run(store, run_record(digest, "2019-06-30"), result_tables(panel, "2019-06-30"))
    before = store_info(store)["counts"]
    tables = result_tables(panel)
    tables["diagnostics"].loc[2, "asset"] = None            # NOT NULL: fails after estimates went in
    with pytest.raises(StoreError, match="nothing was stored") as caught:
        write_run(store, run_record(digest, "2019-12-31"), tables)
    assert re.search("not.null", str(caught.value), re.I)         # DuckDB: NOT NULL, PostgreSQL: not-null
    assert store_info(store)["counts"] == before
    assert list(list_runs(store)["id"]) == [first]
    second = write_run(store, run_record(digest, "2019-12-31"), result_tables(panel))
    assert second > first


@BOTH
def test_native_and_executemany_paths_store_the_same_rows(store):
    panel = sleeves_panel()
    digest = write_dataset(store, panel, "larkspur")
    tables = result_tables(panel)
    native = write_run(store, run_record(digest, "2019-12-31"), tables, native=True)
    portable = write_run(store, run_record(digest, "2019-12-31"), tables, native=False)
    a, b = run_tables(store, native), run_tables(store, portable)
    for key in tables:
        pd.testing.assert_frame_equal(a[key], b[key])


@BOTH
def test_fifty_thousand_estimate_rows_in_one_run(store):
    digest = write_dataset(store, sleeves_panel(), "larkspur")
    frame = big_estimates(50_000, n_assets=250)
    run_id = write_run(store, run_record(digest, "2019-12-31"), {"estimates": frame})
    back = run_tables(store, run_id)["estimates"]
    assert len(back) == 50_000
    pd.testing.assert_frame_equal(back, _sorted(frame, ["date", "asset"]), check_dtype=False,
                                  check_column_type=False)


KILLED_WRITER = """
import sys
import pandas as pd
from panel.store import open_store, write_dataset, write_run
from tests.store_fixtures import big_estimates, run_record, sleeves_panel
store = open_store(sys.argv[1])
digest = write_dataset(store, sleeves_panel(), "larkspur")
frame = big_estimates(int(sys.argv[2]), n_assets=500)
print("writing", flush=True)
write_run(store, run_record(digest, "2019-12-31", label="doomed"), {"estimates": frame})
print("done", flush=True)
"""


def _file_bytes(path):
    return sum(p.stat().st_size for p in (path, Path(f"{path}.wal")) if p.exists())


def test_a_writer_killed_midway_leaves_no_partial_run(tmp_path):
    path = tmp_path / "killed.duckdb"
    with open_store(path) as opened:
        digest = write_dataset(opened, sleeves_panel(), "larkspur")
        kept = write_run(opened, run_record(digest, "2019-06-30"), result_tables(sleeves_panel(), "2019-06-30"))
        before = store_info(opened)["counts"]
    size = _file_bytes(path)
    proc = subprocess.Popen([sys.executable, "-c", KILLED_WRITER, str(path), "2000000"], cwd=REPO,
                            text=True, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    assert proc.stdout.readline().strip() == "writing", proc.stderr.read()
    deadline = time.monotonic() + 60
    while _file_bytes(path) < size + 4_000_000 and proc.poll() is None and time.monotonic() < deadline:
        time.sleep(0.01)                                      # wait until rows are reaching the file
    assert proc.poll() is None, "the writer finished before it could be killed"
    grown = _file_bytes(path) - size
    proc.send_signal(signal.SIGKILL)
    proc.wait(timeout=30)
    assert grown >= 4_000_000                                 # killed while writing row data
    assert proc.returncode == -signal.SIGKILL
    assert proc.stdout.read().strip() == ""                   # it never finished the write
    with open_store(path, lock_timeout=10) as reopened:
        assert store_info(reopened)["counts"] == before
        assert list(list_runs(reopened)["id"]) == [kept]
        assert len(run_tables(reopened, kept)["estimates"]) == before["estimates"]
        again = write_run(reopened, run_record(digest, "2019-12-31"), result_tables(sleeves_panel()))
        assert again > kept


@pytest.mark.parametrize("backend", ["postgresql"], indirect=True)
def test_a_writer_killed_during_copy_leaves_no_partial_run_on_postgresql(backend):
    location = backend.location("killed")
    with open_store(location) as opened:
        digest = write_dataset(opened, sleeves_panel(), "larkspur")
        kept = write_run(opened, run_record(digest, "2019-06-30"), result_tables(sleeves_panel(), "2019-06-30"))
        before = store_info(opened)["counts"]
    proc = subprocess.Popen([sys.executable, "-c", KILLED_WRITER, location, "600000"], cwd=REPO,
                            text=True, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    assert proc.stdout.readline().strip() == "writing", proc.stderr.read()
    server = backend.pg.conn
    database = location.rsplit("/", 1)[1]
    deadline = time.monotonic() + 60
    copying = False
    while not copying and proc.poll() is None and time.monotonic() < deadline:
        copying = server.execute("SELECT count(*) FROM pg_stat_activity WHERE datname = %s AND query LIKE 'COPY%%'",
                                 (database,)).fetchone()[0] > 0
        time.sleep(0.01)
    assert copying and proc.poll() is None, "the writer finished before it could be killed"
    proc.send_signal(signal.SIGKILL)
    proc.wait(timeout=30)
    assert proc.stdout.read().strip() == ""                   # it never finished the write
    with open_store(location) as reopened:
        assert store_info(reopened)["counts"] == before
        assert list(list_runs(reopened)["id"]) == [kept]
