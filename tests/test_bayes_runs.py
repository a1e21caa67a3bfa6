"""Bayesian runs everywhere a run goes: the spec, ``panel.fit``, the store (both backends, and an
upgrade from schema version 2), ``reproduce`` bit for bit, and backfill vintages.

Plumbing tests on an invented panel (the sampler's statistics are checked against outside sources
in test_bayes_posterior.py and test_bayes_paths.py); short chains keep them fast.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from sqlalchemy import create_engine

from panel import plots, units
from panel.data import Panel
from panel.model.fit import fit
from panel.model.spec import ModelSpec, SpecError
from panel.store import (is_bayes, list_runs, open_store, run_query, run_tables, schema, upgrade,
                         write_dataset)
from panel.store.migrate import apply_migrations
from panel.vintages.reproduce import reproduce, store_fit, stored_cross_section
from tests.backends import BOTH
from tests.cli_helpers import cli_small_frame

#: Short chains: enough to exercise every table, not to mix.
QUICK = dict(estimation="bayes", draws=25, chains=2, warmup=15, summary_draws=6, premium_factors=0)


@pytest.fixture(scope="module")
def panel():
    return Panel.from_frame(cli_small_frame(seed=5, months=48))


@pytest.fixture(scope="module")
def bayes_fit(panel):
    return fit(panel, ModelSpec(**QUICK, seed=7))


# ---------------------------------------------------------------------------------------------
# the spec

def test_ml_settings_are_unchanged_and_old_settings_read_back():
    spec = ModelSpec(premium_factors=1, fixed={"own_premium_vol": 0.01})
    stored = spec.to_dict()
    assert not {"estimation", "draws", "chains", "seed", "warmup", "priors", "summary_draws"} & set(stored)
    assert ModelSpec.from_dict(stored) == spec
    assert ModelSpec.from_dict(stored).estimation == "ml"


def test_bayes_spec_round_trips_with_every_prior_recorded():
    spec = ModelSpec(**QUICK, seed=3, priors={"premium_vol": 0.03})
    stored = spec.to_dict()
    assert stored["estimation"] == "bayes" and stored["draws"] == 25
    assert stored["priors"]["premium_vol"] == 0.03 and stored["priors"]["premium_vol_family"] == "halfnormal"
    assert ModelSpec.from_dict(stored) == spec
    assert ModelSpec(estimation="bayes").prior_settings()["premium_vol"] == 0.02   # the default


@pytest.mark.parametrize("settings, words", [
    (dict(draws=100), "apply to Bayesian estimation only"),
    (dict(estimation="bayes", premium_prior={"vol": 0.01, "weight": 60}), "prior of ML estimation"),
    (dict(estimation="bayes", chains=0), "chains must be a whole number"),
    (dict(estimation="bayes", starts=3), "ML estimation only"),
    (dict(estimation="sampling"), "estimation must be"),
])
def test_unusable_bayes_settings_are_refused_in_one_line(settings, words):
    if isinstance(settings.get("premium_prior"), dict):
        from panel.model.spec import Prior

        settings["premium_prior"] = Prior(**settings["premium_prior"])
    with pytest.raises(SpecError, match=words) as error:
        ModelSpec(**settings).resolve(5, 12, 48, tuple("abcde"))
    assert "\n" not in str(error.value)


def test_bad_prior_is_refused_when_the_spec_is_built():
    with pytest.raises(SpecError, match="unknown prior settings"):
        ModelSpec(estimation="bayes", priors={"premium_volatility": 0.02})


# ---------------------------------------------------------------------------------------------
# panel.fit

def test_fit_returns_a_panelfit_with_posterior_columns(bayes_fit, panel):
    r = bayes_fit
    assert r.status in ("mixed", "not mixed") and r.converged == (r.status == "mixed")
    assert r.posterior is not None and r.n_iter == 2 * (25 + 15)
    for column in ("filtered_q05", "filtered_q95", "smoothed_q05", "smoothed_q95"):
        assert r.estimates[column].notna().all()
    est = r.estimates
    assert (est["smoothed_q05"] < est["smoothed_mean"]).all() and (est["smoothed_mean"] < est["smoothed_q95"]).all()
    monitored = r.parameters[r.parameters["rhat"].notna()]
    assert set(monitored["name"]) >= {"idio_premium_var", "return_cov", "return_idio_var"}
    # value is the posterior-mean parameter: q equals the mean of the q draws
    q = r.parameters[r.parameters["name"] == "idio_premium_var"]["value"].to_numpy()
    np.testing.assert_allclose(q, np.asarray(r.posterior.draws["q"]).mean(axis=(0, 1)), rtol=1e-12)
    assert r.settings()["sampler_seed"] == r.posterior.settings["seed"]
    assert r.message.endswith("; 3 gap cells drawn by the sampler")      # the panel's 3 gaps


def test_cross_section_mixes_over_the_draws(bayes_fit):
    r = bayes_fit
    cs = r.cross_section(r.dates[-1], "filtered")
    assert cs.mixture is not None and list(cs.table().columns)[-2:] == ["q05", "q95"]
    direct = r.posterior.prob_greater(r.dates[-1], "filtered").loc[list(cs.assets), list(cs.assets)]
    np.testing.assert_allclose(cs.prob_greater.to_numpy(), direct.to_numpy(), rtol=1e-12)
    last = r.estimates[r.estimates["date"] == r.dates[-1]].set_index("asset").loc[list(cs.assets)]
    np.testing.assert_allclose(cs.mean, last["filtered_mean"], rtol=1e-10)
    np.testing.assert_allclose(cs.table().set_index("asset").loc[list(cs.assets), "q05"],
                               last["filtered_q05"], rtol=1e-7)


@pytest.mark.parametrize("convention, power", [(units.YEARLY_CHANGE, 3), (units.LEGACY, 1)])
def test_fixed_premium_volatility_uses_the_specs_convention(panel, convention, power):
    # DESIGN §5: q = V^2 / ppy^3 (legacy specs: V^2 / ppy)
    spec = ModelSpec(**{**QUICK, "draws": 4, "warmup": 2, "summary_draws": 2},
                     fixed={"own_premium_vol": 0.015}, premium_vol_convention=convention)
    r = fit(panel, spec)
    q = np.asarray(r.posterior.draws["q"])
    np.testing.assert_allclose(q, 0.015 ** 2 / 12 ** power, rtol=1e-14)


def test_each_cut_off_draws_its_own_stream_and_a_refit_is_identical(panel, bayes_fit):
    spec = ModelSpec(**QUICK, seed=7)
    again = fit(panel, spec)
    assert again.posterior.settings["seed"] == bayes_fit.posterior.settings["seed"]
    assert again.estimates.equals(bayes_fit.estimates)
    earlier = fit(panel.cut(panel.dates[-2]), spec)
    assert earlier.posterior.settings["seed"] != bayes_fit.posterior.settings["seed"]


# ---------------------------------------------------------------------------------------------
# the store and reproduce

@BOTH
def test_bayes_run_is_stored_read_and_reproduced_bit_for_bit(backend, panel, bayes_fit):
    with open_store(backend.location("bayes")) as store:
        digest = write_dataset(store, panel, "trees")
        run_id = store_fit(store, bayes_fit, digest)
        ml_id = store_fit(store, fit(panel, ModelSpec(premium_factors=0)), digest)
        tables = run_tables(store, run_id)
        assert {"filtered_q05", "smoothed_q95"} <= set(tables["estimates"].columns)
        assert {"q05", "q50", "q95", "rhat", "ess_bulk", "ess_tail"} <= set(tables["parameters"].columns)
        assert len(tables["posterior_draws"]) > 0
        np.testing.assert_array_equal(tables["estimates"]["smoothed_q05"].to_numpy(),
                                      bayes_fit.estimates.sort_values(["date", "asset"])["smoothed_q05"])
        ml = run_tables(store, ml_id)                       # ML runs read back as before
        assert list(ml["estimates"].columns) == list(bayes_fit.estimates.columns[:9])
        assert list(ml["parameters"].columns) == ["name", "row", "col", "value", "std_error"]
        assert "posterior_draws" not in ml
        runs = list_runs(store)
        assert [is_bayes(r) for _, r in runs.iterrows()] == [True, False]
        cs, _ = stored_cross_section(store, run_id, kind="filtered")
        fresh = bayes_fit.cross_section(bayes_fit.dates[-1], "filtered")
        np.testing.assert_array_equal(cs.prob_greater.to_numpy(), fresh.prob_greater.to_numpy())
        outcome = reproduce(store, run_id, rtol=0.0)
        assert outcome.ok, [(t.table, t.note, t.max_rel) for t in outcome.tables]
        assert "posterior_draws" in [t.table for t in outcome.tables]
        assert reproduce(store, ml_id).ok


@BOTH
def test_a_version_2_store_upgrades_and_its_runs_still_read_and_reproduce(backend, panel):
    location = backend.location("v2")
    engine = create_engine(location if "://" in location else f"duckdb:///{location}")
    assert apply_migrations(engine, target=2) == [1, 2]
    engine.dispose()
    from panel.store.writer import _check_tables, _run_row, insert_dataset, insert_run
    from panel.vintages.reproduce import record_fit

    old = fit(panel, ModelSpec(premium_factors=0))
    engine = create_engine(location if "://" in location else f"duckdb:///{location}")
    with engine.begin() as conn:                            # written as version 2 code wrote it
        digest = insert_dataset(conn, panel, "trees")
        run, tables = record_fit(old, digest)
        checked = _check_tables(tables)
        insert_run(conn, _run_row(run), {k: f.drop(columns=list(schema.BAYES_COLUMNS.get(k, ())))
                                         for k, f in checked.items()})
    engine.dispose()
    with open_store(location, read_only=True) as store:
        assert store.schema_version == 2
    from typer.testing import CliRunner

    from panel.cli.app import app

    done = CliRunner().invoke(app, ["--store", location, "store", "upgrade"], catch_exceptions=False)
    assert done.exit_code == 0, done.output
    with open_store(location) as store:
        assert store.schema_version == 3 and upgrade(store) == []
        tables = run_tables(store, 1)
        assert list(tables["parameters"].columns) == ["name", "row", "col", "value", "std_error"]
        assert reproduce(store, 1).ok
        bayes = fit(panel, ModelSpec(**{**QUICK, "draws": 6, "warmup": 4, "summary_draws": 3}))
        assert reproduce(store, store_fit(store, bayes, digest), rtol=0.0).ok


def test_backfill_vintages_sample_with_their_own_recorded_seeds(tmp_path, panel):
    from panel.vintages.backfill import backfill

    spec = ModelSpec(**{**QUICK, "draws": 8, "warmup": 4, "summary_draws": 3})
    with open_store(tmp_path / "bf.duckdb") as store:
        digest = write_dataset(store, panel, "trees")
        backfill(store, digest, spec, start=str(panel.dates[-2].date()))
        runs = list_runs(store)
        seeds = [s["sampler_seed"] for s in runs["settings"]]
        assert len(runs) == 2 and len(set(seeds)) == 2 and len(set(runs["backfill_key"])) == 1
        assert set(runs["status"]) <= {"mixed", "not mixed"}
        assert reproduce(store, int(runs["id"].iloc[-1]), rtol=0.0).ok   # a warm-started vintage
        assert backfill(store, digest, spec, start=str(panel.dates[-2].date())).skipped == 2
        history = run_query(store, "revision_history", {"dataset": "trees", "asset": panel.assets[0],
                                                        "date": str(panel.dates[-2].date())})
    # the revisions chart bands Bayesian vintages by their posterior quantiles, not mean +- 1.645 sd
    assert len(history) == 2 and np.isfinite(history[["smoothed_q05", "smoothed_q95"]].to_numpy()).all()
    fig = plots.vintage_chart(history, panel.assets[0], panel.dates[-2], 12)
    band = fig.axes[0].collections[0].get_paths()[0].vertices[:, 1]
    np.testing.assert_allclose([band.min(), band.max()],
                               [1200 * history["smoothed_q05"].min(), 1200 * history["smoothed_q95"].max()])


def test_band_edges_use_quantiles_where_a_vintage_has_them():
    # a chart mixing an ML vintage (no quantiles) and a Bayesian one: each keeps its own band
    lo, hi = plots.band_edges([0.01, 0.01], [0.001, 0.001], 12, [np.nan, 0.008], [np.nan, 0.0125])
    np.testing.assert_allclose(lo, [1200 * (0.01 - plots.Z90 * 0.001), 1200 * 0.008])
    np.testing.assert_allclose(hi, [1200 * (0.01 + plots.Z90 * 0.001), 1200 * 0.0125])
