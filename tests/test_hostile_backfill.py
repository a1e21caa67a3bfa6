"""Hostile backfills: a coordinator killed while its workers fit, a ``--scheduler`` that is not an
address (or where nothing listens), a ``--start`` before the data can be fitted, and a resume with
another ``--chain``.  Each refusal is one line, fast, with the store unchanged."""

from __future__ import annotations

import json
import os
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

import pandas as pd
import pytest

from tests.cli_helpers import CLI_FIT_OPTIONS
from tests.backfill_fixtures import sleeves_store  # noqa: F401  (fixture)
from tests.hostile import hostile_store, one_line_error  # noqa: F401  (fixture)

ROOT = Path(__file__).resolve().parents[1]
QUICK = (*CLI_FIT_OPTIONS, "--max-iter", "60", "--std-errors", "never")


def _children(pid: int) -> set[int]:
    found: set[int] = set()
    for task in Path(f"/proc/{pid}/task").glob("*"):
        try:
            found |= {int(p) for p in (task / "children").read_text().split()}
        except OSError:
            pass
    return found


def _running(pid: int) -> bool:
    """Whether ``pid`` is a live process (a zombie waiting to be reaped is not)."""
    try:
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except (OSError, IndexError):
        return False
    return state not in ("Z", "X")


def _cmdline(pid: int) -> str:
    try:
        return Path(f"/proc/{pid}/cmdline").read_bytes().replace(b"\0", b" ").decode()
    except OSError:
        return ""


@pytest.mark.skipif(not Path("/proc/self/task").exists(), reason="reads the process tree from /proc (Linux)")
@pytest.mark.parametrize("how", [signal.SIGKILL, signal.SIGTERM])
def test_workers_end_with_a_killed_coordinator(cli_store, how):
    """Before, killing the coordinator left its worker processes fitting for minutes."""
    env = {**os.environ, "PYTHONPATH": str(ROOT), "OPENBLAS_NUM_THREADS": "1"}
    coordinator = subprocess.Popen(
        [sys.executable, "-c", "from panel.cli.app import main; main()", "--store", str(cli_store.path),
         "backfill", "--data", "trees", "--start", "2016-01-31", "--chain", "1", "--workers", "2", *QUICK],
        env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, cwd=str(cli_store.folder))
    try:
        deadline = time.monotonic() + 60
        workers: set[int] = set()
        while len(workers) < 2 and time.monotonic() < deadline and coordinator.poll() is None:
            workers = {p for p in _children(coordinator.pid) if "spawn_main" in _cmdline(p)}
            time.sleep(0.05)
        assert len(workers) == 2, "the backfill did not start two worker processes"
        time.sleep(0.5)                      # the workers are fitting now
        others = _children(coordinator.pid)  # the workers and multiprocessing's helper
        coordinator.send_signal(how)
        coordinator.wait(timeout=10)
        deadline = time.monotonic() + 3
        while any(_running(p) for p in others) and time.monotonic() < deadline:
            time.sleep(0.05)
        alive = [p for p in others if _running(p)]
        assert not alive, f"processes still running 3 s after the coordinator died: {alive}"
    finally:
        if coordinator.poll() is None:
            coordinator.kill()
            coordinator.wait()
        for pid in _children(coordinator.pid) if coordinator.poll() is None else ():
            os.kill(pid, signal.SIGKILL)
    # every vintage stored before the kill is whole: the store reads
    assert cli_store.invoke("runs").exit_code == 0


def _free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


@pytest.mark.parametrize("address, fragments", [
    ("not an address", ["is not a scheduler address", "tcp://HOST:PORT"]),
    ("localhost", ["is not a scheduler address"]),
    ("http://10.0.0.5:8786", ["is not a scheduler address"]),
    ("tcp://10.0.0.5:99999", ["is not a scheduler address"]),
    ("tcp://127.0.0.1:{free}", ["cannot reach the Dask scheduler", "connection refused", "scheduler runs"]),
    ("tcp://no-such-host.invalid:8786", ["cannot reach the Dask scheduler", "scheduler runs"]),
])
def test_a_scheduler_that_is_not_an_address_is_refused_at_once(hostile_store, address, fragments):
    address = address.replace("{free}", str(_free_port()))
    started = time.monotonic()
    one_line_error(hostile_store.invoke("backfill", "--data", "trees", "--start", "2019-06-30", *QUICK,
                                        "--scheduler", address), *fragments)
    assert time.monotonic() - started < 8      # Dask's own attempt took 20 s for a malformed address


def test_a_start_before_the_data_can_be_fitted_names_the_first_cut_off_that_can(hostile_store):
    """Before, every retry failed with 'the panel has 1 date'.  The refusal names the first cut-off
    with enough data, and that start works."""
    line = one_line_error(hostile_store.invoke("backfill", "--data", "trees", "--start", "2010-01-31",
                                               "--end", "2016-12-31", *QUICK),
                          "at the first cut-off 2015-01-31", "needs at least 2", "start the backfill at")
    first = line.split("start the backfill at ")[1].split()[0]
    assert pd.Timestamp("2015-01-31") < pd.Timestamp(first) <= pd.Timestamp("2016-12-31")
    from panel.store import open_store
    from panel.vintages.backfill import plan_backfill

    with open_store(hostile_store.path, read_only=True) as store:   # nothing left to refuse from there
        plan = plan_backfill(store, "trees", start=first, end="2016-12-31")
    assert plan.vintages[0].as_of == pd.Timestamp(first)


