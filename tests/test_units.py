"""The trade's units (DESIGN.md section 5): premium volatility per year of the annualised premium,
frequency-invariant; legacy runs keep their convention; a constant premium is the sample mean."""

import numpy as np
import pandas as pd
import pytest

import panel
from panel import units
from panel.model.spec import ModelSpec

ASSETS = ("Harbour Equity", "Ridge Credit", "Delta Rates")


@pytest.mark.parametrize("ppy", [12, 4, 52, 1])
def test_fixed_premium_vol_maps_to_q_over_ppy_cubed(ppy):
    # DESIGN.md section 5: V% a year -> q = (V/100)^2 / ppy^3 per period; return vol -> h = vol^2 / ppy.
    spec = ModelSpec(fixed={"own_premium_vol": 0.01, "return_vol": 0.15}, max_premium_vol=0.03,
                     premium_factors=0)
    rs = spec.resolve(3, ppy, 100, ASSETS)
    assert rs.fixed_q == pytest.approx((0.01 ** 2 / ppy ** 3,) * 3, rel=1e-15)
    assert rs.fixed_psi == pytest.approx((0.15 ** 2 / ppy,) * 3, rel=1e-15)
    assert rs.max_sigma_diag == pytest.approx(0.03 ** 2 / ppy ** 3, rel=1e-15)


def test_same_premium_vol_moves_the_annualised_premium_alike_at_any_frequency():
    # Common practice: the increments of a random walk add up, so over one year (ppy periods) the
    # annualised premium ppy * mu changes with variance ppy * ppy^2 * q.  Simulated with a fixed seed:
    # the yearly change has sd V whether the data are monthly or quarterly.
    rng = np.random.default_rng(11)
    for ppy in (12, 4):
        q = units.premium_variance(0.02, ppy)
        steps = rng.normal(0.0, np.sqrt(q), (20000, ppy))
        yearly_change = ppy * steps.sum(axis=1)
        assert yearly_change.std() == pytest.approx(0.02, rel=0.02)
        assert units.premium_vol(q, ppy) == pytest.approx(0.02, rel=1e-14)


def test_premium_vol_alias_and_legacy_settings_reproduce_the_old_variance():
    assert ModelSpec(fixed={"premium_vol": 0.02}).fixed == (("own_premium_vol", 0.02),)
    with pytest.raises(panel.SpecError, match="given twice"):
        ModelSpec(fixed={"premium_vol": 0.02, "own_premium_vol": 0.01})
    stored = ModelSpec(fixed={"premium_vol": 0.02}, max_premium_vol=0.05).to_dict()
    del stored["premium_vol_convention"]          # a run stored before the convention was recorded
    legacy = ModelSpec.from_dict(stored)
    assert legacy.premium_vol_convention == units.LEGACY
    rs = legacy.resolve(3, 12, 100, ASSETS)
    assert rs.fixed_q[0] == 0.02 ** 2 / 12        # bit for bit the old mapping
    assert rs.max_sigma_diag == 0.05 ** 2 / 12
    assert units.convert_premium_vol(0.02, 12, units.LEGACY) == pytest.approx(0.24, rel=1e-14)


def test_constant_premium_is_the_expanding_sample_mean():
    # Common practice: the practitioner's naive premium estimate is the expanding sample mean of the
    # excess returns.  With one asset, no factors and the premium volatility fixed at zero, the
    # filtered premium (exact diffuse start) is exactly that mean at every date.
    rng = np.random.default_rng(3)
    idx = pd.date_range("2001-01-31", periods=90, freq="ME")
    returns = pd.DataFrame({"Harbour Equity": rng.normal(0.006, 0.045, 90)}, index=idx)
    res = panel.fit(returns, ModelSpec(premium_factors=0, fixed={"own_premium_vol": 0.0}))
    expanding = returns["Harbour Equity"].expanding().mean().to_numpy()
    assert res.estimates["filtered_mean"].to_numpy() == pytest.approx(expanding, rel=1e-12, abs=1e-15)
    # its standard deviation is the standard error of that mean: sigma / sqrt(n)
    h = res.params.H[0, 0]
    n = np.arange(1, 91)
    assert res.estimates["filtered_std"].to_numpy() == pytest.approx(np.sqrt(h / n), rel=1e-10)
    assert res.status == "converged"


def test_zero_own_premium_vol_needs_no_more_assets_than_factors():
    with pytest.raises(panel.SpecError, match="only 1 common premium factor"):
        ModelSpec(fixed={"own_premium_vol": 0.0}).resolve(3, 12, 100, ASSETS)
    rs = ModelSpec(fixed={"own_premium_vol:Ridge Credit": 0.0}).resolve(3, 12, 100, ASSETS)
    assert rs.fixed_q[1] == 0.0


def test_a_run_stored_before_the_convention_shows_converted_and_reproduces_bit_for_bit(tmp_path):
    # A run written by riskprem before 2026-12: its settings carry no premium_vol_convention, and its
    # premium prior meant q = vol^2 / ppy.  It must reproduce exactly and show today's units.
    import json

    from typer.testing import CliRunner

    from panel.cli.app import app
    from panel.store import open_store, write_dataset, write_run
    from panel.vintages.reproduce import record_fit, reproduce
    from tests.cli_helpers import cli_small_frame

    data = panel.Panel.from_frame(cli_small_frame(seed=13) / 100.0)
    legacy = ModelSpec(premium_prior=panel.Prior(vol=0.01, weight=60), std_errors="never",
                       premium_vol_convention=units.LEGACY)
    res = panel.fit(data, legacy)
    path = tmp_path / "old.duckdb"
    with open_store(path) as store:
        digest = write_dataset(store, data, "old sleeves")
        run, tables = record_fit(res, digest)
        del run["settings"]["spec"]["premium_vol_convention"]      # as the old code wrote it
        run_id = write_run(store, run, tables)
    with open_store(path, read_only=True) as store:
        again = reproduce(store, run_id, rtol=0.0)
    assert again.ok                                                # bit for bit (rtol 0)
    shown = CliRunner().invoke(app, ["--store", str(path), "show", str(run_id)])
    assert shown.exit_code == 0, shown.output
    assert "12% a year (stored as 1 in the legacy sqrt(q x ppy) convention)" in shown.stdout
    stored = json.loads(CliRunner().invoke(app, ["--store", str(path), "runs", "--json"]).stdout)
    assert stored["runs"][0]["id"] == run_id
