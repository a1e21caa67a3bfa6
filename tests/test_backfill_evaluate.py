"""Revisions and out-of-sample evaluation of stored vintages.

Outside references: the out-of-sample R² is checked against its defining formula (Campbell &
Thompson 2008, Review of Financial Studies 21(4): R2_OS = 1 - sum (r - m)^2 / sum (r - b)^2) on a
hand-worked example; the Clark & West (2007, Journal of Econometrics 138(1)) statistic against the
regression of f_t = (r - b)^2 - [(r - m)^2 - (b - m)^2] on a constant fitted by statsmodels OLS, with
its plain, Newey-West (HAC), date-clustered and Driscoll-Kraay (hac-groupsum) standard errors.
"""

from fractions import Fraction

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import stats

from panel.vintages.backfill import BackfillError, backfill, find_backfill, list_backfills
from panel.vintages.evaluation import (clark_west, clark_west_terms, default_lags, evaluate_backfill, evaluate_forecasts,
                              oos_r2, revisions)
from panel.data import Panel
from panel.store import list_runs, run_tables, write_dataset
from tests.backfill_fixtures import NAME, SPEC, sleeves_store  # noqa: F401
from tests.backends import BOTH

CUTS = dict(start="2023-06-30", end="2023-11-30")


# ---------------------------------------------------------------------------------------------
# the statistics against outside references

def test_oos_r2_and_clark_west_terms_on_a_hand_worked_example():
    r = [0.01, -0.02, 0.03]
    m = [0.0, 0.0, 0.01]
    b = [0.005, 0.005, 0.005]
    # by hand, in units of 1e-4: sum (r-m)^2 = 1 + 4 + 4 = 9; sum (r-b)^2 = 0.25 + 6.25 + 6.25 = 12.75
    assert oos_r2(r, m, b) == pytest.approx(float(1 - Fraction(9) / Fraction(51, 4)), rel=1e-12)  # = 5/17
    assert oos_r2(r, m, b) == pytest.approx(5 / 17, rel=1e-12)
    # f = (r-b)^2 - [(r-m)^2 - (b-m)^2]: (0.25 - 1 + 0.25, 6.25 - 4 + 0.25, 6.25 - 4 + 0.25) x 1e-4
    np.testing.assert_allclose(clark_west_terms(r, m, b), np.array([-0.5, 2.5, 2.5]) * 1e-4, rtol=1e-12)
    test = clark_west(r, m, b)
    f = np.array([-0.5, 2.5, 2.5]) * 1e-4
    se = np.sqrt(np.var(f, ddof=1) / 3)
    assert test.mean == pytest.approx(f.mean()) and test.se == pytest.approx(se)
    assert test.pvalue == pytest.approx(1 - stats.norm.cdf(f.mean() / se))
    assert oos_r2(r, b, b) == 0.0 and oos_r2(r, r, b) == 1.0


def _sample(n=60, seed=4):
    rng = np.random.default_rng(seed)
    r = rng.normal(0.005, 0.04, n)
    m = 0.004 + 0.3 * (r - 0.005) + rng.normal(0, 0.004, n)      # some skill
    b = 0.0045 + rng.normal(0, 0.0005, n)
    return r, m, b


@pytest.mark.parametrize("se, lags, fit_kwargs", [
    ("plain", None, {}),
    ("newey-west", 3, {"cov_type": "HAC", "cov_kwds": {"maxlags": 3, "use_correction": False}}),
    ("newey-west", 0, {"cov_type": "HAC", "cov_kwds": {"maxlags": 0, "use_correction": False}}),
])
def test_clark_west_equals_the_statsmodels_regression_on_a_constant(se, lags, fit_kwargs):
    r, m, b = _sample()
    f = (r - b) ** 2 - ((r - m) ** 2 - (b - m) ** 2)
    ols = sm.OLS(f, np.ones((f.size, 1))).fit(**fit_kwargs)
    test = clark_west(r, m, b, se=se, lags=lags)
    assert test.mean == pytest.approx(ols.params[0], rel=1e-12)
    assert test.se == pytest.approx(ols.bse[0], rel=1e-10)
    assert test.t == pytest.approx(ols.tvalues[0], rel=1e-10)
    assert test.pvalue == pytest.approx(stats.norm.sf(ols.tvalues[0]), rel=1e-10)   # one-sided, normal


