"""Vintage backfill against a real DuckDB store: one vintage per cut-off, pseudo real-time
(re-estimated on data up to the cut-off), idempotent, resumable, the same on every kind of worker."""

import numpy as np
import pandas as pd
import pytest

from panel.vintages.backfill import (BackfillError, BackfillInterrupted, Window, backfill, cutoff_dates, plan_backfill,
                            rebuild_vintage, settings_key, start_from_parameters, vintage_panel)
from panel.model.fit import fit
from panel.model.params import Params
from panel.model.spec import ModelSpec, SpecError
from panel.store import StoreError, list_runs, open_store, run_tables, write_dataset
from tests.backfill_fixtures import NAME, SPEC, quillmoor_panel, sleeves_store  # noqa: F401
from tests.backends import BOTH

CUTS = dict(start="2023-07-31", end="2023-12-31")          # the last six months: 6 cut-offs


def _runs(store):
    return list_runs(store, NAME).sort_values("as_of").reset_index(drop=True)


def _estimates(store, run_ids):
    return {int(i): run_tables(store, int(i))["estimates"] for i in run_ids}


def _by_as_of(store):
    runs = _runs(store)
    return {pd.Timestamp(r.as_of): run_tables(store, int(r.id)) for r in runs.itertuples()}


@BOTH
def test_one_vintage_per_cutoff_each_fitted_on_data_up_to_its_cutoff(sleeves_store):
    store, panel = sleeves_store
    report = backfill(store, NAME, SPEC, chain=3, **CUTS)
    runs = _runs(store)
    want = panel.dates[-6:]
    assert list(pd.to_datetime(runs["as_of"])) == list(want)
    assert [w.as_of for w in sorted(report.written, key=lambda w: w.as_of)] == list(want)
    assert set(runs["kind"]) == {"backfill"} and set(runs["dataset_hash"]) == {panel.hash}
    key = settings_key(panel.hash, SPEC, "expanding", chain=3)    # the chain is part of the key
    assert set(runs["backfill_key"]) == {key} == {report.key}        # the store's key = the plan's
    ids = list(runs["id"])
    # chains of 3 cut-offs: cold, warm, warm | cold, warm, warm
    assert [None if pd.isna(p) else int(p) for p in runs["parent_run"]] == [None, ids[0], ids[1], None, ids[3], ids[4]]
    for row in runs.itertuples():
        as_of = pd.Timestamp(row.as_of)
        settings = row.settings
        assert settings["as_of"] == str(as_of.date()) and settings["window"] == "expanding" and settings["chain"] == 3
        assert settings["dataset_hash"] == panel.hash and ModelSpec.from_dict(settings["spec"]) == SPEC
        stored = run_tables(store, int(row.id))["estimates"]
        assert pd.Timestamp(stored["date"].max()) == as_of              # nothing after the cut-off
        if pd.isna(row.parent_run):
            assert settings["start"] is None
            start = None
        else:                                                            # warm: the parent's estimates
            parent = run_tables(store, int(row.parent_run))["parameters"]
            start = Params.from_dict(settings["start"])
            np.testing.assert_array_equal(start.H, start_from_parameters(parent, panel.assets).H)
        direct = fit(panel.cut(as_of), SPEC, start=start).estimates       # pseudo real-time: data to as_of
        direct = direct.sort_values(["date", "asset"]).reset_index(drop=True)
        np.testing.assert_array_equal(stored["filtered_mean"].to_numpy(), direct["filtered_mean"].to_numpy())
        np.testing.assert_array_equal(stored["smoothed_std"].to_numpy(), direct["smoothed_std"].to_numpy())


@BOTH
def test_every_recorded_vintage_is_rebuilt_exactly_from_the_store(sleeves_store):
    store, panel = sleeves_store
    backfill(store, NAME, SPEC, chain=2, every=2, start="2023-03-31", end="2023-12-31", window="rolling:30")
    runs = _runs(store)
    assert list(pd.to_datetime(runs["as_of"])) == list(panel.dates[-10::2])
    for row in runs.itertuples():
        stored = run_tables(store, int(row.id))
        rebuilt = rebuild_vintage(store, int(row.id))
        assert len(rebuilt.dates) == 30 and rebuilt.dates[-1] == pd.Timestamp(row.as_of)  # rolling window
        assert pd.Timestamp(stored["estimates"]["date"].min()) == rebuilt.dates[0]
        for table, column in (("estimates", "smoothed_mean"), ("estimates", "filtered_std"),
                              ("parameters", "value")):
            got = rebuilt.tables()[table].sort_values(list(stored[table].columns[:3])).reset_index(drop=True)
            want = stored[table].sort_values(list(stored[table].columns[:3])).reset_index(drop=True)
            np.testing.assert_array_equal(got[column].to_numpy(dtype=float), want[column].to_numpy(dtype=float))
        assert rebuilt.loglik == row.loglik and rebuilt.n_iter == row.iterations


