"""A Dask backfill refuses workers that do not run the coordinator's riskprem and numerical stack.

The cluster is a real ``distributed.LocalCluster`` on loopback TCP whose worker is a separate
process, so it reports its own installation; a mismatch is simulated on the coordinator's side only
(its fingerprint is replaced), never by mocking Dask.
"""

import re
import time

import pytest
from typer.testing import CliRunner

import panel.vintages.pools as pools
from panel.vintages.backfill import BackfillError, backfill
from panel.store import list_runs, open_store, write_dataset
from tests.backfill_fixtures import NAME, SPEC, quillmoor_panel, sleeves_store  # noqa: F401

CUTS = dict(start="2023-11-30", end="2023-12-31")          # two cut-offs
FIX = "install the same riskprem and libraries on the workers, or run without --scheduler"


@pytest.fixture(scope="module")
def cluster():
    """One worker process (one thread) behind a scheduler on 127.0.0.1, shared by this module."""
    from distributed import LocalCluster

    with LocalCluster(n_workers=1, threads_per_worker=1, processes=True, dashboard_address=None,
                      protocol="tcp://", host="127.0.0.1", scheduler_port=0) as running:
        yield running


def _coordinator_claims(monkeypatch, **versions):
    """Make this process (only) report other versions, e.g. ``numpy="0.0"``."""
    real = pools.environment_fingerprint
    monkeypatch.setattr(pools, "environment_fingerprint", lambda: {**real(), **versions})


def _clients_left(cluster, known=()) -> set:
    """The scheduler's clients not in ``known``, once they are gone or after 5 s (the scheduler
    learns of a closed client asynchronously)."""
    deadline = time.monotonic() + 5
    while set(cluster.scheduler.clients) - set(known) and time.monotonic() < deadline:
        time.sleep(0.05)
    return set(cluster.scheduler.clients) - set(known)


def _no_riskprem_here():
    # Runs on the worker in place of the fingerprint: what a worker without riskprem ends up with.
    raise ModuleNotFoundError("No module named 'panel'")


def test_matching_workers_pass_and_the_backfill_runs_on_them(cluster, sleeves_store):
    store, panel = sleeves_store
    report = backfill(store, NAME, SPEC, chain=2, scheduler=cluster.scheduler_address, **CUTS)
    assert report.where == f"Dask scheduler {cluster.scheduler_address} (1 worker threads)"
    runs = list_runs(store, NAME)
    assert sorted(runs["id"]) == sorted(w.run_id for w in report.written) and len(runs) == 2
    ours = pools.environment_fingerprint()          # each vintage records the worker's versions: ours
    for name, column in pools.FINGERPRINT:
        assert set(runs[column]) == {ours[name]}


@pytest.mark.parametrize("package, claim", [("numpy", "0.0"), ("riskprem", "0.0.1.dev0"), ("pandas", None)])
def test_a_worker_with_other_versions_is_refused_in_one_line_and_nothing_is_written(
        cluster, sleeves_store, monkeypatch, package, claim):
    store, panel = sleeves_store
    before = set(cluster.scheduler.clients)
    theirs = pools.environment_fingerprint()[package]
    _coordinator_claims(monkeypatch, **{package: claim})
    worker = re.escape(next(iter(cluster.scheduler.workers)))
    with pytest.raises(BackfillError, match=rf"^Dask worker {worker} has {package} {re.escape(theirs)}, this "
                                            rf"process {package} {re.escape(claim or 'not installed')} "
                                            rf"\(.*\); {FIX}$") as caught:
        backfill(store, NAME, SPEC, chain=2, scheduler=cluster.scheduler_address, **CUTS)
    assert "\n" not in str(caught.value)
    assert len(list_runs(store)) == 0
    assert _clients_left(cluster, before) == set()                # the refused pool closed its client


def test_the_command_line_refuses_a_mismatch_with_one_line_exit_1_and_writes_nothing(cluster, tmp_path,
                                                                                       monkeypatch):
    from panel.cli.app import app

    path = tmp_path / "quillmoor.duckdb"
    with open_store(path) as store:
        write_dataset(store, quillmoor_panel(), NAME)
    _coordinator_claims(monkeypatch, scipy="0.0")
    result = CliRunner().invoke(app, ["--store", str(path), "--lock-wait", "0.3", "backfill", "--data", NAME,
                                      "--start", CUTS["start"], "--max-iter", "60", "--std-errors", "never",
                                      "--scheduler", cluster.scheduler_address], catch_exceptions=False)
    assert result.exit_code == 1, result.output
    assert result.stderr.startswith("error: Dask worker tcp://127.0.0.1:") and result.stderr.count("\n") == 1
    assert "has scipy " in result.stderr and "this process scipy 0.0" in result.stderr and FIX in result.stderr
    with open_store(path, read_only=True) as store:
        assert len(list_runs(store)) == 0


def test_a_worker_that_cannot_report_its_environment_is_refused(cluster, sleeves_store, monkeypatch):
    store, panel = sleeves_store
    monkeypatch.setattr(pools, "_worker_fingerprint", _no_riskprem_here)   # pickled by reference, run remotely
    with pytest.raises(BackfillError, match=rf"^the Dask workers of {re.escape(cluster.scheduler_address)} "
                                            rf"cannot report their environment \(.*No module named 'panel'.*\); "
                                            rf"{FIX}$") as caught:
        backfill(store, NAME, SPEC, chain=2, scheduler=cluster.scheduler_address, **CUTS)
    assert "\n" not in str(caught.value)
    assert len(list_runs(store)) == 0


def test_a_scheduler_without_workers_is_refused_after_the_connect_timeout(monkeypatch):
    from distributed import LocalCluster

    monkeypatch.setattr(pools, "DASK_CONNECT_TIMEOUT", "0.5s")
    with LocalCluster(n_workers=0, processes=False, dashboard_address=None, protocol="tcp://",
                      host="127.0.0.1", scheduler_port=0) as empty:
        before, started = set(empty.scheduler.clients), time.monotonic()
        # open_pool directly: without the check a backfill here would wait for workers for ever
        with pytest.raises(BackfillError, match=rf"^the Dask scheduler at {re.escape(empty.scheduler_address)} "
                                                r"has no workers after 0.5s; start workers for it \(dask worker "
                                                r"ADDRESS\), or run without --scheduler$"):
            pools.open_pool(None, empty.scheduler_address, n_tasks=2)
        assert time.monotonic() - started < 5
        assert _clients_left(empty, before) == set()