@pytest.mark.parametrize("se, lags, fit_kwargs", [
    ("plain", None, {"cov_type": "cluster", "cov_kwds": {"use_correction": False}}),
    ("newey-west", 2, {"cov_type": "hac-groupsum", "cov_kwds": {"maxlags": 2, "use_correction": False}}),
])
def test_pooled_clark_west_equals_statsmodels_with_errors_summed_by_date(se, lags, fit_kwargs):
    r, m, b = _sample(n=48, seed=9)
    dates = np.repeat(pd.date_range("2020-01-31", periods=12, freq="ME").values, 4)   # 4 assets a date
    order = np.random.default_rng(1).permutation(48)                                   # any row order
    r, m, b, dates = r[order], m[order], b[order], dates[order]
    codes = pd.factorize(pd.Series(dates), sort=True)[0]
    f = clark_west_terms(r, m, b)
    kwargs = dict(fit_kwargs)
    kwargs["cov_kwds"] = {**kwargs["cov_kwds"], ("groups" if se == "plain" else "time"): codes}
    ols = sm.OLS(f, np.ones((f.size, 1))).fit(**kwargs)
    test = clark_west(r, m, b, se=se, lags=lags, groups=dates)
    assert test.mean == pytest.approx(ols.params[0], rel=1e-12)
    assert test.se == pytest.approx(ols.bse[0], rel=1e-10)


def test_default_newey_west_lags_and_bad_options():
    assert [default_lags(n) for n in (10, 100, 500)] == [2, 4, 5]
    with pytest.raises(ValueError, match="se must be one of plain, newey-west"):
        clark_west([0.1, 0.2], [0.0, 0.1], [0.1, 0.1], se="robust")
    frame = pd.DataFrame({"asset": ["a"] * 3, "target_date": pd.date_range("2020-01-31", periods=3, freq="ME"),
                          "forecast": 0.0, "benchmark": 0.1, "realized": [0.1, 0.2, np.nan]})
    table, pooled = evaluate_forecasts(frame)
    assert int(table.loc[0, "n"]) == 2 and pooled["n"] == 2                 # a missing realized return is left out
    with pytest.raises(BackfillError, match="lags must be >= 0"):
        evaluate_forecasts(frame, se="newey-west", lags=-1)


# ---------------------------------------------------------------------------------------------
# against the store

def _vintages(store, name=NAME):
    runs = list_runs(store, name).sort_values("as_of")
    return [(pd.Timestamp(r.as_of), int(r.id), run_tables(store, int(r.id))["estimates"]) for r in runs.itertuples()]


def test_evaluation_pairs_each_vintage_forecast_with_the_next_return_and_the_historical_mean(sleeves_store):
    store, panel = sleeves_store
    backfill(store, NAME, SPEC, chain=3, **CUTS)
    chosen = find_backfill(store, NAME)
    result = evaluate_backfill(store, chosen)
    pairs = []                                          # rebuilt from the stored estimates and the panel
    for as_of, run_id, est in _vintages(store):
        target = panel.dates[panel.dates > as_of][0]
        for asset in panel.assets:
            row = est[(est["asset"] == asset) & (pd.to_datetime(est["date"]) == as_of)].iloc[0]
            pairs.append({"asset": asset, "as_of": as_of, "run_id": run_id, "target_date": target,
                          "forecast": row["filtered_mean"],
                          "benchmark": panel.values.loc[:as_of, asset].mean(),
                          "realized": panel.values.loc[target, asset]})
    want = pd.DataFrame(pairs).sort_values(["asset", "as_of"]).reset_index(drop=True)
    got = result.forecasts.sort_values(["asset", "as_of"]).reset_index(drop=True)
    assert list(got["run_id"]) == list(want["run_id"])
    assert (pd.to_datetime(got["target_date"]) == want["target_date"]).all()
    for column in ("forecast", "benchmark", "realized"):
        np.testing.assert_allclose(got[column], want[column], rtol=1e-13, atol=0)
    for asset, frame in want.groupby("asset"):
        row = result.table.set_index("asset").loc[asset]
        assert row["n"] == len(frame) == 6
        assert row["r2_os"] == pytest.approx(oos_r2(frame["realized"], frame["forecast"], frame["benchmark"]))
        assert row["cw_t"] == pytest.approx(clark_west(frame["realized"], frame["forecast"], frame["benchmark"]).t)
    assert result.pooled["n"] == 24 and result.pending == 0
    assert result.pooled["r2_os"] == pytest.approx(oos_r2(want["realized"], want["forecast"], want["benchmark"]))


