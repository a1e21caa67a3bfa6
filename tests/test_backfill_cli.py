"""``riskprem backfill | revisions | evaluate`` on a real store file: what they store and print, and
their one-line errors (exit 1, nothing written)."""

import json

import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

from panel.vintages.backfill import find_backfill
from panel.vintages.evaluation import evaluate_backfill, revisions
from panel.store import list_runs, open_store, write_dataset
from tests.backfill_fixtures import NAME, quillmoor_panel
from tests.backends import BOTH

QUICK = ("--max-iter", "60", "--std-errors", "never")
CUTS = ("--start", "2023-09-30", "--end", "2023-12-31")


@pytest.fixture
def store_file(backend):
    path = backend.location("quillmoor")
    with open_store(path) as store:
        write_dataset(store, quillmoor_panel(), NAME)
    return path


def run(path, *args):
    from panel.cli.app import app

    return CliRunner().invoke(app, ["--store", str(path), "--lock-wait", "0.3", *map(str, args)],
                              catch_exceptions=False)


def runs_of(path):
    with open_store(path, read_only=True) as store:
        return list_runs(store)


@BOTH
def test_backfill_stores_vintages_resumes_and_reports_as_json(store_file):
    done = run(store_file, "backfill", "--data", NAME, *CUTS, "--chain", "2", "--workers", "1", *QUICK, "--json")
    assert done.exit_code == 0, done.output
    report = json.loads(done.stdout)
    assert report["fitted"] == 4 and report["skipped"] == 0 and report["where"] == "in-process"
    assert [v["as_of"] for v in report["vintages"]] == ["2023-09-30", "2023-10-31", "2023-11-30", "2023-12-31"]
    assert [v["parent_run"] is None for v in report["vintages"]] == [True, False, True, False]
    stored = runs_of(store_file)
    assert sorted(stored["id"]) == sorted(v["run_id"] for v in report["vintages"])
    assert set(stored["backfill_key"]) == {report["backfill_key"]}
    assert {s["spec"]["max_iter"] for s in stored["settings"]} == {60}
    again = run(store_file, "backfill", "--data", NAME, "--start", "2023-08-31", "--chain", "2", "--workers", "1",
                *QUICK)
    assert again.exit_code == 0, again.output
    assert "fitted 1 vintage(s)" in again.stdout and "4 already stored (skipped)" in again.stdout
    assert "2023-08-31" in again.stdout and "cold" in again.stdout
    assert len(runs_of(store_file)) == 5


def test_revisions_and_evaluate_print_what_the_library_computes(store_file):
    assert run(store_file, "backfill", "--data", NAME, *CUTS, "--workers", "1", *QUICK).exit_code == 0
    with open_store(store_file, read_only=True) as store:
        chosen = find_backfill(store, NAME)
        path = revisions(store, chosen, "coastal_credit", "2023-10-31")
        evaluation = evaluate_backfill(store, chosen, se="newey-west", lags=1)
    shown = run(store_file, "revisions", "--data", NAME, "--asset", "coastal_credit", "--date", "2023-10-31", "--json")
    assert shown.exit_code == 0, shown.output
    payload = json.loads(shown.stdout)
    assert payload["backfill_key"] == chosen.key and payload["periods_per_year"] == 12
    assert [v["run_id"] for v in payload["vintages"]] == list(path.path["run_id"])
    assert payload["total_revision"] == pytest.approx(path.total_revision, rel=1e-12)
    text = run(store_file, "revisions", "--data", NAME, "--asset", "coastal_credit", "--date", "2023-10-31",
               *QUICK)                                       # selected by its settings this time
    assert text.exit_code == 0, text.output
    assert "annualised % (x12)" in text.stdout and "first release (2023-10-31)" in text.stdout
    first = path.first_release[1] * 12 * 100
    assert f"{first:.2f}% a year" in text.stdout
    scored = run(store_file, "evaluate", "--data", NAME, "--se", "newey-west", "--lags", "1", "--json")
    assert scored.exit_code == 0, scored.output
    result = json.loads(scored.stdout)
    assert result["pooled"]["r2_os"] == pytest.approx(evaluation.pooled["r2_os"], rel=1e-12)
    assert result["pooled"]["cw_t"] == pytest.approx(evaluation.pooled["cw_t"], rel=1e-12)
    assert [a["asset"] for a in result["assets"]] == sorted(quillmoor_panel().assets)
    assert result["pending_forecasts"] == 4                  # the 2023-12-31 vintage has no next return
    table = run(store_file, "evaluate", "--data", NAME)
    assert table.exit_code == 0 and "R2_OS %" in table.stdout and "(pooled)" in table.stdout
    assert "Clark-West" in table.stdout and "annualised % (x12)" in table.stdout
    csv = run(store_file, "evaluate", "--data", NAME, "--csv")
    frame = pd.read_csv(__import__("io").StringIO(csv.stdout))
    assert list(frame["asset"])[-1] == "(pooled)" and np.isfinite(frame["r2_os"]).all()


