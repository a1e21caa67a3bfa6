"""Every command through typer's CliRunner on a real DuckDB store file."""

from __future__ import annotations

import html
import json
import re

import numpy as np
import pandas as pd
import pytest

from tests.cli_helpers import CLI_ASSETS, CLI_FIT_OPTIONS, cli_small_frame, cli_write_csv
from panel.cli.output import CAUTION
from tests.backends import BOTH


def _json(result) -> dict:
    assert result.exit_code == 0, result.output
    return json.loads(result.stdout)


# ---------------------------------------------------------------------------------------------
# ingest, datasets

def test_ingest_prints_hash_shape_range_frequency_and_warnings(cli_store, tmp_path):
    frame = cli_small_frame(seed=9)
    frame["Empty"] = np.nan
    path = cli_write_csv(frame, tmp_path / "with_empty.csv")
    done = cli_store.invoke("ingest", path, "--name", "trees-b", "--units", "percent")
    assert done.exit_code == 0, done.output
    from panel.ingest import read_panel

    panel = read_panel(path, units="percent")
    assert panel.hash in done.stdout
    assert "60 dates x 5 assets" in done.stdout
    assert "2015-01-31 to 2019-12-31" in done.stdout
    assert "M (12 periods a year)" in done.stdout
    assert "'Empty' has no values; dropped" in done.stdout


@BOTH
def test_ingest_json_and_datasets(cli_store):
    facts = _json(cli_store.invoke("ingest", cli_store.csv, "--name", "again", "--units", "percent", "--json"))
    assert facts["n_assets"] == 5 and facts["n_dates"] == 60 and facts["frequency"] == "M"
    assert facts["first_date"] == "2015-01-31" and facts["last_date"] == "2019-12-31"
    listed = _json(cli_store.invoke("datasets", "--json"))["datasets"]
    assert len(listed) == 1  # same data, same hash: one snapshot under two names
    assert listed[0]["hash"] == facts["hash"]
    assert set(listed[0]["current_names"].split(", ")) == {"again", "trees"}
    table = cli_store.invoke("datasets")
    assert facts["hash"][:12] in table.stdout


# ---------------------------------------------------------------------------------------------
# fit

def test_fit_prints_run_status_fit_statistics_and_latest_premia(cli_store):
    done = cli_store.invoke("fit", "--data", "trees", *CLI_FIT_OPTIONS, "--as-of", "2019-03-31")
    assert done.exit_code == 0, done.output
    out = done.stdout
    assert "run 3 stored" in out and "as of 2019-03-31" in out
    assert "status: converged" in out
    assert "log-likelihood" in out and "AIC" in out and "BIC" in out
    assert "Premia at 2019-03-31, annualised % (x12)" in out and "90% band" in out
    assert "filtered (real-time)" in out and "smoothed (revised)" in out
    for asset in CLI_ASSETS:
        assert asset in out
    assert CAUTION in out
    runs = _json(cli_store.invoke("runs", "--json"))["runs"]
    assert [r["id"] for r in runs] == [1, 2, 3]
    assert runs[-1]["as_of"] == "2019-03-31" and runs[-1]["kind"] == "fit"


@BOTH
def test_fit_json_has_run_id_loglik_convergence_and_no_caution_line(cli_store):
    summary = _json(cli_store.invoke("fit", "--data", "trees", *CLI_FIT_OPTIONS, "--json"))
    assert summary["run_id"] == 3
    assert summary["converged"] is True and summary["iterations"] >= 1
    assert np.isfinite(summary["loglik"])
    assert summary["caution"] == CAUTION
    assert CAUTION not in summary.get("message", "")
    shown = _json(cli_store.invoke("show", "3", "--json"))
    assert shown["loglik"] == pytest.approx(summary["loglik"], rel=1e-12)
    latest = {r["asset"]: r for r in summary["latest"]["rows"]}
    assert set(latest) == set(CLI_ASSETS)
    # at the last date the smoothed estimate is the filtered one
    for row in latest.values():
        assert row["smoothed_mean"] == pytest.approx(row["filtered_mean"], rel=1e-9, abs=1e-15)


