"""Readers while a backfill runs (DuckDB): the backfill holds the store file only while it reads or
writes, so `runs`, `estimates` and a fit that reads its dataset work between its vintages (real
processes; the backfill is paused inside its second fit until the test has read)."""

import json
import subprocess
import sys
from pathlib import Path

import pytest
from typer.testing import CliRunner

from panel.store import open_store, write_dataset
from tests.backfill_fixtures import NAME, quillmoor_panel

REPO = Path(__file__).resolve().parents[1]

BACKFILL = """
import sys
import panel.vintages.backfill as bf
from panel.model.spec import ModelSpec
from panel.store import open_store

real, calls = bf.fit_vintage, []


def paused(task):
    calls.append(task)
    if len(calls) == 2:                      # inside the second fit: the first vintage is stored
        print("paused", flush=True)
        sys.stdin.readline()
    return real(task)


bf.fit_vintage = paused
with open_store(sys.argv[1], hold=sys.argv[2] == "hold", lock_timeout=30) as store:
    report = bf.backfill(store, "quillmoor", ModelSpec(std_errors="never", max_iter=10),
                         start="2023-10-31", end="2023-11-30", workers=1)
print("stored", len(report.written), flush=True)
"""


def _cli(path, *args):
    from panel.cli.app import app

    return CliRunner().invoke(app, ["--store", str(path), "--lock-wait", "0.5", *map(str, args)],
                              catch_exceptions=False)


@pytest.mark.parametrize("hold", ["release", "hold"])
def test_runs_estimates_and_a_fit_work_between_the_vintages_of_a_backfill(tmp_path, hold):
    path = tmp_path / "quillmoor.duckdb"
    with open_store(path) as store:
        write_dataset(store, quillmoor_panel(), NAME)
    proc = subprocess.Popen([sys.executable, "-c", BACKFILL, str(path), hold], cwd=REPO, text=True,
                            stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    try:
        assert proc.stdout.readline().strip() == "paused", proc.stderr.read()
        listed = _cli(path, "runs", "--json")
        if hold == "hold":   # the old way: the backfill keeps the file, a reader is turned away
            assert listed.exit_code == 1 and "is being written by another process" in listed.stderr
            proc.stdin.write("\n")
            proc.stdin.flush()
            assert proc.stdout.readline().strip() == "stored 2", proc.stderr.read()
            return
        assert listed.exit_code == 0, listed.output
        runs = json.loads(listed.stdout)["runs"]
        assert [r["as_of"] for r in runs] == ["2023-10-31"]           # whole vintages only
        shown = _cli(path, "estimates", runs[0]["id"], "--json")
        assert shown.exit_code == 0 and json.loads(shown.stdout)["rows"], shown.output
        fitted = _cli(path, "fit", "--data", NAME, "--max-iter", "5", "--json")
        assert fitted.exit_code == 0, fitted.output
        assert json.loads(fitted.stdout)["run_id"] == 2
        proc.stdin.write("\n")
        proc.stdin.flush()
        assert proc.stdout.readline().strip() == "stored 2", proc.stderr.read()
    finally:
        proc.stdin.close()
        proc.wait(timeout=60)
    assert proc.returncode == 0
    done = json.loads(_cli(path, "runs", "--json").stdout)["runs"]
    assert [(r["kind"], r["as_of"]) for r in done] == [("backfill", "2023-10-31"), ("fit", "2023-12-31"),
                                                       ("backfill", "2023-11-30")]
