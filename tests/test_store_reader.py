"""Reader API: listing and fetching runs, idempotent-backfill look-up, exports, and a real fit."""

import pandas as pd
import pytest

from panel import ModelSpec, fit
from panel.store import (StoreError, backfill_key, export_run, find_run, from_fit, get_run, list_runs,
                         load_panel, open_store, run_tables, write_dataset, write_run)
from tests.store_fixtures import VINTAGES, filled, result_tables, run_record, sleeves_panel, store  # noqa: F401
from tests.backends import BOTH


@BOTH
def test_list_runs_all_and_by_dataset(filled):
    store, panel, digest, ids, failed = filled
    other = write_dataset(store, sleeves_panel(seed=99), "larkspur_alt")
    write_run(store, run_record(other, "2019-12-31"), {})
    assert len(list_runs(store)) == 6
    mine = list_runs(store, "larkspur")
    assert list(mine["id"]) == [*ids.values(), failed]
    assert mine["settings"].iloc[0]["k"] == 2
    assert list(mine["parent_run"].iloc[1:4]) == list(ids.values())[:3]
    assert list(list_runs(store, other[:8])["dataset_hash"]) == [other]


def test_unknown_run_names_the_store_and_the_command(filled):
    store, *_ = filled
    with pytest.raises(StoreError) as caught:
        get_run(store, 42)
    assert str(caught.value) == f"no run 42 in {store.display}; list runs with `riskprem runs`"
    with pytest.raises(StoreError, match="no run 42"):
        run_tables(store, 42)
    with pytest.raises(StoreError, match="is not a number"):
        get_run(store, "latest")


@BOTH
def test_find_run_makes_backfill_idempotent(filled):
    store, panel, digest, ids, failed = filled
    settings = run_record(digest, VINTAGES[0])["settings"]
    key = backfill_key(digest, settings)
    assert key == backfill_key(digest, {**settings, "as_of": "1999-01-31", "start": {"q": [1.0]}})
    assert key != backfill_key(digest, {**settings, "k": 3})
    for as_of in VINTAGES:
        assert find_run(store, digest, key, as_of) == ids[as_of]     # the failed rerun is ignored
    assert find_run(store, digest, key, "2020-06-30") is None
    assert find_run(store, digest, backfill_key(digest, {"k": 3}), VINTAGES[0]) is None


@BOTH
def test_export_estimates_to_parquet_and_csv(filled, tmp_path):
    store, panel, digest, ids, failed = filled
    run_id = ids[VINTAGES[1]]
    want = run_tables(store, run_id)["estimates"]
    parquet = export_run(store, run_id, tmp_path / "vintage.parquet")
    got = pd.read_parquet(parquet)
    assert list(got.columns) == list(want.columns) and len(got) == len(want)
    pd.testing.assert_series_equal(got["smoothed_mean"], want["smoothed_mean"])
    csv = export_run(store, run_id, tmp_path / "params.csv", table="parameters")
    back = pd.read_csv(csv)
    assert list(back.columns) == ["name", "row", "col", "value", "std_error"]
    assert len(back) == len(run_tables(store, run_id)["parameters"])
    with pytest.raises(StoreError, match="use a .parquet or .csv"):
        export_run(store, run_id, tmp_path / "vintage.xlsx")
    with pytest.raises(StoreError, match="does not exist"):
        export_run(store, run_id, tmp_path / "nowhere" / "v.csv")
    with pytest.raises(StoreError, match="unknown result table"):
        export_run(store, run_id, tmp_path / "v.csv", table="runs")


def test_export_works_from_a_read_only_store(tmp_path):
    path = tmp_path / "ro.duckdb"
    panel = sleeves_panel()
    with open_store(path) as opened:
        digest = write_dataset(opened, panel, "larkspur")
        run_id = write_run(opened, run_record(digest, VINTAGES[0]), result_tables(panel, VINTAGES[0]))
    with open_store(path, read_only=True) as reader:
        out = export_run(reader, run_id, tmp_path / "ro.csv")
        assert len(pd.read_csv(out)) == len(run_tables(reader, run_id)["estimates"])


@BOTH
def test_a_real_fit_goes_in_and_comes_back(store):
    panel = sleeves_panel(sleeves=["domestic_equity", "credit", "commodities"], n_dates=36)
    digest = write_dataset(store, panel, "larkspur_core")
    vintage = panel.cut("2018-06-30")
    result = fit(vintage, ModelSpec(premium_factors=1, max_iter=5, std_errors="never"))
    run, tables = from_fit(result, dataset_hash=digest, kind="backfill", label="core")
    run_id = write_run(store, run, tables)
    stored = get_run(store, run_id)
    assert stored["as_of"] == pd.Timestamp("2018-06-30").date()
    assert stored["settings"]["spec"]["premium_factors"] == 1
    assert stored["loglik"] == pytest.approx(result.loglik) and stored["aic"] == pytest.approx(result.aic)
    assert stored["iterations"] == result.n_iter and stored["status"] == result.status
    back = run_tables(store, run_id)
    assert len(back["estimates"]) == len(result.estimates) and len(back["trace"]) == len(result.trace)
    est = result.estimates.sort_values(["date", "asset"]).reset_index(drop=True)
    pd.testing.assert_frame_equal(back["estimates"], est, check_dtype=False, check_column_type=False)
    assert load_panel(store, digest).cut("2018-06-30").hash == vintage.hash
