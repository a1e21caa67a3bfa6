"""Shared fixtures of the command-line tests (names start with ``cli_``).

The small panel of :mod:`tests.cli_helpers` is ingested and fitted once per session into a DuckDB
store; each test gets its own copy of that store file.
"""

from __future__ import annotations

import os

# riskprem's matrices are small: multi-threaded BLAS only adds overhead (measured up to 30x slower
# on a 2-core machine), so tests run single-threaded unless the environment says otherwise.  This
# must happen before numpy is first imported.
for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import shutil  # noqa: E402
from pathlib import Path  # noqa: E402

import pytest  # noqa: E402
from typer.testing import CliRunner  # noqa: E402

from tests.cli_helpers import CLI_FIT_OPTIONS, CliStore, cli_small_frame, cli_write_csv


@pytest.fixture(scope="session")
def cli_base_store(tmp_path_factory) -> CliStore:
    """Session store: dataset ``trees`` (ingested from CSV in percent), run 1 = full fit, run 2 = a
    vintage as of 2018-06-30."""
    folder = tmp_path_factory.mktemp("cli_base")
    csv = cli_write_csv(cli_small_frame(), folder / "trees.csv")
    base = CliStore(path=folder / "base.duckdb", csv=csv, runner=CliRunner(), folder=folder)
    done = base.invoke("ingest", csv, "--name", "trees", "--units", "percent")
    assert done.exit_code == 0, done.output
    done = base.invoke("fit", "--data", "trees", *CLI_FIT_OPTIONS, "--label", "full sample")
    assert done.exit_code == 0, done.output
    done = base.invoke("fit", "--data", "trees", *CLI_FIT_OPTIONS, "--as-of", "2018-06-30")
    assert done.exit_code == 0, done.output
    return base


@pytest.fixture
def cli_store(cli_base_store: CliStore, tmp_path: Path) -> CliStore:
    """A private copy of the session store for one test."""
    target = tmp_path / "store.duckdb"
    shutil.copyfile(cli_base_store.path, target)
    wal = Path(str(cli_base_store.path) + ".wal")
    if wal.exists():
        shutil.copyfile(wal, Path(str(target) + ".wal"))
    csv = shutil.copyfile(cli_base_store.csv, tmp_path / "trees.csv")
    return CliStore(path=target, csv=Path(csv), runner=CliRunner(), folder=tmp_path)
