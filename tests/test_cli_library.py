"""The workflow library behind the CLI: run records, reproduction comparisons, charts."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from panel import ModelSpec, Panel, Prior, fit
from panel.vintages.reproduce import compare_table, record_fit, run_settings
from tests.cli_helpers import cli_small_frame


@pytest.fixture(scope="module")
def cli_small_fit():
    panel = Panel.from_frame(cli_small_frame())
    return panel, fit(panel.cut("2018-12-31"), ModelSpec(premium_prior=Prior(0.01, 60)))


def test_run_record_keeps_the_full_dataset_hash_and_the_cut_off(cli_small_fit):
    panel, result = cli_small_fit
    run, tables = record_fit(result, panel.hash, label="x", source={"dataset": "trees"})
    assert run["dataset_hash"] == panel.hash and str(run["as_of"]) == "2018-12-31"
    settings = run["settings"]
    assert settings["dataset_hash"] == panel.hash  # the dataset, not the cut panel
    assert settings["as_of"] == "2018-12-31" and settings["window"] == "expanding"
    assert ModelSpec.from_dict(settings["spec"]) == result.spec
    assert settings["source"] == {"dataset": "trees"}
    assert run["loglik"] == result.loglik and run["iterations"] == result.n_iter
    assert set(tables) >= {"estimates", "parameters"}
    assert run_settings(result, panel.hash)["start"] is None


def test_compare_table_finds_the_changed_number_and_where(cli_small_fit):
    _, result = cli_small_fit
    est = result.estimates
    same = compare_table("estimates", est, est.copy(), rtol=0, atol=0)
    assert same.ok and same.max_abs == 0 and same.values == est.shape[0] * 7
    changed = est.copy()
    i = 40
    changed.loc[i, "filtered_std"] *= 1 + 1e-7
    diff = compare_table("estimates", est, changed, rtol=1e-10, atol=0)
    assert not diff.ok
    assert diff.max_rel == pytest.approx(1e-7, rel=1e-3)
    row = est.loc[i]
    assert diff.where == f"filtered_std at date={row.date.date()}, asset={row.asset}"
    assert compare_table("estimates", est, changed, rtol=1e-6, atol=0).ok
    # a missing value on one side only never passes
    holed = est.copy()
    holed.loc[3, "smoothed_mean"] = np.nan
    assert not compare_table("estimates", est, holed, rtol=1, atol=1).ok
    # different rows
    fewer = compare_table("estimates", est, est.iloc[1:], rtol=1, atol=1)
    assert not fewer.ok and "rows differ" in fewer.note
    # text cells are compared exactly
    trace = result.trace.copy()
    trace.loc[0, "step"] = "other"
    assert not compare_table("trace", result.trace, trace, rtol=1, atol=1).ok
    # timings are not compared
    slow = result.trace.assign(elapsed_s=result.trace["elapsed_s"] + 5)
    assert compare_table("trace", result.trace, slow, rtol=0, atol=0).ok


def test_charts_state_units_basis_and_as_of(cli_small_fit):
    from panel import plots

    _, result = cli_small_fit
    fig = plots.premium_paths(result.estimates, ["Alder", "Elm"], 12, as_of="2018-12-31")
    assert "as of 2018-12-31" in fig._suptitle.get_text() and "annualised %" in fig._suptitle.get_text()
    labels = [t.get_text() for t in fig.legends[0].get_texts()]
    assert labels == ["filtered (real-time)", "its 90% band (edges)", "smoothed (revised)", "its 90% band"]
    assert fig.axes[0].get_ylabel() == "premium, % a year"
    # drawn values are the annualised premia (lines: smoothed, two filtered band edges, filtered)
    lines = fig.axes[0].get_lines()
    alder = result.estimates[result.estimates["asset"] == "Alder"]
    assert np.allclose(lines[3].get_ydata(), alder["filtered_mean"] * 1200)
    assert np.allclose(lines[0].get_ydata(), alder["smoothed_mean"] * 1200)
    with pytest.raises(ValueError, match="no estimates for asset"):
        plots.premium_paths(result.estimates, ["Oak"], 12, as_of="2018-12-31")
    cs = result.cross_section("2018-06-30", "smoothed")
    fig = plots.cross_section_chart(cs.table(), 12, cs.date, "smoothed", as_of="2018-12-31")
    assert "at 2018-06-30, smoothed (revised); as of 2018-12-31; annualised %" in fig.axes[0].get_title()
    history = plots.vintage_frame([("2018-12-31", result.estimates)], "Birch", "2018-06-30")
    assert list(history.columns)[:2] == ["as_of", "filtered_mean"] and len(history) == 1
    revised = history.assign(as_of=pd.Timestamp("2019-06-30"), smoothed_mean=history["smoothed_mean"] + 1e-4)
    fig = plots.vintage_chart(pd.concat([history, revised]), "Birch", "2018-06-30", 12, reference=0.004)
    assert "Birch at 2018-06-30" in fig._suptitle.get_text()
    with pytest.raises(ValueError, match="no vintage"):
        plots.vintage_chart(history.iloc[:0], "Birch", "2018-06-30", 12)
    with pytest.raises(ValueError, match="only one vintage"):
        plots.vintage_chart(history, "Birch", "2018-06-30", 12)


def test_save_writes_png(cli_small_fit, tmp_path):
    from panel import plots

    _, result = cli_small_fit
    path = plots.save(plots.premium_paths(result.estimates, ["Cedar"], 12, "2018-12-31"), tmp_path / "c.png")
    assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