def test_fit_volatility_options_are_annualised_percent(cli_store):
    summary = _json(cli_store.invoke(
        "fit", "--data", "trees", "--fix", "return_vol:Elm=20", "--max-premium-vol", "3",
        "--premium-prior", "1.5:60", "--initial-premium", "4:10", "--vol-scale", "ewma:6",
        "--premium-factors", "1", "--return-shocks", "factor", "--max-iter", "20", "--json"))
    spec = summary["settings"]["spec"]
    assert spec["fixed"] == {"return_vol:Elm": pytest.approx(0.20)}
    assert spec["max_premium_vol"] == pytest.approx(0.03)
    assert spec["premium_prior"] == {"vol": pytest.approx(0.015), "weight": 60.0}
    assert spec["initial_premium"] == {"mean": pytest.approx(0.04), "vol": pytest.approx(0.10)}
    assert spec["vol_scale"]["kind"] == "ewma" and spec["vol_scale"]["half_life"] == 6.0
    shown = _json(cli_store.invoke("show", str(summary["run_id"]), "--json"))
    elm = shown["assets"].index("Elm")
    psi = shown["return_idio_var"][elm]
    assert np.sqrt(psi * 12) == pytest.approx(0.20, rel=1e-9)  # 20% a year, held fixed


def test_fit_file_ingests_the_file_as_a_dataset_first(cli_store, tmp_path):
    path = cli_write_csv(cli_small_frame(seed=21), tmp_path / "other trees.csv", percent=False)
    summary = _json(cli_store.invoke("fit", "--file", path, "--units", "decimal", *CLI_FIT_OPTIONS, "--json"))
    assert summary["dataset"] == "other trees"
    names = _json(cli_store.invoke("datasets", "--json"))["datasets"]
    assert {d["current_names"] for d in names} == {"trees", "other trees"}
    assert summary["settings"]["source"]["file"] == "other trees.csv"
    assert summary["settings"]["dataset_hash"] == summary["dataset_hash"]


# ---------------------------------------------------------------------------------------------
# reading runs

@BOTH
def test_runs_table_csv_and_dataset_filter(cli_store):
    table = cli_store.invoke("runs")
    assert table.exit_code == 0
    assert "full sample" in table.stdout and "2018-06-30" in table.stdout
    csv = cli_store.invoke("runs", "--csv")
    frame = pd.read_csv(pd.io.common.StringIO(csv.stdout))
    assert list(frame["id"]) == [1, 2]
    assert frame["spec_premium_prior_vol"][0] == pytest.approx(0.01)   # flat settings columns, no JSON cell
    assert len(_json(cli_store.invoke("runs", "--data", "trees", "--json"))["runs"]) == 2


def test_show_json_has_parameter_arrays_in_data_units(cli_store):
    shown = _json(cli_store.invoke("show", "1", "--json"))
    assert shown["assets"] == list(CLI_ASSETS)
    n = len(CLI_ASSETS)
    loadings = np.array(shown["loadings"])
    assert loadings.shape == (n, 1)
    assert len(shown["idio_premium_var"]) == n
    cov = np.array(shown["return_cov"])
    assert cov.shape == (n, n) and np.allclose(cov, cov.T)
    assert np.all(np.linalg.eigvalsh(cov) > 0)
    sigma = np.array(shown["premium_cov"])
    assert np.allclose(sigma, loadings @ loadings.T + np.diag(shown["idio_premium_var"]), rtol=1e-12)
    for key in ("loglik", "aic", "bic", "settings", "dataset_hash", "as_of", "caution"):
        assert key in shown
    assert shown["as_of"] == "2019-12-31"
    assert shown["aic"] == pytest.approx(-2 * shown["loglik"] + 2 * shown["n_params"])
    assert shown["environment"]["numpy_version"] == np.__version__


