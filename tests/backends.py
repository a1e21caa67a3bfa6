"""The store backends the tests run on: DuckDB files always, PostgreSQL when a server is given.

``RISKPREM_TEST_PG_URL`` names a PostgreSQL server by the SQLAlchemy URL of a database the tests
may connect to for administration (``postgresql+psycopg://postgres@127.0.0.1:PORT/postgres``);
``.ci/run`` starts a throwaway server and sets it (``.ci/postgres.sh``).  Without it the PostgreSQL
variants are skipped with that reason; with it, a server that cannot be reached fails them.

Every PostgreSQL store of a test is a database of its own (``CREATE DATABASE``, about 20 ms),
dropped when the test ends, so tests never see each other's rows; a copy of a prepared store is
``CREATE DATABASE ... TEMPLATE``, the PostgreSQL counterpart of copying a DuckDB file.

Use :data:`BOTH` on a test that takes (directly or through another fixture) the ``backend``
fixture; without it a test gets DuckDB.
"""

from __future__ import annotations

import itertools
import os
import shutil
from pathlib import Path

import pytest

PG_ENV = "RISKPREM_TEST_PG_URL"
NAMES = ("duckdb", "postgresql")
#: Run a test on both backends (indirect parameter of the ``backend`` fixture).
BOTH = pytest.mark.parametrize("backend", NAMES, indirect=True)

_numbers = itertools.count()


class PgServer:
    """The PostgreSQL server of ``RISKPREM_TEST_PG_URL``: creates and drops test databases."""

    def __init__(self, admin_url: str):
        import psycopg
        from sqlalchemy.engine import make_url

        self.url = make_url(admin_url)
        conninfo = self.url.set(drivername="postgresql").render_as_string(hide_password=False)
        self.conn = psycopg.connect(conninfo, autocommit=True, connect_timeout=5)
        self.created: list[str] = []

    def create(self, template: str | None = None) -> str:
        """A new empty database (or a copy of ``template``); returns its SQLAlchemy URL."""
        name = f"riskprem_test_{os.getpid()}_{next(_numbers)}"
        source = template or "template0"
        self.conn.execute(f'CREATE DATABASE "{name}" TEMPLATE "{source}"')
        self.created.append(name)
        return self.url.set(database=name).render_as_string(hide_password=False)

    def drop(self, url: str) -> None:
        from sqlalchemy.engine import make_url

        name = make_url(url).database
        self.conn.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')
        if name in self.created:
            self.created.remove(name)

    def close(self) -> None:
        for name in list(self.created):
            self.conn.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')
        self.conn.close()


class Servers:
    """Session-wide access to the PostgreSQL server, connected on first use."""

    def __init__(self):
        self._pg: PgServer | None = None
        self._problem: str | None = None

    def postgresql(self) -> PgServer:
        if self._pg is not None:
            return self._pg
        url = os.environ.get(PG_ENV)
        if not url:
            pytest.skip(f"PostgreSQL variant: {PG_ENV} is not set (.ci/run starts a server; locally: "
                        "`. .ci/postgres.sh && pg_test_server_start`)")
        try:
            import psycopg  # noqa: F401
        except ImportError:
            pytest.skip("PostgreSQL variant: psycopg is not installed (pip install -e '.[test,postgres]')")
        if self._problem is None:
            try:
                self._pg = PgServer(url)
                return self._pg
            except Exception as error:  # any failure to reach the named server
                self._problem = f"cannot reach the PostgreSQL server of {PG_ENV}: {error}"
        pytest.fail(self._problem)

    def close(self) -> None:
        if self._pg is not None:
            self._pg.close()


class Backend:
    """One backend for one test: fresh store locations and copies of stores, cleaned up after."""

    def __init__(self, name: str, servers: Servers, folder: Path):
        self.name = name
        self.folder = folder
        self.pg = servers.postgresql() if name == "postgresql" else None
        self.mine: list[str] = []

    @property
    def is_duckdb(self) -> bool:
        return self.pg is None

    def location(self, stem: str = "store") -> str:
        """Where a new, empty store can be created: a file path or a new database's URL."""
        if self.pg is None:
            return str(self.folder / f"{stem}.duckdb")
        url = self.pg.create()
        self.mine.append(url)
        return url

    def copy(self, source: str, stem: str = "copy") -> str:
        """A private copy of the (closed) store at ``source``."""
        if self.pg is None:
            target = self.folder / f"{stem}.duckdb"
            shutil.copyfile(source, target)
            if Path(source + ".wal").exists():
                shutil.copyfile(source + ".wal", str(target) + ".wal")
            return str(target)
        from sqlalchemy.engine import make_url

        url = self.pg.create(template=make_url(source).database)
        self.mine.append(url)
        return url

    def close(self) -> None:
        for url in self.mine:
            self.pg.drop(url)