@BOTH
def test_revisions_follow_one_premium_from_its_first_release_to_the_latest_vintage(sleeves_store):
    store, panel = sleeves_store
    backfill(store, NAME, SPEC, chain=3, **CUTS)
    chosen = find_backfill(store, NAME)
    date = pd.Timestamp("2023-08-31")
    found = revisions(store, chosen, "tidal_rates", date)
    covering = [(a, i, e) for a, i, e in _vintages(store) if a >= date]
    assert list(found.path["run_id"]) == [i for _, i, _ in covering]
    at = [e[(e["asset"] == "tidal_rates") & (pd.to_datetime(e["date"]) == date)].iloc[0] for _, _, e in covering]
    first = at[0]["filtered_mean"]
    assert found.first_release == (date, pytest.approx(first))
    assert found.latest == (covering[-1][0], pytest.approx(at[-1]["smoothed_mean"]))
    np.testing.assert_allclose(found.path["revision"], [a["smoothed_mean"] - first for a in at], rtol=1e-12)
    # mean absolute revision per asset: newest smoothed minus first-release filtered, dates in >= 2 vintages
    vintages = _vintages(store)
    newest = vintages[-1][2]
    for asset in panel.assets:
        revs = []
        for day in pd.to_datetime(newest.loc[newest["asset"] == asset, "date"]):
            covers = [e for a, _, e in vintages if a >= day]
            if len(covers) < 2:
                continue
            pick = lambda e: e[(e["asset"] == asset) & (pd.to_datetime(e["date"]) == day)].iloc[0]  # noqa: E731
            revs.append(pick(covers[-1])["smoothed_mean"] - pick(covers[0])["filtered_mean"])
        row = found.summary.set_index("asset").loc[asset]
        assert row["n_dates"] == len(revs) == len(panel.dates) - 2    # up to 2023-10-31: in >= 2 vintages
        assert row["mean_abs_revision"] == pytest.approx(np.mean(np.abs(revs)), rel=1e-12)
        assert row["max_abs_revision"] == pytest.approx(np.max(np.abs(revs)), rel=1e-12)


@BOTH
def test_the_revision_summary_stops_at_an_assets_last_return(sleeves_store):
    # lighthouse_gold leaves after 2023-08-31: every vintage's premium for it after that is the
    # prediction from that return, so the summary stops there; the others run to 2023-10-31
    store, panel = sleeves_store
    frame = panel.values.copy()
    frame.loc[frame.index > "2023-08-31", "lighthouse_gold"] = np.nan
    write_dataset(store, Panel.from_frame(frame, "M"), "quillmoor_exit")
    backfill(store, "quillmoor_exit", SPEC, chain=3, **CUTS)
    found = revisions(store, find_backfill(store, "quillmoor_exit"), "tidal_rates", "2023-08-31")
    summary = found.summary.set_index("asset")
    vintages = _vintages(store, "quillmoor_exit")
    for asset in panel.assets:
        last = pd.Timestamp("2023-08-31" if asset == "lighthouse_gold" else "2023-10-31")
        days = panel.dates[panel.dates <= last]
        pick = lambda e, day: e[(e["asset"] == asset) & (pd.to_datetime(e["date"]) == day)].iloc[0]  # noqa: E731
        revs = [pick([e for a, _, e in vintages if a >= day][-1], day)["smoothed_mean"]
                - pick([e for a, _, e in vintages if a >= day][0], day)["filtered_mean"] for day in days]
        row = summary.loc[asset]
        assert row["n_dates"] == len(days) and pd.Timestamp(row["last_date"]) == last
        assert row["mean_abs_revision"] == pytest.approx(np.mean(np.abs(revs)), rel=1e-12)
    # the estimates themselves run on: the run of 2023-11-30 has lighthouse_gold's premium there
    newest = vintages[-1][2]
    assert ((newest["asset"] == "lighthouse_gold") & (pd.to_datetime(newest["date"]) == "2023-11-30")).any()


def test_a_backfill_is_found_by_settings_by_key_or_as_the_only_one(sleeves_store):
    store, panel = sleeves_store
    with pytest.raises(BackfillError, match="dataset 'quillmoor' has no backfill"):
        find_backfill(store, NAME)
    first = backfill(store, NAME, SPEC, chain=3, start="2023-10-31", end="2023-11-30")
    assert find_backfill(store, NAME).key == first.key
    second = backfill(store, NAME, SPEC, window="rolling:48", start="2023-10-31", end="2023-11-30")
    assert [b.key for b in list_backfills(store, NAME)] == [first.key, second.key]
    with pytest.raises(BackfillError, match="has 2 backfills .*rolling:48 2 vintages.*choose one with --key"):
        find_backfill(store, NAME)
    assert find_backfill(store, NAME, key=second.key[:8]).window == "rolling:48"
    assert find_backfill(store, NAME, spec=SPEC).key == first.key
    assert find_backfill(store, NAME, spec=SPEC, window="rolling:48").key == second.key
    with pytest.raises(BackfillError, match="no backfill of 'quillmoor' with these settings"):
        find_backfill(store, NAME, spec=SPEC, window="rolling:12")
    with pytest.raises(BackfillError, match="no backfill of 'quillmoor' with key 'ffffff'"):
        find_backfill(store, NAME, key="ffffff")


def test_revision_errors_name_the_fix(sleeves_store):
    store, panel = sleeves_store
    backfill(store, NAME, SPEC, start="2023-11-30", end="2023-12-31")
    chosen = find_backfill(store, NAME)
    with pytest.raises(BackfillError, match="no asset 'estuary' in the dataset; its assets: harbour_equity"):
        revisions(store, chosen, "estuary", "2023-08-31")
    with pytest.raises(BackfillError, match="2023-08-15 is not a date of the dataset"):
        revisions(store, chosen, "tidal_rates", "2023-08-15")
    with pytest.raises(BackfillError, match="date 'soon' is not a date"):
        revisions(store, chosen, "tidal_rates", "soon")
