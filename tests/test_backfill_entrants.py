"""Warm starts across asset-set changes: an asset entering (or leaving) between two cut-offs of one
chain keeps the chain warm.  Incumbents start from the predecessor's parameters, the entrant from the
moment-based rule on the vintage's own data; the start is recorded, so the vintage rebuilds exactly."""

import numpy as np
import pandas as pd
import pytest

from panel.vintages.backfill import BackfillInterrupted, backfill, rebuild_vintage, start_from_parameters, vintage_panel
from panel.vintages.starts import merge_start
from panel.data import Panel
from panel.model.fit import fit
from panel.model.problem import Problem as _Problem
from panel.model.params import Params
from panel.model.spec import ModelSpec
from panel.model.start import starting_values
from panel.store import list_runs, open_store, run_tables, write_dataset

NAME = "marrowgate"
#: Diagonal H: on this panel the optimum is interior (no variance at zero), hence unique.
SPEC = ModelSpec(std_errors="never", return_shocks="diagonal", max_iter=500)
ENTERS = 100                                   # date index of the entrant's first observation
CUTS = dict(start="2009-03-31", end="2009-05-31")  # date indices 98..100: the entry is the last


def marrowgate_panel(retired_after: int | None = None) -> Panel:
    """120 monthly excess returns of five invented sleeves of the Marrowgate Pension Trust: premia
    are a common random walk plus sizeable own random walks, shocks a market factor plus noise.
    ``kelp_farms`` has data from date index ``ENTERS`` on; with ``retired_after``, ``salt_mines``
    has none after that date index."""
    rng = np.random.default_rng(4711)
    names = ["ferry_equity", "dune_credit", "gull_rates", "salt_mines", "kelp_farms"]
    T = 120
    premia = (np.outer(np.cumsum(rng.normal(0.0, 1.0, T)), [0.0030, 0.0024, 0.0015, 0.0009, 0.0018])
              + np.cumsum(rng.normal(0.0, 0.008, (T, 5)), axis=0))
    market = np.outer(rng.normal(0.0, 1.0, T), [0.030, 0.018, -0.006, 0.008, 0.012])
    values = premia + market + rng.normal(0.0, 0.01, (T, 5))
    values[:ENTERS, 4] = np.nan
    if retired_after is not None:
        values[retired_after + 1:, 3] = np.nan
    dates = pd.date_range("2001-01-31", periods=T, freq="ME")
    return Panel.from_frame(pd.DataFrame(values, index=dates, columns=names), "M")


def _runs(store):
    return list_runs(store, NAME).sort_values("as_of").reset_index(drop=True)


def _entry_backfill(tmp_path, spec=SPEC, **options):
    """(store, runs, panel) of an expanding backfill whose one chain sees the entrant arrive."""
    panel = marrowgate_panel()
    store = open_store(tmp_path / "entry.duckdb")
    write_dataset(store, panel, NAME)
    backfill(store, NAME, spec, chain=3, **CUTS, **options)
    return store, _runs(store), panel


def _cold_values(panel, as_of, spec):
    """The moment-based start ``fit`` uses on the vintage at ``as_of``."""
    problem = _Problem(vintage_panel(panel, as_of), spec)
    return starting_values(problem.Y, problem.rs)