def test_ctrl_c_keeps_the_finished_vintages_and_exits_130(store_file, monkeypatch):
    import panel.cli.backfill as command

    real = command._Progress.__call__

    def interrupt_after_one(self, event):
        real(self, event)
        if event.done == 1:
            raise KeyboardInterrupt

    monkeypatch.setattr(command._Progress, "__call__", interrupt_after_one)
    stopped = run(store_file, "backfill", "--data", NAME, *CUTS, "--workers", "1", *QUICK)
    assert stopped.exit_code == 130
    assert "interrupted: 1 vintage(s) stored this time, each complete" in stopped.stderr
    assert len(runs_of(store_file)) == 1


@pytest.mark.parametrize("args, message", [
    (("backfill", "--data", NAME, *CUTS, "--window", "rolling:x"), "window 'rolling:x' is not understood"),
    (("backfill", "--data", "harbour", *CUTS), "no dataset 'harbour'"),
    (("backfill", "--data", NAME, "--start", "2031-01-31"), "start 2031-01-31 is after the dataset's last date 2023-12-31"),
    (("backfill", "--data", NAME, *CUTS, "--premium-factors", "3"), "at cut-off 2023-09-30: 3 common premium"),
    (("backfill", "--data", NAME, *CUTS, "--scheduler", "tcp://127.0.0.1:9"), "cannot reach the Dask scheduler"),
    (("evaluate", "--data", NAME), "dataset 'quillmoor' has no backfill"),
    (("revisions", "--data", NAME, "--asset", "tidal_rates", "--date", "2023-10-31"), "has no backfill"),
])
def test_bad_input_is_one_line_on_stderr_exit_1_and_nothing_written(store_file, monkeypatch, args, message):
    monkeypatch.setattr("panel.vintages.pools.DASK_CONNECT_TIMEOUT", "1s")
    result = run(store_file, *args, *QUICK)
    assert result.exit_code == 1, result.output
    assert result.stderr.startswith("error: ") and result.stderr.count("\n") == 1
    assert message in result.stderr
    assert len(runs_of(store_file)) == 0


def test_choosing_between_two_backfills(store_file):
    assert run(store_file, "backfill", "--data", NAME, "--start", "2023-12-31", *QUICK).exit_code == 0
    assert run(store_file, "backfill", "--data", NAME, "--start", "2023-11-30", "--window", "rolling:36",
               *QUICK).exit_code == 0
    both = run(store_file, "evaluate", "--data", NAME)
    assert both.exit_code == 1 and "has 2 backfills" in both.stderr and "choose one with --key" in both.stderr
    rolling = run(store_file, "evaluate", "--data", NAME, "--window", "rolling:36", *QUICK, "--json")
    assert rolling.exit_code == 0 and json.loads(rolling.stdout)["window"] == "rolling:36"
    key = json.loads(rolling.stdout)["backfill_key"]
    by_key = run(store_file, "revisions", "--data", NAME, "--key", key[:6], "--asset", "tidal_rates",
                 "--date", "2023-11-30", "--json")
    assert by_key.exit_code == 0 and json.loads(by_key.stdout)["backfill_key"] == key
    clash = run(store_file, "evaluate", "--data", NAME, "--key", key[:6], *QUICK)
    assert clash.exit_code == 2 and "either --key or the backfill's settings" in clash.output
    lags = run(store_file, "evaluate", "--data", NAME, "--key", key[:6], "--lags", "2")
    assert lags.exit_code == 2 and "--lags goes with --se newey-west" in lags.output
