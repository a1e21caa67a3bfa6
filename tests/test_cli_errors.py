"""Every error path: one clear line on stderr, exit code 1 (bad input) or 2 (bad usage), no
traceback, and the store unchanged (same bytes on disk, same row counts)."""

from __future__ import annotations

import subprocess
import sys
import textwrap
import time

import pytest

from tests.cli_helpers import CLI_FIT_OPTIONS
from tests.hostile import one_line_error as _one_line_error, usage_error as _usage_error


@pytest.fixture
def cli_unchanged(cli_store):
    """Asserts after the test that the store file and its row counts did not change."""
    digest, counts = cli_store.digest(), cli_store.counts()
    yield cli_store
    assert cli_store.counts() == counts
    assert cli_store.digest() == digest


@pytest.mark.parametrize("args", [
    ["show", "99"], ["estimates", "99"], ["cross-section", "99"], ["plot", "99"], ["reproduce", "99"],
    ["reproduce", "99", "--save"], ["export", "99", "x.csv"], ["diff", "1", "99"], ["report", "99"],
])
def test_unknown_run(cli_unchanged, args):
    if args[0] == "export":
        args = ["export", "99", str(cli_unchanged.folder / "x.csv")]
    if args[0] == "report":
        args = ["report", "99", "--out", str(cli_unchanged.folder / "r.html")]
    _one_line_error(cli_unchanged.invoke(*args), "no run 99", "riskprem runs")
    assert not (cli_unchanged.folder / "x.csv").exists()
    assert not (cli_unchanged.folder / "r.html").exists()


@pytest.mark.parametrize("args", [["fit", "--data", "oak"], ["runs", "--data", "oak"],
                                  ["query", "dataset_runs", "--param", "dataset=oak"]])
def test_unknown_dataset(cli_unchanged, args):
    _one_line_error(cli_unchanged.invoke(*args), "no dataset 'oak'", "riskprem datasets")


@pytest.mark.parametrize("args,fragments", [
    (["fit", "--data", "trees", "--premium-factors", "9"], ["premium_factors must be 0..5"]),
    (["fit", "--data", "trees", "--fix", "speed=3"], ["cannot fix 'speed'"]),
    (["fit", "--data", "trees", "--fix", "premium_vol:Oak=1"], ["no asset 'Oak'"]),
    (["fit", "--data", "trees", "--max-premium-vol", "-1"], ["max_premium_vol"]),
    (["fit", "--data", "trees", "--return-shocks", "factor", "--return-factors", "4"], ["not identified"]),
    (["fit", "--data", "trees", "--as-of", "2001-01-31"], ["--as-of 2001-01-31 is before the first date"]),
    (["cross-section", "1", "--date", "2030-01-31"], ["outside run 1's dates"]),
    (["estimates", "1", "--asset", "Oak"], ["run 1 has no asset 'Oak'"]),
    (["plot", "1", "--out", "chart.jpg"], ["give a file name ending in .png"]),
    (["plot", "1", "--out", "no/such/folder/c.png"], ["does not exist"]),
    (["plot", "1", "--chart", "vintages", "--date", "2001-01-31"], ["outside run 1's dates"]),
    (["plot", "1", "--chart", "vintages", "--date", "2019-06-30"], ["only one vintage", "no revision to draw"]),
    (["report", "1", "--out", "r.txt"], ["give a file name ending in .html"]),
    (["report", "1", "--out", "no/such/folder/r.html"], ["does not exist"]),
    (["export", "1", "out.xlsx"], ["use a .parquet or .csv file name"]),
    (["query", "no_such_query"], ["no query 'no_such_query'"]),
    (["query", "revision_history", "--param", "dataset=trees"], ["needs parameter(s) asset, date"]),
])
def test_bad_option_values_are_user_errors(cli_unchanged, args, fragments):
    _one_line_error(cli_unchanged.invoke(*args), *fragments)


@pytest.mark.parametrize("args", [["fit", "--data", "trees", *CLI_FIT_OPTIONS], ["reproduce", "1"]])
def test_a_bad_blas_thread_setting_is_one_line(cli_unchanged, monkeypatch, args):
    # read by every fit and recorded with every run: refused before anything runs
    monkeypatch.setenv("RISKPREM_BLAS_THREADS", "abc")
    _one_line_error(cli_unchanged.invoke(*args), "RISKPREM_BLAS_THREADS='abc' is not a whole number",
                    "0 for no limit")


@pytest.mark.parametrize("args,fragments", [
    (["fit", "--data", "trees", "--fix", "premium_vol=abc"], ["--fix", "not a number"]),
    (["fit", "--data", "trees", "--fix", "premium_vol"], ["not NAME=VALUE"]),
    (["fit", "--data", "trees", "--return-shocks", "weird"], ["--return-shocks"]),
    (["fit", "--data", "trees", "--as-of", "someday"], ["--as-of", "not a date"]),
    (["fit", "--data", "trees", "--vol-scale", "garch:1"], ["--vol-scale"]),
    (["fit", "--data", "trees", "--premium-prior", "2"], ["--premium-prior", "VOL:WEIGHT"]),
    (["fit", "--data", "trees", "--premium-factors", "two"], ["--premium-factors"]),
    (["fit"], ["exactly one of --data NAME or --file PATH"]),
    (["fit", "--data", "trees", "--file", "x.csv"], ["exactly one of"]),
    (["estimates", "1", "--kind", "raw"], ["--kind"]),
    (["reproduce", "1", "--rtol", "-1"], ["--rtol"]),
    (["show"], ["Missing argument 'RUN'"]),
    (["query"], ["--list"]),
    (["no-such-command"], ["No such command"]),
])
def test_bad_usage_exits_2(cli_unchanged, args, fragments):
    _usage_error(cli_unchanged.invoke(*args), *fragments)


