"""Named queries: every file in queries/ runs against a real store; results checked against the
invented tables they were written from."""

import numpy as np
import pandas as pd
import pytest

from panel.store import StoreError, list_queries, run_query, write_run
from panel.store.queries import query_parameters
from tests.store_fixtures import VINTAGES, filled, result_tables, run_record, store  # noqa: F401
from tests.backends import BOTH

SAMPLE = {"dataset": "larkspur", "date": "2018-06-30", "asset": "credit"}


def _tables(panel, i):
    return result_tables(panel, VINTAGES[i], seed=i)


@BOTH
def test_every_query_file_runs_and_returns_its_declared_columns(filled):
    store, panel, digest, ids, failed = filled
    queries = list_queries()
    assert {q.name for q in queries} >= {"cross_section_latest", "revision_history", "vintage_triangle",
                                         "dataset_runs", "parameter_changes", "realtime_forecasts"}
    for info in queries:
        used = query_parameters(info.sql)
        assert list(info.parameters) == used, info.name            # header documents every parameter
        assert info.purpose and all(info.parameters.values())
        params = {p: SAMPLE.get(p) for p in used}
        if "run_a" in used:
            params.update(run_a=ids[VINTAGES[0]], run_b=ids[VINTAGES[1]])
        frame = run_query(store, info.name, params)
        assert tuple(frame.columns) == info.columns, info.name
        assert len(frame) > 0, info.name


@BOTH
def test_cross_section_takes_each_asset_from_its_newest_vintage(filled):
    store, panel, digest, ids, failed = filled
    latest = _tables(panel, 3)["estimates"]
    partial = latest[latest["asset"] == "credit"].assign(filtered_mean=lambda f: f["filtered_mean"] + 1.0)
    newer = write_run(store, run_record(digest, VINTAGES[-1], label="credit only"), {"estimates": partial})
    write_run(store, run_record(digest, VINTAGES[-1], status="failed"),          # newest, but failed
              {"estimates": latest.assign(filtered_mean=5.0)})
    got = run_query(store, "cross_section_latest", {"dataset": digest, "date": "2018-06-30"}).set_index("asset")
    want = latest[latest["date"] == "2018-06-30"].set_index("asset")
    assert sorted(got.index) == sorted(want.index)
    assert got.loc["credit", "run_id"] == newer                    # same as_of, higher id
    assert got.loc["credit", "filtered_mean"] == pytest.approx(want.loc["credit", "filtered_mean"] + 1.0)
    others = got.drop(index="credit")
    assert (others["run_id"] == ids[VINTAGES[-1]]).all()           # the failed run (higher id) is skipped
    np.testing.assert_allclose(others["smoothed_mean"], want.drop(index="credit").loc[others.index, "smoothed_mean"])


def test_cross_section_of_a_date_only_late_vintages_cover(filled):
    store, panel, *_ = filled
    got = run_query(store, "cross_section_latest", {"dataset": "larkspur", "date": "2019-09-30"})
    assert set(got["as_of"].astype(str).str[:10]) == {VINTAGES[-1]}


def test_revision_history_follows_one_premium_across_vintages(filled):
    store, panel, digest, ids, failed = filled
    got = run_query(store, "revision_history", {"dataset": "larkspur", "asset": "credit", "date": "2018-06-30"})
    assert list(got["run_id"]) == [ids[v] for v in VINTAGES]
    rows = []
    for i in range(4):
        e = _tables(panel, i)["estimates"]
        rows.append(e[(e["asset"] == "credit") & (e["date"] == "2018-06-30")].iloc[0])
    np.testing.assert_allclose(got["smoothed_mean"], [r["smoothed_mean"] for r in rows])
    np.testing.assert_allclose(got["revision"], [r["smoothed_mean"] - rows[0]["filtered_mean"] for r in rows])


def test_vintage_triangle_has_one_row_per_vintage_and_covered_date(filled):
    store, panel, *_ = filled
    got = run_query(store, "vintage_triangle", {"dataset": "larkspur", "asset": "macro_overlay"})
    first = panel.values["macro_overlay"].first_valid_index()
    expected = sum(int(((panel.dates >= first) & (panel.dates <= v)).sum()) for v in VINTAGES)
    assert len(got) == expected
    assert (got["date"] <= got["as_of"]).all()


def test_parameter_changes_pairs_parameters_and_differences(filled):
    store, panel, digest, ids, failed = filled
    got = run_query(store, "parameter_changes", {"run_a": ids[VINTAGES[0]], "run_b": str(ids[VINTAGES[1]])})
    a, b = _tables(panel, 0)["parameters"], _tables(panel, 1)["parameters"]
    assert len(got) == len(a) == len(b)                       # the same parameter set matched up
    loading = got[(got["name"] == "loading") & (got["row"] == "credit") & (got["col"] == "f2")].iloc[0]
    va = a[(a["name"] == "loading") & (a["row"] == "credit") & (a["col"] == "f2")]["value"].iloc[0]
    vb = b[(b["name"] == "loading") & (b["row"] == "credit") & (b["col"] == "f2")]["value"].iloc[0]
    assert loading["difference"] == pytest.approx(vb - va)
    idio = got[got["name"] == "idio_premium_var"]
    assert len(idio) == 8 and idio["col"].isna().all() and idio["value_a"].notna().all()


@BOTH
def test_realtime_forecasts_pair_each_vintage_with_the_next_return(filled):
    store, panel, digest, ids, failed = filled
    got = run_query(store, "realtime_forecasts", {"dataset": "larkspur", "asset": "credit"})
    assert list(got["run_id"]) == [ids[v] for v in VINTAGES]
    for i, row in got.iterrows():
        as_of = pd.Timestamp(VINTAGES[i])
        e = _tables(panel, i)["estimates"]
        last = e[(e["asset"] == "credit") & (e["date"] == as_of)].iloc[0]
        assert pd.Timestamp(row["origin_date"]) == as_of
        assert row["forecast"] == pytest.approx(last["filtered_mean"])
        later = panel.dates[panel.dates > as_of]
        if len(later):
            assert pd.Timestamp(row["target_date"]) == later[0]
            realized = panel.values.loc[later[0], "credit"]
            assert (pd.isna(row["realized"]) and np.isnan(realized)) or row["realized"] == pytest.approx(realized)
        else:                                                 # the newest vintage: no return yet
            assert pd.isna(row["target_date"]) and pd.isna(row["realized"])


@BOTH
def test_query_errors_are_one_line_store_errors(filled):
    store, *_ = filled
    with pytest.raises(StoreError, match="no query 'top_sleeves'; known queries: cross_section_latest"):
        run_query(store, "top_sleeves", {})
    with pytest.raises(StoreError, match="needs parameter\\(s\\) date"):
        run_query(store, "cross_section_latest", {"dataset": "larkspur"})
    with pytest.raises(StoreError, match="has no parameter\\(s\\) sleeve"):
        run_query(store, "dataset_runs", {"dataset": "larkspur", "sleeve": "credit"})
    with pytest.raises(StoreError, match="no dataset 'harbour'"):
        run_query(store, "dataset_runs", {"dataset": "harbour"})
    with pytest.raises(StoreError, match="query 'cross_section_latest' failed") as caught:
        run_query(store, "cross_section_latest", {"dataset": "larkspur", "date": "2018-13-45"})
    assert "\n" not in str(caught.value)
