"""Shared fixtures: the store backend of a test (``backend``, see :mod:`tests.backends`) and the
command-line fixtures (names start with ``cli_``).

The small panel of :mod:`tests.cli_helpers` is ingested and fitted once per session and backend
into a store; each test gets its own copy of that store (a file copy on DuckDB, a database made
from it as template on PostgreSQL).
"""

from __future__ import annotations

import os

# riskprem's matrices are small: multi-threaded BLAS only adds overhead (measured up to 30x slower
# on a 2-core machine), so tests run single-threaded unless the environment says otherwise.  This
# must happen before numpy is first imported.
for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

from pathlib import Path  # noqa: E402

import pytest  # noqa: E402
from typer.testing import CliRunner  # noqa: E402

from tests.backends import Backend, Servers  # noqa: E402
from tests.cli_helpers import CLI_FIT_OPTIONS, CliStore, cli_small_frame, cli_write_csv  # noqa: E402


@pytest.fixture(scope="session")
def store_servers():
    """The database servers of the session (PostgreSQL when ``RISKPREM_TEST_PG_URL`` is set); drops
    every database the session created."""
    servers = Servers()
    yield servers
    servers.close()


@pytest.fixture
def backend(request, store_servers, tmp_path) -> Backend:
    """The store backend of this test: DuckDB, or the parameter ``tests.backends.BOTH`` gives."""
    chosen = Backend(getattr(request, "param", "duckdb"), store_servers, tmp_path)
    yield chosen
    chosen.close()


@pytest.fixture(scope="session")
def cli_bases(tmp_path_factory, store_servers):
    """``base(backend)``: the session store of that backend, built on first use: dataset ``trees``
    (ingested from CSV in percent), run 1 = full fit, run 2 = a vintage as of 2018-06-30."""
    built: dict[str, CliStore] = {}

    def base(backend: Backend) -> CliStore:
        if backend.name not in built:
            folder = tmp_path_factory.mktemp(f"cli_base_{backend.name}")
            csv = cli_write_csv(cli_small_frame(), folder / "trees.csv")
            location = (folder / "base.duckdb" if backend.is_duckdb else store_servers.postgresql().create())
            made = CliStore(path=location, csv=csv, runner=CliRunner(), folder=folder)
            done = made.invoke("ingest", csv, "--name", "trees", "--units", "percent")
            assert done.exit_code == 0, done.output
            done = made.invoke("fit", "--data", "trees", *CLI_FIT_OPTIONS, "--label", "full sample")
            assert done.exit_code == 0, done.output
            done = made.invoke("fit", "--data", "trees", *CLI_FIT_OPTIONS, "--as-of", "2018-06-30")
            assert done.exit_code == 0, done.output
            built[backend.name] = made
        return built[backend.name]

    return base


@pytest.fixture
def cli_base_store(cli_bases, backend) -> CliStore:
    """The session store of this test's backend (never write to it)."""
    return cli_bases(backend)


@pytest.fixture
def cli_store(cli_base_store: CliStore, backend: Backend, tmp_path: Path) -> CliStore:
    """A private copy of the session store for one test."""
    target = backend.copy(str(cli_base_store.path), "store")
    csv = tmp_path / "trees.csv"
    csv.write_bytes(cli_base_store.csv.read_bytes())
    return CliStore(path=Path(target) if backend.is_duckdb else target, csv=csv, runner=CliRunner(),
                    folder=tmp_path)
