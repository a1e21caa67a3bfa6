"""The researcher's desk: model profiles, global options anywhere, tables that fit the terminal,
fast read commands that give the same numbers, statistics with their caveats, and the notebook API.

Fixtures: ``cli_store`` (tests/conftest.py: invented five-sleeve panel, run 1 full fit, run 2 a
vintage); the backfill tests use the invented panel of tests/backfill_fixtures.py.
"""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest

from tests.backends import BOTH
from tests.cli_helpers import CLI_FIT_OPTIONS

PROFILES = """
[profiles.team]
premium_prior = "1:60"
max_iter = 40
fix = ["return_vol=15"]

[profiles.typo]
premium_prior = "1:60"
premium_factor = 1

[profiles.badvalue]
premium_prior = "1-60"
"""


def _spec_of(result) -> dict:
    assert result.exit_code == 0, result.output
    return json.loads(result.stdout)["settings"]["spec"]


# ---------------------------------------------------------------------------------------------
# profiles

def test_profile_fills_options_explicit_ones_win_and_resolved_settings_are_stored(cli_store, tmp_path):
    config = tmp_path / "team.toml"
    config.write_text(PROFILES)
    spec = _spec_of(cli_store.invoke("fit", "--data", "trees", "--profile", "team", "--config", config, "--json"))
    assert spec["premium_prior"] == {"vol": 0.01, "weight": 60.0}
    assert spec["max_iter"] == 40 and spec["fixed"] == {"return_vol": 0.15}
    spec = _spec_of(cli_store.invoke("fit", "--data", "trees", "--profile", "team", "--config", config,
                                     "--max-iter", "7", "--fix", "return_vol=20", "--fix", "own_premium_vol=1",
                                     "--json"))
    assert spec["max_iter"] == 7                                           # typed option wins
    assert spec["fixed"] == {"return_vol": 0.2, "own_premium_vol": 0.01}   # --fix merges by name
    assert spec["premium_prior"] == {"vol": 0.01, "weight": 60.0}          # the rest from the profile


def test_profile_file_in_the_working_folder_is_found(cli_store, tmp_path, monkeypatch):
    (tmp_path / "riskprem.toml").write_text(PROFILES)
    monkeypatch.chdir(tmp_path)
    assert _spec_of(cli_store.invoke("fit", "--data", "trees", "--profile", "team", "--json"))["max_iter"] == 40


@pytest.mark.parametrize("profile, words", [
    ("typo", ["profile 'typo'", "key 'premium_factor'", "not a model option"]),
    ("badvalue", ["profile 'badvalue'", "key 'premium_prior'", "VOL:WEIGHT"]),
    ("missing", ["no profile 'missing'", "team"]),
])
def test_bad_profile_is_one_line_naming_file_profile_and_key_and_writes_nothing(cli_store, tmp_path,
                                                                                profile, words):
    config = tmp_path / "team.toml"
    config.write_text(PROFILES)
    before = cli_store.digest()
    result = cli_store.invoke("fit", "--data", "trees", "--profile", profile, "--config", config)
    assert result.exit_code == 1
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and str(config) in lines[0]
    assert all(w in lines[0] for w in words), lines[0]
    assert cli_store.digest() == before


# ---------------------------------------------------------------------------------------------
# command line

def test_global_options_after_the_command_version_and_version_json(cli_store):
    after = cli_store.invoke("runs", "--store", cli_store.path, "--json", store=False)
    before = cli_store.invoke("runs", "--json")
    assert after.exit_code == 0 and json.loads(after.stdout)["runs"] == json.loads(before.stdout)["runs"]
    assert cli_store.invoke("runs", "--store=" + str(cli_store.path), "-q", store=False).exit_code == 0
    version = cli_store.invoke("--version", store=False)
    from panel import __version__

    assert version.exit_code == 0 and version.stdout.strip() == __version__
    assert json.loads(cli_store.invoke("version", "--json", store=False).stdout)["riskprem"] == __version__


def test_hoisting_leaves_command_options_and_values_alone():
    from panel.cli.app import app, hoist_global_options
    import typer

    group = typer.main.get_command(app)
    assert hoist_global_options(group, ["runs", "--store", "x", "--json"]) == ["--store", "x", "runs", "--json"]
    assert hoist_global_options(group, ["fit", "--label", "q", "-v"]) == ["-v", "fit", "--label", "q"]
    assert hoist_global_options(group, ["runs", "--", "--store"]) == ["runs", "--", "--store"]
    assert hoist_global_options(group, ["runs", "--help"]) == ["runs", "--help"]


