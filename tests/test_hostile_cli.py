"""Hostile command lines: asset names that spreadsheets run as formulas, messages that name
options, query parameters with '=' or NULL, and model settings that would break the estimator
(checked through the command line: one line, exit 1 or 2, the store unchanged)."""

from __future__ import annotations

import io
import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import typer

from tests.backends import BOTH
from tests.cli_helpers import CLI_FIT_OPTIONS
from tests.hostile import hostile_store, one_line_error, usage_error  # noqa: F401  (fixture)

PANEL = Path(__file__).resolve().parents[1] / "panel"
#: Names a spreadsheet would run (common practice: the OWASP CSV-injection triggers), and one it would not.
FORMULAS = ("=1+2", "+SUM(A1:A9)", "-2+3", "@cmd", "Plain")   # (ingest strips tabs and CRs around names)


@pytest.fixture
def formula_store(backend, tmp_path):
    """A store with one fit of a panel whose assets are named like formulas."""
    from typer.testing import CliRunner

    from tests.cli_helpers import CliStore

    rng = np.random.default_rng(7)
    frame = pd.DataFrame(rng.normal(0.004, 0.03, (48, len(FORMULAS))), columns=list(FORMULAS),
                         index=pd.date_range("2016-01-31", periods=48, freq="ME", name="date"))
    source = tmp_path / "formulas.parquet"
    frame.reset_index().to_parquet(source)
    made = CliStore(path=backend.location("formulas"), csv=source, runner=CliRunner(), folder=tmp_path)
    done = made.invoke("fit", "--file", source, "--units", "decimal", *CLI_FIT_OPTIONS, "--max-iter", "40",
                       "--std-errors", "never")
    assert done.exit_code == 0, done.output
    return made


def _neutralised(text: str) -> bool:
    return text == "Plain" or text.startswith("'")


@BOTH   # DuckDB writes the CSV itself (SQL quoting); on PostgreSQL pandas does (formula_safe_frame)
def test_formula_names_are_neutralised_in_every_csv_and_raw_elsewhere(formula_store, tmp_path):
    target = tmp_path / "e.csv"
    assert formula_store.invoke("export", "1", target).exit_code == 0
    exported = pd.read_csv(target, keep_default_na=False)
    assert set(exported["asset"]) == {"'" + n if n != "Plain" else n for n in FORMULAS}
    estimates = pd.read_csv(io.StringIO(formula_store.invoke("estimates", "1", "--csv").stdout),
                            keep_default_na=False)
    assert all(_neutralised(a) for a in estimates["asset"])
    pairs = formula_store.invoke("cross-section", "1", "--pairs", "--csv").stdout
    matrix = pd.read_csv(io.StringIO(pairs), keep_default_na=False)
    assert all(_neutralised(a) for a in matrix["asset"])
    assert all(_neutralised(c) for c in matrix.columns[1:])           # asset names as headers too
    parameters = tmp_path / "p.csv"
    assert formula_store.invoke("export", "1", parameters, "--table", "parameters").exit_code == 0
    rows = pd.read_csv(parameters, keep_default_na=False)
    assert all(_neutralised(a) for a in rows["row"] if a)
    # numbers stay numbers (a negative premium is not a formula); Parquet and JSON keep the names
    assert exported["filtered_mean"].dtype == float and (exported["filtered_mean"] < 0).any()
    raw = tmp_path / "e.parquet"
    assert formula_store.invoke("export", "1", raw).exit_code == 0
    assert set(pd.read_parquet(raw)["asset"]) == set(FORMULAS)
    import json

    shown = json.loads(formula_store.invoke("estimates", "1", "--json").stdout)
    assert {r["asset"] for r in shown["rows"]} == set(FORMULAS)


# ---------------------------------------------------------------------------------------------
# options named in messages

def _options(command: str) -> set[str]:
    from panel.cli.app import app

    group = typer.main.get_command(app)
    return {name for p in group.commands[command].params for name in getattr(p, "opts", [])}


def test_every_option_an_ingest_message_names_exists_on_ingest_and_fit():
    """Ingest's messages are shared by `ingest` and `fit --file`: every "CLI --option" they name
    is an option of both (before: --on-short, --asset-col and, on fit, --allow-extreme were not)."""
    named = set()
    for path in (PANEL / "ingest").glob("*.py"):
        for hint in re.findall(r"\(CLI[^)]*\)", path.read_text(encoding="utf-8")):
            named |= set(re.findall(r"--[a-z][a-z-]*", hint))
    assert {"--allow-extreme", "--units", "--min-obs", "--asset-col", "--refuse-short"} <= named
    for command in ("ingest", "fit"):
        assert named <= _options(command), (command, named - _options(command))