def test_show_human_lists_parameters_annualised(cli_store):
    done = cli_store.invoke("show", "1")
    assert done.exit_code == 0
    shown = _json(cli_store.invoke("show", "1", "--json"))
    alder = np.sqrt(np.array(shown["return_cov"])[0, 0] * 12) * 100
    assert f"{alder:.1f}" in done.stdout
    # DESIGN.md section 5: premium volatility sqrt(q x ppy^3), return volatility sqrt(h x ppy)
    own = np.sqrt(np.array(shown["premium_cov"])[0, 0] * 12 ** 3) * 100
    assert f"{own:.2f}" in done.stdout
    assert "sqrt(q x 12^3)" in done.stdout and "sqrt(h x 12)" in done.stdout and CAUTION in done.stdout


@BOTH
def test_estimates_filters_assets_and_dates_and_annualises(cli_store):
    rows = _json(cli_store.invoke("estimates", "1", "--asset", "Birch", "--last", "3", "--json"))["rows"]
    assert [r["date"] for r in rows] == ["2019-10-31", "2019-11-30", "2019-12-31"]
    assert {r["asset"] for r in rows} == {"Birch"}
    table = cli_store.invoke("estimates", "1", "--asset", "Birch", "--last", "1", "--kind", "filtered")
    assert f"{rows[-1]['filtered_mean'] * 1200:,.2f}" in table.stdout
    assert "smoothed" not in table.stdout.split("\n")[1]
    csv = cli_store.invoke("estimates", "2", "--last", "0", "--csv")
    frame = pd.read_csv(pd.io.common.StringIO(csv.stdout))
    assert frame["date"].max() == "2018-06-30"
    assert len(frame) == 42 * 4 + 30  # Elm enters in 2016-01


def test_cross_section_ranks_and_pairwise_probabilities(cli_store):
    res = _json(cli_store.invoke("cross-section", "1", "--date", "2019-06-30", "--kind", "smoothed", "--json"))
    means = [r["mean"] for r in res["ranked"]]
    assert means == sorted(means, reverse=True)
    p = np.array(res["prob_greater"]["matrix"], dtype=float)
    off = ~np.eye(len(p), dtype=bool)
    assert np.allclose((p + p.T)[off], 1.0)
    # highest-ranked premium beats the others with probability above one half
    assert np.all(p[0, 1:] > 0.5)
    table = cli_store.invoke("cross-section", "1", "--date", "2019-06-30", "--pairs")
    assert "P(premium of row > premium of column)" in table.stdout
    assert "Cross-section at 2019-06-30: smoothed" in table.stdout
    # the CLI's numbers are the evaluated fit's (rebuilt from the stored parameters)
    from panel.vintages.reproduce import evaluated_run
    from panel.store import open_store

    with open_store(cli_store.path, read_only=True) as store:
        cs = evaluated_run(store, 1).cross_section("2019-06-30", "smoothed")
    assert res["mean"] == pytest.approx(list(cs.mean), rel=1e-12)


@BOTH
def test_cross_section_matches_the_stored_estimates(cli_store):
    res = _json(cli_store.invoke("cross-section", "1", "--date", "2017-05-31", "--kind", "filtered", "--json"))
    est = _json(cli_store.invoke("estimates", "1", "--last", "0", "--kind", "filtered", "--json"))["rows"]
    stored = {r["asset"]: r["filtered_mean"] for r in est if r["date"] == "2017-05-31"}
    for row in res["ranked"]:
        assert row["mean"] == pytest.approx(stored[row["asset"]], rel=1e-10)


def test_diff_shows_both_runs_side_by_side(cli_store):
    done = cli_store.invoke("diff", "1", "2")
    assert done.exit_code == 0
    assert "Run 1 vs run 2" in done.stdout and "2018-06-30" in done.stdout and "2019-12-31" in done.stdout
    assert "smoothed at the common date 2018-06-30" in done.stdout
    res = _json(cli_store.invoke("diff", "1", "2", "--json"))
    assert res["common_date"] == "2018-06-30"
    assert {r["asset"] for r in res["premia"]} == set(CLI_ASSETS)
    names = {r["name"] for r in res["parameters"]}
    assert {"loading", "idio_premium_var", "return_cov"} <= names
    assert res["settings_changed"] == []