def test_tables_fit_80_columns_numbers_never_split(cli_store):
    from panel.cli import output

    for args in (("estimates", 1), ("cross-section", 1, "--pairs"), ("runs",), ("show", 1), ("diff", 1, 2)):
        result = cli_store.runner.invoke(__import__("panel.cli.app", fromlist=["app"]).app,
                                         ["--store", str(cli_store.path), *map(str, args)],
                                         env={"COLUMNS": "80"}, catch_exceptions=False)
        assert result.exit_code == 0, result.output
        assert max(len(line) for line in result.stdout.splitlines()) <= 80, args
    # a table too wide for 34 columns drops its last number columns and says so; numbers stay whole
    tab = output.table("t", ["asset", "premium", "90% band", "std"], [("Nordic Equity", "-3.64", "[-8.4, 36.3]",
                                                                        "12.50")])
    head, body, dropped = tab.lines(34)
    assert dropped == ["std"] and "[-8.4, 36.3]" in body[1] and max(len(x) for x in head + body) <= 34


def test_runs_label_dash_csv_flat_settings_and_estimates_csv_says_when_cut(cli_store):
    table = cli_store.invoke("runs").stdout
    assert "nan" not in table and "  -  " in table.splitlines()[4]    # run 2 has no label
    frame = pd.read_csv(__import__("io").StringIO(cli_store.invoke("runs", "--csv").stdout))
    assert "settings" not in frame.columns
    assert frame["spec_premium_prior_vol"].tolist() == [0.01, 0.01] and frame["window"].tolist() == ["expanding"] * 2
    full = cli_store.invoke("estimates", 1, "--csv")
    assert full.stderr == "" and pd.read_csv(__import__("io").StringIO(full.stdout))["date"].nunique() == 60
    cut = cli_store.invoke("estimates", 1, "--csv", "--last", "3")
    assert "the last 3 of 60 dates" in cut.stderr
    assert "the last 12 of 60 dates" in cli_store.invoke("estimates", 1).stdout


def test_diff_compares_resolved_settings_and_shows_both_values(cli_store):
    # five assets: premium_factors auto resolves to 1, so an explicit 1 is the same model
    assert cli_store.invoke("fit", "--data", "trees", *CLI_FIT_OPTIONS, "--premium-factors", "1").exit_code == 0
    same = cli_store.invoke("diff", 1, 3)
    assert "settings that differ: none (recorded differently but the same model: premium_factors)" in same.stdout
    assert cli_store.invoke("fit", "--data", "trees", *CLI_FIT_OPTIONS, "--premium-factors", "0").exit_code == 0
    other = json.loads(cli_store.invoke("diff", 1, 4, "--json").stdout)
    assert {"setting": "premium factors", "run_a": "1", "run_b": "0 (independent local levels)"} in other["settings"]


def test_fast_cross_section_matches_the_full_report(cli_store):
    from panel.store import open_store
    from panel.vintages.reproduce import evaluated_run, stored_cross_section

    with open_store(cli_store.path, read_only=True) as store:
        full = evaluated_run(store, 1)
        for kind in ("filtered", "smoothed"):
            for date in ("2016-06-30", "2019-12-31"):
                fast, _ = stored_cross_section(store, 1, date, kind)
                slow = full.cross_section(date, kind)
                assert fast.assets == slow.assets
                np.testing.assert_allclose(fast.mean, slow.mean, rtol=1e-12, atol=0)
                np.testing.assert_allclose(fast.cov, slow.cov, rtol=1e-10, atol=1e-18)


def test_the_latest_table_looks_back_a_calendar_year_at_any_frequency():
    from panel.cli.fitting import year_before

    cases = [("ME", 30, "2020-06-30"), ("ME", 13, "2019-01-31"), ("ME", 12, None),
             ("B", 600, "2020-04-17"),            # 2021-04-19 less a year is a Sunday: the Friday before
             ("W-FRI", 120, "2020-04-10"), ("QE", 12, "2020-12-31"), ("YE", 5, "2022-12-31")]
    for freq, n, want in cases:
        got = year_before(pd.date_range("2019-01-01", periods=n, freq=freq))
        assert (None if got is None else str(got.date())) == want, (freq, n)