@pytest.mark.parametrize("shocks", ["diagonal", "factor", "full"])
def test_the_entry_vintage_is_warm_and_its_recorded_start_has_the_entrants_row(tmp_path, shocks):
    spec = ModelSpec(std_errors="never", return_shocks=shocks, max_iter=500)
    store, runs, panel = _entry_backfill(tmp_path, spec)
    with store:
        entry = runs.iloc[2]
        assert pd.Timestamp(entry.as_of) == panel.dates[ENTERS]
        assert [None if pd.isna(p) else int(p) for p in runs["parent_run"]] == [
            None, int(runs.id[0]), int(runs.id[1])]
        start = Params.from_dict(entry.settings["start"])
        parent = start_from_parameters(run_tables(store, int(entry.parent_run))["parameters"], panel.assets[:4])
    assert start.n_assets == 5
    cold = _cold_values(panel, entry.as_of, spec)
    # the entrant: the moment-based values (its loading rotated onto the predecessor's factor)
    assert start.q[4] == cold.q[4] and abs(start.Lambda[4, 0]) == abs(cold.Lambda[4, 0])
    # incumbents: the predecessor's parameters exactly
    np.testing.assert_array_equal(start.Lambda[:4], parent.Lambda)
    np.testing.assert_array_equal(start.q[:4], parent.q)
    if shocks == "full":       # block-diagonal: no return-shock covariance with the entrant yet
        np.testing.assert_array_equal(start.H[:4, :4], parent.H)
        assert not start.H[4, :4].any() and start.H[4, 4] == cold.H[4, 4]
    else:
        np.testing.assert_array_equal(start.psi, np.append(parent.psi, cold.psi[4]))
    if shocks == "factor":     # cross terms from the loadings
        np.testing.assert_array_equal(start.B[:4], parent.B)
        assert abs(start.B[4, 0]) == abs(cold.B[4, 0])
        np.testing.assert_allclose(start.H[4, :4], start.B[4] @ start.B[:4].T, rtol=1e-14)
    assert np.linalg.eigvalsh(start.H).min() > 0


def test_the_warm_entry_vintage_reaches_the_cold_optimum_in_fewer_e_steps(tmp_path):
    store, runs, panel = _entry_backfill(tmp_path)
    with store:
        entry = runs.iloc[2]
    cold = fit(vintage_panel(panel, entry.as_of), SPEC)
    assert not pd.isna(entry.parent_run) and entry.status == cold.status == "converged"
    assert abs(entry.loglik - cold.loglik) <= 1e-6 * abs(cold.loglik)
    assert entry.iterations < cold.n_iter          # measured: 28 warm, 88 cold


def test_the_entry_vintage_is_rebuilt_exactly_from_its_recorded_start(tmp_path):
    store, runs, panel = _entry_backfill(tmp_path, spec=ModelSpec(std_errors="never", max_iter=500))
    with store:
        entry = runs.iloc[2]
        assert entry.settings["start"] is not None
        stored = run_tables(store, int(entry.id))
        rebuilt = rebuild_vintage(store, int(entry.id))
    assert rebuilt.start.to_dict() == entry.settings["start"]
    assert rebuilt.loglik == entry.loglik and rebuilt.n_iter == entry.iterations
    for table, keys, column in (("parameters", ["name", "row", "col"], "value"),
                                ("estimates", ["date", "asset"], "smoothed_mean")):
        got = rebuilt.tables()[table].sort_values(keys).reset_index(drop=True)
        want = stored[table].sort_values(keys).reset_index(drop=True)
        np.testing.assert_array_equal(got[column].to_numpy(dtype=float), want[column].to_numpy(dtype=float))


def test_resuming_after_the_vintage_before_the_entry_gives_the_uninterrupted_vintages(tmp_path):
    seen = []

    def stop_before_entry(event):
        if event.as_of is not None:
            seen.append(event.run_id)
        if len(seen) == 2:                         # the vintages at date indices 98 and 99
            raise KeyboardInterrupt

    panel = marrowgate_panel()
    with open_store(tmp_path / "cut.duckdb") as store:
        write_dataset(store, panel, NAME)
        with pytest.raises(BackfillInterrupted):
            backfill(store, NAME, SPEC, chain=3, progress=stop_before_entry, **CUTS)
        resumed = backfill(store, NAME, SPEC, chain=3, **CUTS)
        assert resumed.skipped == 2 and len(resumed.written) == 1 and resumed.written[0].as_of == panel.dates[ENTERS]
        assert resumed.written[0].parent_run == seen[1]   # warm from the stored run's parameters
        runs = _runs(store)
        cut = {pd.Timestamp(r.as_of): (r.settings["start"], run_tables(store, int(r.id))) for r in runs.itertuples()}
    store, runs, _ = _entry_backfill(tmp_path)
    with store:
        whole = {pd.Timestamp(r.as_of): (r.settings["start"], run_tables(store, int(r.id))) for r in runs.itertuples()}
    assert list(cut) == list(whole)
    for as_of, (start, tables) in whole.items():
        assert cut[as_of][0] == start
        for table in ("estimates", "parameters"):
            pd.testing.assert_frame_equal(cut[as_of][1][table], tables[table])