@BOTH
def test_running_again_skips_stored_cutoffs_and_extending_fits_only_new_ones(sleeves_store):
    store, panel = sleeves_store
    backfill(store, NAME, SPEC, chain=3, start="2023-07-31", end="2023-10-31")
    first = _runs(store)
    again = backfill(store, NAME, SPEC, chain=3, start="2023-07-31", end="2023-10-31")
    assert again.written == [] and again.skipped == 4
    assert len(_runs(store)) == 4
    more = backfill(store, NAME, SPEC, chain=3, **CUTS)
    assert [w.as_of for w in more.written] == list(panel.dates[-2:]) and more.skipped == 4
    runs = _runs(store)
    assert list(runs["id"][:4]) == list(first["id"])
    # 2023-11-30 is position 4 of chain 1 (positions 3..5): warm from the stored 2023-10-31 vintage
    assert int(runs.loc[4, "parent_run"]) == int(runs.loc[3, "id"])
    # different settings are a different backfill: nothing is skipped
    other = backfill(store, NAME, SPEC, chain=3, window="rolling:36", start="2023-11-30", end="2023-12-31")
    assert other.skipped == 0 and len(other.written) == 2 and other.key != more.key


def test_interrupt_keeps_exactly_the_finished_vintages_and_resuming_equals_an_uninterrupted_run(tmp_path):
    panel = quillmoor_panel()
    seen = []

    def stop_after_two(event):
        if event.as_of is not None:
            seen.append(event.run_id)
        if len(seen) == 2:
            raise KeyboardInterrupt

    with open_store(tmp_path / "cut.duckdb") as store:
        write_dataset(store, panel, NAME)
        with pytest.raises(BackfillInterrupted) as caught:
            backfill(store, NAME, SPEC, chain=4, progress=stop_after_two, **CUTS)
        assert isinstance(caught.value, KeyboardInterrupt)
        assert [w.run_id for w in caught.value.report.written] == seen
        runs = _runs(store)
        assert list(runs["id"]) == seen                                  # exactly k = 2 vintages
        for row in runs.itertuples():                     # each one complete: every row of its fit
            tables = run_tables(store, int(row.id))
            rebuilt = rebuild_vintage(store, int(row.id))
            assert len(tables["estimates"]) == len(panel.assets) * len(panel.cut(row.as_of).dates)
            assert {k: len(v) for k, v in tables.items()} == {
                k: len(getattr(rebuilt, k)) for k in ("estimates", "factors", "parameters", "trace", "diagnostics")}
        resumed = backfill(store, NAME, SPEC, chain=4, **CUTS)
        assert resumed.skipped == 2 and len(resumed.written) == 4
        interrupted = _by_as_of(store)
        parents = list(_runs(store)["parent_run"])
    with open_store(tmp_path / "whole.duckdb") as store:
        write_dataset(store, panel, NAME)
        backfill(store, NAME, SPEC, chain=4, **CUTS)
        whole = _by_as_of(store)
        whole_parents = list(_runs(store)["parent_run"])
    assert [pd.isna(p) for p in parents] == [pd.isna(p) for p in whole_parents]
    assert list(interrupted) == list(whole)
    for as_of in whole:                      # the third vintage warm-started from a stored run: same numbers
        for table in ("estimates", "parameters"):
            pd.testing.assert_frame_equal(interrupted[as_of][table], whole[as_of][table])


def test_local_processes_and_a_dask_cluster_store_the_same_vintages_as_one_process(tmp_path):
    from distributed import LocalCluster

    panel = quillmoor_panel()
    results = {}
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=False, dashboard_address=None,
                      protocol="tcp://", host="127.0.0.1", scheduler_port=0) as cluster:   # loopback TCP
        for where, options in (("inline", {"workers": 1}), ("processes", {"workers": 2}),
                               ("dask", {"scheduler": cluster.scheduler_address})):
            with open_store(tmp_path / f"{where}.duckdb") as store:
                write_dataset(store, panel, NAME)
                report = backfill(store, NAME, SPEC, chain=2, **CUTS, **options)
                results[where] = (_by_as_of(store), report)
    assert results["processes"][1].where == "2 local processes"
    assert results["dask"][1].where.startswith("Dask scheduler tcp://127.0.0.1")
    base = results["inline"][0]
    for where in ("processes", "dask"):
        got = results[where][0]
        assert list(got) == list(base)
        for as_of in base:
            for table in ("estimates", "parameters", "factors"):
                pd.testing.assert_frame_equal(got[as_of][table], base[as_of][table])


def test_without_warm_starts_every_vintage_starts_cold(sleeves_store):
    store, panel = sleeves_store
    backfill(store, NAME, SPEC, chain=3, warm_start=False, start="2023-10-31", end="2023-12-31")
    runs = _runs(store)
    assert runs["parent_run"].isna().all()
    assert all(s["start"] is None for s in runs["settings"])