@BOTH
def test_export_writes_csv_and_parquet(cli_store, tmp_path):
    done = cli_store.invoke("export", "1", tmp_path / "est.parquet")
    assert done.exit_code == 0 and CAUTION in done.stdout
    frame = pd.read_parquet(tmp_path / "est.parquet")
    assert len(frame) == 60 * 4 + 48
    done = cli_store.invoke("export", "2", tmp_path / "par.csv", "--table", "parameters")
    assert done.exit_code == 0
    assert set(pd.read_csv(tmp_path / "par.csv")["name"]) >= {"loading", "return_cov"}


@pytest.mark.parametrize("chart,extra", [("paths", ["--asset", "Elm", "--asset", "Cedar"]),
                                         ("cross-section", ["--date", "2018-01-31"]),
                                         ("vintages", ["--date", "2018-06-30", "--asset", "Birch"])])
def test_plot_writes_a_png(cli_store, tmp_path, chart, extra):
    target = tmp_path / f"{chart}.png"
    done = cli_store.invoke("plot", "1", "--chart", chart, *extra, "--out", target)
    assert done.exit_code == 0, done.output
    assert target.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert target.stat().st_size > 10_000
    assert CAUTION in done.stdout


def test_report_writes_one_html_file(cli_store, tmp_path):
    target = tmp_path / "run1.html"
    done = cli_store.invoke("report", "1", "--out", target)
    assert done.exit_code == 0, done.output
    assert f"wrote {target}" in done.stdout and CAUTION in done.stdout
    page = target.read_text(encoding="utf-8")
    assert page.startswith("<!DOCTYPE html>") and "trees" in page and page.count(html.escape(CAUTION)) == 2
    assert 'id="vintages"' in page and "2 vintages of the same model" in page  # runs 2 and 1
    res = _json(cli_store.invoke("report", "2", "--out", tmp_path / "run2.html", "--json"))
    assert res["path"] == str(tmp_path / "run2.html") and res["bytes"] > 10_000


@BOTH
def test_query_list_and_run(cli_store):
    listed = _json(cli_store.invoke("query", "--list", "--json"))["queries"]
    assert "revision_history" in {q["name"] for q in listed}
    rows = _json(cli_store.invoke("query", "revision_history", "--param", "dataset=trees",
                                  "--param", "asset=Alder", "--param", "date=2018-06-30", "--json"))["rows"]
    assert [r["run_id"] for r in rows] == [2, 1]
    table = cli_store.invoke("query", "dataset_runs", "--param", "dataset=trees")
    assert "dataset_runs (2 rows" in table.stdout and CAUTION in table.stdout


@BOTH
def test_store_info_and_upgrade(cli_store, tmp_path):
    info = _json(cli_store.invoke("store", "info", "--json"))
    assert info["counts"]["runs"] == 2 and info["schema_version"] == info["code_schema_version"]
    human = cli_store.invoke("store", "info")
    assert "Rows per table" in human.stdout
    same = cli_store.invoke("store", "upgrade")
    assert same.exit_code == 0 and "already at schema version" in same.stdout
    # an older store is migrated, keeping its rows
    from sqlalchemy import create_engine

    from panel.store.migrate import apply_migrations

    old = tmp_path / "old.duckdb"
    engine = create_engine(f"duckdb:///{old}")
    apply_migrations(engine, target=1)
    engine.dispose()
    up = cli_store.runner.invoke(__import__("panel.cli.app", fromlist=["app"]).app,
                                 ["--store", str(old), "store", "upgrade", "--json"])
    assert up.exit_code == 0, up.output
    res = json.loads(up.stdout)
    assert res["from_version"] == 1 and res["to_version"] == info["code_schema_version"]


@BOTH
def test_reproduce_exact_and_writes_nothing_unless_saved(cli_store):
    before = cli_store.digest()
    done = cli_store.invoke("reproduce", "2")
    assert done.exit_code == 0, done.output
    assert "reproduced: every number within tolerance" in done.stdout
    for table in ("fit statistics", "estimates", "factors", "parameters", "trace", "diagnostics"):
        assert table in done.stdout
    assert cli_store.digest() == before
    res = _json(cli_store.invoke("reproduce", "1", "--rtol", "0", "--json"))
    assert res["reproduced"] is True
    assert all(t["max_abs_diff"] == 0 for t in res["tables"])
    saved = _json(cli_store.invoke("reproduce", "1", "--save", "--json"))
    run = _json(cli_store.invoke("show", str(saved["saved_run"]), "--json"))
    assert run["kind"] == "reproduce" and run["parent_run"] == 1


