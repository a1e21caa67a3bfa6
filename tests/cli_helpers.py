"""Helpers of the command-line tests (fixtures in ``tests/conftest.py``; names start with ``cli``).

A small invented panel: five tree-named sleeves, 60 months, one late entrant, one gap.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
from typer.testing import CliRunner

#: Fit options that keep the CLI test fits quick (a weak premium prior keeps EM off the boundary).
CLI_FIT_OPTIONS = ("--premium-prior", "1:60")
CLI_ASSETS = ("Alder", "Birch", "Cedar", "Douglas", "Elm")


def cli_small_frame(seed: int = 5, months: int = 60) -> pd.DataFrame:
    """Decimal monthly excess returns, dates x 5 sleeves; Elm enters in month 13, Cedar has a
    three-month gap."""
    rng = np.random.default_rng(seed)
    dates = pd.date_range("2015-01-31", periods=months, freq="ME", name="date")
    n = len(CLI_ASSETS)
    mu = 0.004 + np.cumsum(rng.normal(0, 0.001, (months, n)), axis=0)
    y = mu + rng.normal(0, 0.03, (months, 1)) * np.linspace(0.5, 1.2, n) + rng.normal(0, 0.02, (months, n))
    frame = pd.DataFrame(y, index=dates, columns=list(CLI_ASSETS))
    frame.iloc[:12, 4] = np.nan
    frame.iloc[30:33, 2] = np.nan
    return frame


def cli_write_csv(frame: pd.DataFrame, path: Path, percent: bool = True) -> Path:
    out = frame * (100 if percent else 1)
    out.index = out.index.strftime("%Y-%m-%d")
    out.index.name = "date"
    out.to_csv(path, float_format="%.6f")
    return path


def cli_file_digest(path: Path) -> str:
    """sha256 of a store file and its write-ahead log (what 'unchanged' means on disk)."""
    digest = hashlib.sha256()
    for p in (Path(path), Path(str(path) + ".wal")):
        digest.update(p.read_bytes() if p.exists() else b"-")
    return digest.hexdigest()


def cli_rows_digest(location: str) -> str:
    """sha256 of every row of every table of a store, in a fixed order (what 'unchanged' means for
    a database server, whose files are not ours to read)."""
    from sqlalchemy import select

    from panel.store import open_store, schema

    digest = hashlib.sha256()
    with open_store(location, read_only=True) as store, store.engine.connect() as conn:
        for table in schema.metadata.sorted_tables:
            rows = conn.execute(select(table)).all()
            digest.update(repr((table.name, sorted(map(repr, rows)))).encode())
    return digest.hexdigest()


@dataclass
class CliStore:
    """A store (file path, or database URL on PostgreSQL) plus a runner that passes ``--store`` to
    every command."""

    path: Path | str
    csv: Path
    runner: CliRunner
    folder: Path
    fit_run: int = 1
    vintage_run: int = 2

    def invoke(self, *args: str, store: bool = True):
        from panel.cli.app import app

        head = ["--store", str(self.path), "--lock-wait", "0.3"] if store else []
        return self.runner.invoke(app, [*head, *map(str, args)], catch_exceptions=False)

    @property
    def is_duckdb(self) -> bool:
        return isinstance(self.path, Path)

    def digest(self) -> str:
        return cli_file_digest(self.path) if self.is_duckdb else cli_rows_digest(self.path)

    def counts(self) -> dict:
        from panel.store import open_store, store_info

        with open_store(self.path, read_only=True) as s:
            return store_info(s)["counts"]