def test_refusals_of_fit_file_name_options_fit_has(hostile_store, tmp_path):
    extreme = tmp_path / "extreme.csv"
    rows = ["date,Oak,Ash"] + [f"2019-{m:02d},{0.5 if m % 2 else -0.4},{0.3 if m % 3 else -0.2}"
                               for m in range(1, 13)]
    extreme.write_text("\n".join(rows[:6] + ["2019-06,250.0,0.1"] + rows[7:]) + "\n", encoding="utf-8")
    for command in ("ingest", "fit"):
        args = ["--file", extreme] if command == "fit" else [extreme, "--name", "x"]
        line = one_line_error(hostile_store.invoke(command, *args, "--units", "percent", "--min-obs", "6"),
                              "--allow-extreme")
        assert set(re.findall(r"--[a-z][a-z-]*", line)) <= _options(command)
    long = tmp_path / "long.csv"
    long.write_text("date,name,ret,note\n2019-01-31,Oak,0.1,x\n2019-01-31,Ash,0.2,y\n", encoding="utf-8")
    line = one_line_error(hostile_store.invoke("fit", "--file", long, "--layout", "long"),
                          "--asset-col/--value-col")
    short = one_line_error(hostile_store.invoke("fit", "--file", hostile_store.csv, "--units", "percent",
                                                "--min-obs", "55", "--refuse-short"), "leave out --refuse-short")
    for text in (line, short):
        assert set(re.findall(r"--[a-z][a-z-]*", text)) <= _options("fit")
    usage_error(hostile_store.invoke("fit", "--data", "trees", "--units", "percent"), "go with --file")


# ---------------------------------------------------------------------------------------------
# query parameters

def test_query_parameters_split_at_the_first_equals_sign(hostile_store):
    done = hostile_store.invoke("query", "revision_history", "--param", "dataset=trees", "--param", "asset=Al=der",
                                "--param", "date=2018-06-30", "--json")
    assert done.exit_code == 0, done.output
    import json

    assert json.loads(done.stdout)["parameters"]["asset"] == "Al=der"   # a value with '=' (no such asset)


@BOTH
def test_null_parameters(hostile_store):
    import json

    every = hostile_store.invoke("query", "oos_forecasts", "--param", "dataset=trees", "--null", "key", "--json")
    assert every.exit_code == 0, every.output
    assert {r["run_id"] for r in json.loads(every.stdout)["rows"]} == {1, 2}    # key NULL: every run
    usage_error(hostile_store.invoke("query", "oos_forecasts", "--param", "dataset=trees", "--param", "key="),
                "has no value", "--null key")
    one_line_error(hostile_store.invoke("query", "dataset_runs", "--null", "dataset"), "dataset cannot be NULL")
    usage_error(hostile_store.invoke("query", "dataset_runs", "--param", "dataset=trees", "--null", "dataset"),
                "both as --param and --null")
    usage_error(hostile_store.invoke("query", "dataset_runs", "--param", "=trees"), "is not KEY=VALUE")
    usage_error(hostile_store.invoke("query", "dataset_runs", "--param", "dataset=a", "--param", "dataset=b"),
                "given twice")
    one_line_error(hostile_store.invoke("query", "parameter_changes", "--param", "run_a=abc", "--param", "run_b=1"),
                   "query 'parameter_changes' failed", "check the parameter values")


# ---------------------------------------------------------------------------------------------
# settings that would break the estimator, through the command line (refused in panel.model.spec)

@pytest.mark.parametrize("args, fragment", [
    (["--fix", "own_premium_vol=1e-300"], "fixed own_premium_vol must be 0 or between"),
    (["--fix", "return_vol=0"], "fixed return_vol must be between"),
    (["--fix", "return_vol=1e308"], "fixed return_vol must be between"),
    (["--max-premium-vol", "1e-300"], "max_premium_vol must be between"),
    (["--premium-prior", "1e-300:60"], "premium_prior vol must be between"),
    (["--premium-prior", "1:1e308"], "premium_prior weight must be"),
    (["--initial-premium", "0:1e308"], "initial_premium vol must be between"),
    (["--return-shocks", "factor", "--return-factors", "4"], "not identified with 5 assets"),
    (["--return-shocks", "factor", "--return-factors", "9"], "not identified with 5 assets"),
])
def test_settings_that_would_break_the_estimator(hostile_store, args, fragment):
    one_line_error(hostile_store.invoke("fit", "--data", "trees", *args), fragment)


@pytest.mark.parametrize("budget", ["nan", "inf", "-inf"])
def test_a_non_finite_time_budget_is_refused_in_one_line(hostile_store, budget):
    one_line_error(hostile_store.invoke("fit", "--data", "trees", "--time-budget", budget), "time_budget",
                   "positive number of seconds")


def test_a_panel_too_large_for_memory_is_refused_with_the_figure(hostile_store, tmp_path):
    """12,000 assets x 30 months (long layout, the quickest to write and read): the fit's work
    arrays would need about 35 GB, more than this machine has: one line with the figure, before
    anything large is allocated and before anything is stored."""
    from panel.model.problem import available_memory

    n = 12000
    if (available_memory() or 0) > 40e9:
        pytest.skip("this machine has the memory for the fit")
    rng = np.random.default_rng(0)
    dates = pd.date_range("2000-01-31", periods=30, freq="ME")
    frame = pd.DataFrame({"date": np.repeat(dates, n), "asset": np.tile([f"a{i}" for i in range(n)], 30),
                          "value": rng.normal(0.0, 0.04, 30 * n)})
    path = tmp_path / "wide.parquet"
    frame.to_parquet(path)
    one_line_error(hostile_store.invoke("fit", "--file", path, "--units", "decimal", "--min-obs", "12",
                                        "--premium-factors", "0", "--return-shocks", "diagonal"),
                   f"a fit of {n} assets x 30 dates needs about", "GB of memory", "fit fewer assets")
    path.unlink()