def test_a_resume_with_another_chain_is_another_backfill(cli_store):
    """Before, ``--chain`` was not part of the backfill key: a resume with another chain skipped
    the stored vintages and warm-started the rest on the other chain's grid, mixing both."""
    cuts = ("--start", "2019-09-30", "--workers", "1", *QUICK)
    two = json.loads(cli_store.invoke("backfill", "--data", "trees", *cuts, "--chain", "2", "--json").stdout)
    three = json.loads(cli_store.invoke("backfill", "--data", "trees", *cuts, "--chain", "3", "--json").stdout)
    assert two["backfill_key"] != three["backfill_key"]
    assert (two["fitted"], three["fitted"], three["skipped"]) == (4, 4, 0)
    # each backfill's own chains: cold starts at positions 0, 2 (chain 2) and 0, 3 (chain 3)
    assert [v["parent_run"] is None for v in two["vintages"]] == [True, False, True, False]
    assert [v["parent_run"] is None for v in three["vintages"]] == [True, False, False, True]
    again = json.loads(cli_store.invoke("backfill", "--data", "trees", *cuts, "--chain", "3", "--json").stdout)
    assert (again["fitted"], again["skipped"], again["backfill_key"]) == (0, 4, three["backfill_key"])
    # the settings alone no longer say which backfill is meant: one line naming --key
    one_line_error(cli_store.invoke("revisions", "--data", "trees", "--asset", "Alder", "--date", "2019-09-30",
                                    *CLI_FIT_OPTIONS, "--max-iter", "60", "--std-errors", "never"),
                   "2 backfills with these settings", "(chain 2)", "(chain 3)", "--key")
    done = cli_store.invoke("revisions", "--data", "trees", "--asset", "Alder", "--date", "2019-09-30",
                            "--key", three["backfill_key"][:10])
    assert done.exit_code == 0, done.output


def test_backfills_stored_before_the_chain_was_recorded_are_still_found(sleeves_store):
    """A backfill stored before the chain entered the key (settings without ``chain``, key of the
    other settings) is found by its settings as before."""
    from panel.model.spec import ModelSpec
    from panel.vintages.backfill import backfill, find_backfill, settings_key
    from tests.backfill_fixtures import NAME

    store, panel = sleeves_store
    spec = ModelSpec(max_iter=40, std_errors="never")
    backfill(store, NAME, spec, chain=2, start="2023-11-30", end="2023-12-31")
    _as_an_older_riskprem_stored_it(store, panel)
    found = find_backfill(store, NAME, spec=spec)
    assert found.key == settings_key(panel.hash, spec, "expanding") and found.n_vintages == 2


def _as_an_older_riskprem_stored_it(store, panel):
    """Rewrite every stored run's settings without ``chain`` (and its key accordingly)."""
    from sqlalchemy import update

    from panel.store import backfill_key, list_runs, schema

    stored = list_runs(store)
    with store.engine.begin() as conn:
        for row in stored.itertuples():
            settings = {k: v for k, v in row.settings.items() if k != "chain"}
            conn.execute(update(schema.runs).where(schema.runs.c.id == int(row.id))
                         .values(settings=settings, backfill_key=backfill_key(panel.hash, settings)))


def test_a_backfill_stored_before_the_chain_was_recorded_is_resumed_not_refitted(sleeves_store, tmp_path):
    """The same command resumes it under its old key (settings still without ``chain``) when its
    vintages started as this chain length starts them, and the result is the uninterrupted
    backfill's, bit for bit; another chain length is another backfill."""
    from panel.model.spec import ModelSpec
    from panel.store import list_runs, open_store, run_tables, write_dataset
    from panel.vintages.backfill import backfill, settings_key
    from tests.backfill_fixtures import NAME

    store, panel = sleeves_store
    spec = ModelSpec(max_iter=40, std_errors="never")
    cuts = dict(start="2023-09-30", end="2023-12-31")
    backfill(store, NAME, spec, chain=2, start=cuts["start"], end="2023-10-31")   # interrupted
    _as_an_older_riskprem_stored_it(store, panel)
    resumed = backfill(store, NAME, spec, chain=2, **cuts)
    old_key = settings_key(panel.hash, spec, "expanding")
    assert (resumed.skipped, len(resumed.written), resumed.key) == (2, 2, old_key)
    runs = list_runs(store)
    assert set(runs["backfill_key"]) == {old_key} and all("chain" not in s for s in runs["settings"])
    with open_store(tmp_path / "whole.duckdb") as whole:             # the same backfill in one go
        write_dataset(whole, panel, NAME)
        backfill(whole, NAME, spec, chain=2, **cuts)
        for mine, theirs in zip(runs["id"], list_runs(whole)["id"]):
            a, b = run_tables(store, int(mine))["estimates"], run_tables(whole, int(theirs))["estimates"]
            pd.testing.assert_frame_equal(a, b)
    other = backfill(store, NAME, spec, chain=3, **cuts)              # chain 3 would start otherwise
    assert (other.skipped, len(other.written)) == (0, 4) and other.key != old_key


def test_a_backfill_that_starts_afresh_names_the_settings_that_made_it_new(cli_store):
    """Running a backfill again with one setting changed refits every cut-off (another backfill);
    the command says which stored backfill is closest and which settings differ."""
    cuts = ("--start", "2019-09-30", "--workers", "1", *QUICK)
    first = cli_store.invoke("backfill", "--data", "trees", *cuts, "--chain", "2", "--json")
    assert json.loads(first.stdout)["closest_other_backfill"] is None
    again = cli_store.invoke("backfill", "--data", "trees", *cuts, "--chain", "2", "--premium-prior", "2:60")
    assert again.exit_code == 0, again.output
    assert "a new backfill; the stored one closest to it" in again.stderr
    assert "differs in premium_prior" in again.stderr
    done = json.loads(cli_store.invoke("backfill", "--data", "trees", *cuts, "--chain", "3", "--json").stdout)
    assert done["closest_other_backfill"]["differs_in"] == ["chain"]