def test_an_asset_entering_keeps_the_warm_start_chain(tmp_path):
    # The entry vintage warm-starts from a merge (incumbents from the predecessor, the entrant
    # from the moment-based rule); tests/test_backfill_entrants.py checks the merge itself.
    panel = quillmoor_panel(late_sleeve="estuary_infra", enters_at=68)   # first data 2023-09-30
    with open_store(tmp_path / "late.duckdb") as store:
        write_dataset(store, panel, NAME)
        backfill(store, NAME, ModelSpec(std_errors="never", max_iter=40), chain=6, **CUTS)
        runs = _runs(store)
    as_of = list(pd.to_datetime(runs["as_of"]))
    entry = as_of.index(pd.Timestamp("2023-09-30"))
    parents = [not pd.isna(p) for p in runs["parent_run"]]
    assert parents == [False, True, True, True, True, True] and entry == 2
    start = runs.loc[entry, "settings"]["start"]
    assert start is not None and len(start["q"]) == len(runs.loc[entry - 1, "settings"]["start"]["q"]) + 1


def test_a_failing_fit_stops_the_backfill_and_keeps_what_is_stored(sleeves_store, monkeypatch):
    import panel.vintages.backfill as bf

    store, panel = sleeves_store
    real = bf.fit_vintage

    def failing(task):
        if task.as_of == pd.Timestamp("2023-09-30"):
            raise np.linalg.LinAlgError("Matrix is not positive definite")
        return real(task)

    monkeypatch.setattr(bf, "fit_vintage", failing)
    with pytest.raises(BackfillError, match=r"cut-off 2023-09-30 failed \(LinAlgError: Matrix is not "
                                            r"positive definite\); 2 vintage\(s\)"):
        backfill(store, NAME, SPEC, chain=6, **CUTS)
    assert list(pd.to_datetime(_runs(store)["as_of"])) == list(panel.dates[-6:-4])


@pytest.mark.parametrize("options, error, message", [
    ({"window": "rolling:1"}, BackfillError, "window 'rolling:1' is not understood"),
    ({"window": "sliding"}, BackfillError, "use 'expanding' or 'rolling:M'"),
    ({"every": 0}, BackfillError, "every must be a whole number >= 1"),
    ({"chain": 0}, BackfillError, "chain must be a whole number >= 1"),
    ({"workers": 0}, BackfillError, "workers must be a whole number >= 1"),
    ({"start": "2023-12-31", "end": "2023-07-31"}, BackfillError, "start 2023-12-31 is after end 2023-07-31"),
    ({"start": "2030-01-31", "end": "2030-12-31"}, BackfillError, "no dates of the dataset between 2030-01-31"),
    ({"start": "soon"}, BackfillError, "start 'soon' is not a date"),
    ({"start": "2018-01-31", "end": "2018-03-31", "spec": ModelSpec(premium_factors=3)}, SpecError,
     "at cut-off 2018-01-31: 3 common premium factor"),
    ({"dataset": "harbour"}, StoreError, "no dataset 'harbour'"),
    ({"scheduler": "tcp://127.0.0.1:9"}, BackfillError, "cannot reach the Dask scheduler at tcp://127.0.0.1:9"),
])
def test_bad_input_is_one_line_and_writes_nothing(sleeves_store, options, error, message, monkeypatch):
    monkeypatch.setattr("panel.vintages.pools.DASK_CONNECT_TIMEOUT", "1s")
    store, panel = sleeves_store
    options = {"start": CUTS["start"], "end": CUTS["end"], **options}
    dataset = options.pop("dataset", NAME)
    spec = options.pop("spec", SPEC)
    with pytest.raises(error, match=message) as caught:
        backfill(store, dataset, spec, **options)
    assert "\n" not in str(caught.value)
    assert len(list_runs(store)) == 0


def test_cutoffs_windows_and_plans(sleeves_store):
    store, panel = sleeves_store
    assert list(cutoff_dates(panel, "2023-01-15", "2023-06-30", every=2)) == list(
        pd.to_datetime(["2023-01-31", "2023-03-31", "2023-05-31"]))
    assert Window.parse("Rolling:24") == Window(24) and Window.parse(None).text == "expanding"
    rolled = vintage_panel(panel, "2020-06-30", "rolling:12")
    assert list(rolled.dates) == list(panel.dates[18:30]) and rolled.hash != panel.cut("2020-06-30").hash
    assert vintage_panel(panel, "2018-06-30", "rolling:12").hash == panel.cut("2018-06-30").hash
    plan = plan_backfill(store, NAME, SPEC, chain=4, **CUTS)
    assert [v.chain for v in plan.vintages] == [0, 0, 0, 0, 1, 1] and plan.n_chains() == 2