def test_reproduce_shows_the_blas_and_its_thread_limit_beside_the_platform(cli_store, monkeypatch):
    # the BLAS kernel and thread count decide the last bits of every product (README: reproduce):
    # a rebuild under another thread limit says so in the environment, whatever its numbers
    def platform(result):
        rows = {e["field"]: e for e in json.loads(result.stdout)["environment"]}
        return rows["platform"]

    same = platform(cli_store.invoke("reproduce", "1", "--json"))
    assert same["same"] and re.search(r"; BLAS .+, (\d+ threads?|no thread limit)$", same["recorded"])
    monkeypatch.setenv("RISKPREM_BLAS_THREADS", "3")
    other = platform(cli_store.invoke("reproduce", "1", "--json"))
    assert not other["same"] and other["current"].endswith(", 3 threads")
    assert other["recorded"] == same["recorded"]


def test_reproduce_fails_when_a_stored_number_was_changed(cli_store):
    import duckdb

    con = duckdb.connect(str(cli_store.path))
    con.execute("UPDATE estimates SET smoothed_mean = smoothed_mean * (1 + 1e-6) "
                "WHERE run_id = 2 AND asset = 'Cedar' AND date = DATE '2017-03-31'")
    con.close()
    before = cli_store.digest()
    done = cli_store.invoke("reproduce", "2")
    assert done.exit_code == 1
    lines = done.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: run 2 not reproduced")
    assert "estimates" in lines[0]
    assert "smoothed_mean at date=2017-03-31, asset=Cedar" in done.stdout
    assert cli_store.digest() == before
    loose = cli_store.invoke("reproduce", "2", "--rtol", "1e-5")
    assert loose.exit_code == 0


def test_quiet_and_verbose(cli_store):
    quiet = cli_store.runner.invoke(__import__("panel.cli.app", fromlist=["app"]).app,
                                    ["--store", str(cli_store.path), "--quiet", "fit", "--data", "trees",
                                     *CLI_FIT_OPTIONS])
    assert quiet.exit_code == 0 and quiet.stderr == ""
    loud = cli_store.runner.invoke(__import__("panel.cli.app", fromlist=["app"]).app,
                                   ["--store", str(cli_store.path), "--verbose", "fit", "--data", "trees",
                                    *CLI_FIT_OPTIONS])
    assert "fitting 5 assets x 60 dates" in loud.stderr
    verbose = cli_store.runner.invoke(__import__("panel.cli.app", fromlist=["app"]).app,
                                      ["--store", str(cli_store.path), "--verbose", "show", "1"])
    assert "numpy_version" in verbose.stdout


def test_store_from_environment_variable(cli_store, monkeypatch):
    from typer.testing import CliRunner

    from panel.cli.app import app

    monkeypatch.setenv("RISKPREM_STORE", str(cli_store.path))
    done = CliRunner().invoke(app, ["runs", "--json"])
    assert done.exit_code == 0 and len(json.loads(done.stdout)["runs"]) == 2


@pytest.mark.parametrize("args", [["show", "1"], ["estimates", "1"], ["cross-section", "1"],
                                  ["diff", "1", "2"], ["query", "dataset_runs", "--param", "dataset=trees"]])
def test_caution_line_in_human_output_and_key_in_json(cli_store, args):
    human = cli_store.invoke(*args)
    assert human.exit_code == 0 and CAUTION in human.stdout
    machine = _json(cli_store.invoke(*args, "--json"))
    assert machine["caution"] == CAUTION
    assert CAUTION not in json.dumps({k: v for k, v in machine.items() if k != "caution"})


def test_help_states_units_and_exit_codes(cli_store):
    done = cli_store.invoke("--help", store=False)
    assert "annualised" in done.stdout and "Exit codes" in done.stdout
    fit_help = cli_store.invoke("fit", "--help", store=False)
    assert "annualised %" in fit_help.stdout