def test_malformed_file_is_refused_and_nothing_is_stored(cli_unchanged, tmp_path):
    bad = tmp_path / "bad.csv"
    bad.write_text("date,Alder,Birch\n2020-01-31,1.2,0.4\n2020-02-29,oops,0.3\n", encoding="utf-8")
    _one_line_error(cli_unchanged.invoke("ingest", bad, "--name", "bad"), "bad.csv", "line 3", "'oops'")
    _one_line_error(cli_unchanged.invoke("fit", "--file", bad, *CLI_FIT_OPTIONS), "line 3")
    ragged = tmp_path / "ragged.csv"
    ragged.write_text("date,Alder\n2020-01-31,1.2,9\n", encoding="utf-8")
    _one_line_error(cli_unchanged.invoke("ingest", ragged, "--name", "r"), "line 2 has 3 fields")
    _one_line_error(cli_unchanged.invoke("ingest", tmp_path / "missing.csv", "--name", "m"), "no such file")


def test_short_assets_refused_on_request(cli_unchanged):
    _one_line_error(cli_unchanged.invoke("ingest", cli_unchanged.csv, "--name", "t", "--min-obs", "55",
                                         "--units", "percent", "--refuse-short"), "Elm")


def test_missing_store_is_not_created(tmp_path, cli_store):
    target = tmp_path / "nowhere.duckdb"
    from typer.testing import CliRunner

    from panel.cli.app import app

    for args in (["runs"], ["show", "1"], ["fit", "--data", "trees"], ["store", "info"], ["store", "upgrade"],
                 ["reproduce", "1"], ["query", "dataset_runs", "--param", "dataset=trees"]):
        done = CliRunner().invoke(app, ["--store", str(target), *args])
        _one_line_error(done, "no store at")
        assert not target.exists()


def test_store_folder_missing(tmp_path, cli_store):
    from typer.testing import CliRunner

    from panel.cli.app import app

    done = CliRunner().invoke(app, ["--store", str(tmp_path / "no" / "s.duckdb"), "ingest", str(cli_store.csv),
                                    "--name", "t", "--units", "percent"])
    _one_line_error(done, "does not exist")


def test_not_a_store(tmp_path):
    import duckdb
    from typer.testing import CliRunner

    from panel.cli.app import app

    other = tmp_path / "other.duckdb"
    con = duckdb.connect(str(other))
    con.execute("CREATE TABLE t (x INTEGER)")
    con.close()
    done = CliRunner().invoke(app, ["--store", str(other), "runs"])
    _one_line_error(done, "not a riskprem store")


HOLDER = textwrap.dedent("""
    import sys, time, duckdb
    con = duckdb.connect(sys.argv[1])
    print("held", flush=True)
    time.sleep(float(sys.argv[2]))
    con.close()
""")


def test_locked_store(cli_store, tmp_path):
    counts, digest = cli_store.counts(), cli_store.digest()
    holder = subprocess.Popen([sys.executable, "-c", HOLDER, str(cli_store.path), "60"],
                              stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "held"
        for args in (["fit", "--data", "trees", *CLI_FIT_OPTIONS], ["runs"], ["show", "1"],
                     ["ingest", str(cli_store.csv), "--name", "t2", "--units", "percent"],
                     ["reproduce", "1", "--save"]):
            started = time.monotonic()
            line = _one_line_error(cli_store.invoke(*args), str(cli_store.path))
            assert "another process" in line
            assert time.monotonic() - started < 20
        # a fit of a file: the file is read, the fit runs, then the locked store refuses the write
        _one_line_error(cli_store.invoke("fit", "--file", cli_store.csv, "--name", "t3", "--units", "percent",
                                         *CLI_FIT_OPTIONS), "in use by another process")
        from panel.cli.app import app

        verbose = cli_store.runner.invoke(app, ["--store", str(cli_store.path), "--lock-wait", "0.3", "--verbose",
                                                "fit", "--file", str(cli_store.csv), "--units", "percent",
                                                *CLI_FIT_OPTIONS])
        _one_line_error(verbose, "in use by another process")  # refused before fitting: no "fitting" note
    finally:
        holder.kill()
        holder.wait()
    assert cli_store.counts() == counts
    assert cli_store.digest() == digest


def test_user_errors_in_json_mode_are_still_one_line(cli_unchanged):
    done = cli_unchanged.invoke("show", "42", "--json")
    _one_line_error(done, "no run 42")
    assert done.stdout == ""