def test_cli_import_loads_no_heavy_library():
    code = ("import sys, panel.cli.app; heavy = [m for m in ('pandas', 'sqlalchemy', 'duckdb', 'scipy') "
            "if m in sys.modules]; print(heavy)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"


# ---------------------------------------------------------------------------------------------
# statistics with their caveats

def test_evaluate_warns_below_the_minimum_and_revisions_skip_a_burn_in(tmp_path):
    from tests.test_backfill_cli import CUTS, QUICK, run
    from panel.store import open_store, write_dataset
    from panel.vintages.evaluation import MIN_FORECASTS
    from tests.backfill_fixtures import NAME, quillmoor_panel

    path = tmp_path / "q.duckdb"
    with open_store(path) as store:
        write_dataset(store, quillmoor_panel(), NAME)
    done = run(path, "backfill", "--data", NAME, *CUTS, *QUICK, "--workers", "2")
    assert done.exit_code == 0 and "running in one process although --workers 2" in done.stderr
    shown = run(path, "evaluate", "--data", NAME, *QUICK)
    assert f"fewer than {MIN_FORECASTS} forecasts" in shown.stdout and f"(n<{MIN_FORECASTS})" in shown.stdout
    data = json.loads(run(path, "evaluate", "--data", NAME, *QUICK, "--json").stdout)
    assert data["min_forecasts"] == 30 and not data["pooled"]["enough"]
    date = "2023-06-30"
    plain = json.loads(run(path, "revisions", "--data", NAME, "--asset", quillmoor_panel().assets[0],
                           "--date", date, *QUICK, "--json").stdout)["mean_abs_revision"]
    skipped = json.loads(run(path, "revisions", "--data", NAME, "--asset", quillmoor_panel().assets[0],
                             "--date", date, *QUICK, "--skip", "5", "--json").stdout)["mean_abs_revision"]
    assert [r["n_dates"] - 5 for r in plain] == [r["n_dates"] for r in skipped]


# ---------------------------------------------------------------------------------------------
# the notebook API

@pytest.fixture(scope="module")
def small_fit():
    import panel
    from tests.cli_helpers import cli_small_frame

    return panel.fit(panel.Panel.from_frame(cli_small_frame()),
                     panel.ModelSpec(premium_prior=panel.Prior(0.01, 60), std_errors="never"))


def test_summary_reprs_are_short_and_annualised_views_follow_units(small_fit):
    from panel import units

    assert len(repr(small_fit)) < 200 and "5 assets x 60 dates" in repr(small_fit)
    text = small_fit.summary()
    assert len(text) < 3000 and "status" in text and "Elm" in text
    page = small_fit._repr_html_()
    assert page.startswith("<div>") and len(page) < 5000 and "<script" not in page
    est = small_fit.annualised_estimates()
    np.testing.assert_allclose(est["smoothed_mean_pct_a_year"], small_fit.estimates["smoothed_mean"] * 12 * 100)
    par = small_fit.annualised_parameters()
    # premium volatility V: q = (V/100)^2 / ppy^3 (DESIGN.md section 5)
    np.testing.assert_allclose((par["own_premium_vol_pct_a_year"] / 100) ** 2 / 12 ** 3, small_fit.params.q)
    np.testing.assert_allclose(par["return_vol_pct_a_year"], units.return_vol(np.diag(small_fit.params.H), 12) * 100)
    assert "percent a year" in par.attrs["units"] and "q = V^2/ppy^3" in par.attrs["conventions"]


def test_fit_limits_blas_threads_while_it_runs(monkeypatch):
    import panel
    from threadpoolctl import threadpool_info
    from tests.cli_helpers import cli_small_frame

    import numpy, scipy.linalg  # noqa: F401,E401 (load both BLAS libraries first)
    from threadpoolctl import threadpool_limits

    seen = []
    monkeypatch.setenv("RISKPREM_BLAS_THREADS", "1")
    threadpool_limits(2, user_api="blas")                # as an unconfigured notebook would run
    before = {i["num_threads"] for i in threadpool_info() if i["user_api"] == "blas"}
    panel.fit(panel.Panel.from_frame(cli_small_frame()), panel.ModelSpec(max_iter=3, std_errors="never"),
              progress=lambda n, objective: seen.append(
                  {i["num_threads"] for i in threadpool_info() if i["user_api"] == "blas"}))
    assert seen and all(s == {1} for s in seen)          # a BLAS was found, limited to one thread
    after = {i["num_threads"] for i in threadpool_info() if i["user_api"] == "blas"}
    assert after == before                               # and given back afterwards


def test_an_asset_without_a_return_at_the_date_is_marked_with_its_last_one(cli_store):
    # Cedar has no returns from 2017-07 to 2017-09 (cli_small_frame): inside that gap its premium is
    # the model's prediction, and the tables say since when; every other asset, and Cedar after
    # the gap, has a return at the date and is not marked.
    out = cli_store.invoke("cross-section", 1, "--date", "2017-08-31")
    assert out.exit_code == 0, out.output
    text = " ".join(out.output.split())
    assert "Cedar (to 2017-06-30)" in text and "'to DATE' marks an asset's last return" in text
    assert "(to " not in text.replace("Cedar (to 2017-06-30)", "")
    latest = cli_store.invoke("cross-section", 1)
    assert "(to " not in latest.output and "'to DATE'" not in latest.output
    data = json.loads(cli_store.invoke("cross-section", 1, "--date", "2017-08-31", "--json").output)
    last = {r["asset"]: r["last_return"] for r in data["ranked"]}
    assert last["Cedar"].startswith("2017-06-30")
    assert all(v.startswith("2017-08-31") for a, v in last.items() if a != "Cedar")


def test_a_cross_section_before_an_entry_names_the_assets_not_yet_in_the_panel(cli_store):
    # Elm's first return is 2016-01 (cli_small_frame): at 2015-12-31 it has none, so it is not
    # ranked and the table says so; from its entry on it is ranked and nothing is said.
    out = cli_store.invoke("cross-section", 1, "--date", "2015-12-31")
    assert out.exit_code == 0, out.output
    text = " ".join(out.output.split())
    assert "Not ranked: 1 of the run's assets has no return yet by 2015-12-31 (Elm)." in text
    assert " Elm " not in text.split("Not ranked")[0]
    data = json.loads(cli_store.invoke("cross-section", 1, "--date", "2015-12-31", "--json").output)
    assert data["not_entered"] == ["Elm"] and "Elm" not in data["assets"]
    entered = cli_store.invoke("cross-section", 1, "--date", "2016-01-31")
    assert "Not ranked" not in entered.output and "Elm" in entered.output


def test_the_fit_table_marks_assets_that_have_left(tmp_path):
    # Two of five sleeves stop reporting before the last date (invented data): the fit's latest
    # table names their last return; the library's cross-section carries the same dates.
    from typer.testing import CliRunner

    import panel
    from panel.cli.app import app
    from panel.model.result import asset_labels
    from tests.cli_helpers import cli_small_frame, cli_write_csv

    frame = cli_small_frame()
    frame.iloc[50:, 0] = np.nan          # Alder leaves after 2019-02
    frame.iloc[-1, 3] = np.nan           # Douglas's last return is late
    csv = cli_write_csv(frame, tmp_path / "left.csv")
    out = CliRunner().invoke(app, ["--store", str(tmp_path / "s.duckdb"), "fit", "--file", str(csv),
                                   "--units", "percent", *CLI_FIT_OPTIONS], catch_exceptions=False)
    assert out.exit_code == 0, out.output
    text = " ".join(out.output.split())
    assert "Alder (to 2019-02-28)" in text and "Douglas (to 2019-11-30)" in text
    assert "'to DATE' marks" in text and text.count("(to ") == 2
    cs = panel.fit(frame, panel.ModelSpec(std_errors="never")).cross_section(frame.index[-1], "filtered")
    expected = frame.apply(lambda c: c.last_valid_index())
    assert dict(zip(cs.assets, cs.last_return)) == expected.to_dict()
    assert asset_labels(cs.table(), frame.index[-1]).count("Alder (to 2019-02-28)") == 1
    # diff against a vintage cut before either stopped: marked once, by the later run's data
    store = ["--store", str(tmp_path / "s.duckdb")]
    early = CliRunner().invoke(app, [*store, "fit", "--data", "left", "--as-of", "2019-01-31",
                                     *CLI_FIT_OPTIONS], catch_exceptions=False)
    assert early.exit_code == 0, early.output
    both = " ".join(CliRunner().invoke(app, [*store, "diff", "1", "2"], catch_exceptions=False).output.split())
    assert "Alder (to 2019-02-28)" in both and "Douglas (to 2019-11-30)" in both
    assert both.count("(to ") == 2 and "'to DATE' marks an asset's last return before a run's" in both
    rows = json.loads(CliRunner().invoke(app, [*store, "diff", "1", "2", "--json"]).stdout)["premia"]
    alder = next(r for r in rows if r["asset"] == "Alder")
    assert alder["last_return_a"].startswith("2019-02-28") and alder["last_return_b"].startswith("2019-01-31")


@BOTH
def test_estimates_mark_the_dates_without_a_return(cli_store):
    # Cedar's three-month gap (2017-07 to 2017-09, cli_small_frame) is where the estimates table's
    # premia are predictions; Elm's diffuse entry (2016-01, its first return) is not such a date.
    out = cli_store.invoke("estimates", 1, "--asset", "Cedar", "--asset", "Elm", "--last", "0")
    assert out.exit_code == 0, out.output
    marked = [line.split()[0] + " " + line.split()[1] for line in out.output.splitlines()
              if "(no return)" in line and line[:4].isdigit()]
    assert marked == ["2017-07-31 Cedar", "2017-08-31 Cedar", "2017-09-30 Cedar"]
    assert "'(no return)': no return of the asset at that date" in " ".join(out.output.split())
    recent = cli_store.invoke("estimates", 1, "--asset", "Cedar")       # the last 12 dates
    assert "(no return)" not in recent.output
    # machine outputs keep their columns
    rows = json.loads(cli_store.invoke("estimates", 1, "--asset", "Cedar", "--json").output)["rows"]
    assert "has_return" not in rows[0]
