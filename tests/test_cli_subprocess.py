"""The installed console script, run as a real process on a real DuckDB store file."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from tests.cli_helpers import CLI_FIT_OPTIONS, cli_small_frame, cli_write_csv
from panel.cli.output import CAUTION

SCRIPT = Path(sys.executable).with_name("riskprem")


def _run(*args, store: Path, check_code: int | None = 0):
    env = {**os.environ, "RISKPREM_STORE": str(store), "COLUMNS": "160"}
    done = subprocess.run([str(SCRIPT), *map(str, args)], capture_output=True, text=True, env=env, timeout=300)
    if check_code is not None:
        assert done.returncode == check_code, (done.stdout, done.stderr)
    return done


@pytest.mark.skipif(not SCRIPT.exists(), reason="console script not installed next to the interpreter")
def test_console_script_end_to_end(tmp_path):
    store = tmp_path / "team.duckdb"
    csv = cli_write_csv(cli_small_frame(seed=13), tmp_path / "sleeves.csv")
    ingested = json.loads(_run("ingest", csv, "--name", "sleeves", "--units", "percent", "--json", store=store).stdout)
    assert ingested["n_assets"] == 5
    fitted = json.loads(_run("fit", "--data", "sleeves", *CLI_FIT_OPTIONS, "--json", store=store).stdout)
    assert fitted["run_id"] == 1 and fitted["converged"] is True
    human = _run("--quiet", "show", "1", store=store)
    assert "Parameters, % a year" in human.stdout and CAUTION in human.stdout
    assert human.stderr == ""
    info = json.loads(_run("store", "info", "--json", store=store).stdout)
    assert info["counts"]["runs"] == 1
    # a user error: one line, exit 1, no traceback; bad usage: exit 2
    missing = _run("show", "7", store=store, check_code=1)
    assert missing.stderr.strip().splitlines() == [f"error: no run 7 in {store}; list runs with `riskprem runs`"]
    assert missing.stdout == ""
    usage = _run("fit", "--return-shocks", "sideways", store=store, check_code=2)
    assert "Traceback" not in usage.stderr and "--return-shocks" in usage.stderr
    assert json.loads(_run("store", "info", "--json", store=store).stdout)["counts"] == info["counts"]