def test_an_asset_leaving_a_rolling_window_is_dropped_from_the_start(tmp_path):
    spec = ModelSpec(std_errors="never", max_iter=500)                  # factor H, the default
    panel = marrowgate_panel(retired_after=94)
    with open_store(tmp_path / "exit.duckdb") as store:
        write_dataset(store, panel, NAME)
        # a 24-period window at cut-off index c covers c-23..c: salt_mines (last date 94) leaves at 118
        backfill(store, NAME, spec, chain=3, window="rolling:24", start="2010-09-30", end="2010-11-30")
        runs = _runs(store)
        before, after = runs.iloc[1], runs.iloc[2]
        assert pd.Timestamp(after.as_of) == panel.dates[118] and int(after.parent_run) == int(before.id)
        kept = vintage_panel(panel, after.as_of, "rolling:24").assets
        assert "salt_mines" in vintage_panel(panel, before.as_of, "rolling:24").assets
        assert "salt_mines" not in kept and len(kept) == 4
        parent = start_from_parameters(run_tables(store, int(before.id))["parameters"],
                                       vintage_panel(panel, before.as_of, "rolling:24").assets)
    start = Params.from_dict(after.settings["start"])
    stay = [0, 1, 2, 4]                                                  # all but salt_mines
    assert start.n_assets == 4
    for name in ("Lambda", "q", "B", "psi"):
        np.testing.assert_array_equal(getattr(start, name), getattr(parent, name)[stay])


def test_merge_aligns_the_entrants_factors_and_keeps_the_identified_form():
    rng = np.random.default_rng(3)
    before = ("a", "b", "c", "d")
    L_prev = np.tril(rng.uniform(0.5, 1.0, (4, 2)))
    H_prev = np.cov(rng.normal(size=(4, 50))) + np.eye(4)
    previous = Params.build(L_prev, np.full(4, 0.1), "full", H=H_prev)
    # the cold start's factors: the predecessor's rotated by 90 degrees, plus an entrant "e" in front
    turn = np.array([[0.0, -1.0], [1.0, 0.0]])
    L_cold = np.vstack([[0.3, 0.4], L_prev[[0, 2, 3]]]) @ turn
    cold = Params.build(L_cold, np.full(4, 0.2), "full", H=np.eye(4) * 2.0)
    merged = merge_start(previous, before, cold, ("e", "a", "c", "d"), "full")   # "b" left
    assert merged.n_assets == 4 and merged.psi is None
    assert merged.Lambda[0, 1] == 0 and merged.Lambda[0, 0] > 0 and merged.Lambda[1, 1] > 0
    S = merged.Lambda @ merged.Lambda.T
    want = np.vstack([[0.3, 0.4], L_prev[[0, 2, 3]]])      # the entrant on the predecessor's factors
    np.testing.assert_allclose(S, want @ want.T, rtol=1e-12, atol=1e-15)
    np.testing.assert_array_equal(merged.q, [0.2, 0.1, 0.1, 0.1])
    np.testing.assert_array_equal(merged.H[1:, 1:], previous.H[np.ix_([0, 2, 3], [0, 2, 3])])
    assert merged.H[0, 0] == 2.0 and not merged.H[0, 1:].any()


def test_an_entrant_that_changes_the_resolved_model_starts_cold(tmp_path):
    # two sleeves resolve to k = 0 and a full H, three to k = 1 and a factor H: nothing to carry over
    three = marrowgate_panel().values[["ferry_equity", "dune_credit", "kelp_farms"]]
    with open_store(tmp_path / "grow.duckdb") as store:
        write_dataset(store, Panel.from_frame(three, "M"), NAME)
        backfill(store, NAME, ModelSpec(std_errors="never", max_iter=200), chain=3, **CUTS)
        runs = _runs(store)
    assert [pd.isna(p) for p in runs["parent_run"]] == [True, False, True]
    assert runs.iloc[2].settings["start"] is None
