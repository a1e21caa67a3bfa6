"""The demo scenario (deterministic, invented) and the ``demo`` command end to end."""

from __future__ import annotations

import json
import re

import numpy as np
import pandas as pd
from typer.testing import CliRunner

from panel.cli.app import app
from panel.cli.output import CAUTION
from panel.demo import SLEEVES, SELL_OFF, scenario, write_scenario


def test_scenario_is_deterministic_with_late_entrants_a_gap_and_a_common_shock():
    a, b = scenario(), scenario()
    pd.testing.assert_frame_equal(a.returns, b.returns)
    assert not scenario(seed=99).returns.equals(a.returns)
    r = a.returns
    assert r.shape == (300, len(SLEEVES)) == (300, 8)
    assert r.index[0] == pd.Timestamp("2000-01-31") and r.index[-1] == pd.Timestamp("2024-12-31")
    for s in SLEEVES:
        col = r[s.name]
        if s.enters:
            assert col.loc[:pd.Timestamp(s.enters) - pd.Timedelta(days=1)].isna().all()
            assert col.loc[s.enters:].notna().sum() > 24
            assert a.premia[s.name].loc[:pd.Timestamp(s.enters) - pd.Timedelta(days=1)].isna().all()
        if s.outage:
            assert col.loc[s.outage[0]:s.outage[1]].isna().all() and len(col.loc[s.outage[0]:s.outage[1]]) == 6
    crash = r.loc[SELL_OFF]
    risky = [s.name for s in SLEEVES if s.market > 0.05]
    # the common shock hits the risky sleeves together (one may still rise on its own shock)
    assert (crash[risky] < 0).sum() >= len(risky) - 1 and crash[risky].mean() < -0.05
    assert crash["US Treasuries 7-10y"] > 0
    # volatility clusters: squared cross-sectional returns are autocorrelated
    level = (r ** 2).mean(axis=1)
    assert level.autocorr(1) > 0.1


def test_write_scenario_round_trips_through_ingest(tmp_path):
    from panel.ingest import read_panel

    scn = scenario()
    returns, truth = write_scenario(scn, tmp_path)
    panel = read_panel(returns, units="percent", date_col="month_end")
    assert list(panel.assets) == [s.name for s in SLEEVES]
    assert np.allclose(panel.values.to_numpy(), scn.returns.to_numpy(), atol=5e-7, equal_nan=True)
    true = pd.read_csv(truth, index_col=0)
    assert np.allclose(true.to_numpy(), scn.premia.to_numpy() * 1200, atol=1e-4, equal_nan=True)


def test_demo_command_end_to_end(tmp_path):
    store, out = tmp_path / "demo.duckdb", tmp_path / "demo"
    runner = CliRunner()
    done = runner.invoke(app, ["--store", str(store), "demo", "--out", str(out)], catch_exceptions=False)
    assert done.exit_code == 0, done.output
    for name in ("larkspur_sleeves.csv", "larkspur_true_premia.csv", "premium_paths.png", "cross_section.png",
                 "vintages.png"):
        assert (out / name).stat().st_size > 1000, name
        if name.endswith(".png"):
            assert (out / name).read_bytes()[:4] == b"\x89PNG"
    text = done.stdout
    assert "Larkspur Bay Capital (an invented fund): 8 sleeves, 300 months" in text
    assert "run 5 (2024-12-31)" in text and CAUTION in text
    assert "the 90% bands cover the simulated true premia" in text
    # The demo must show the tool working on its own simulated truth: the filtered premia are closer
    # to it than the practitioner's naive real-time estimate, the expanding sample mean (common
    # practice), and the 90% bands cover 85-95% of sleeve-months.
    rmse = re.search(r"RMSE ([0-9.]+) points a year, against ([0-9.]+) for the expanding sample mean", text)
    cover = re.search(r"cover the simulated true premia in ([0-9.]+)% \(filtered\)", text)
    assert float(rmse.group(1)) < float(rmse.group(2))
    assert 85.0 <= float(cover.group(1)) <= 95.0
    runs = json.loads(runner.invoke(app, ["--store", str(store), "runs", "--json"]).stdout)["runs"]
    assert [r["as_of"] for r in runs] == ["2020-12-31", "2021-12-31", "2022-12-31", "2023-12-31", "2024-12-31"]
    assert {r["kind"] for r in runs} == {"backfill"}
    # the newest vintage reproduces exactly
    again = runner.invoke(app, ["--store", str(store), "reproduce", "5", "--json"])
    assert again.exit_code == 0, again.output
    assert json.loads(again.stdout)["reproduced"] is True
