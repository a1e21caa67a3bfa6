"""Write-speed benchmark of the store: ``python -m panel.bench.store [--postgres URL]``.

Into a fresh DuckDB store in a temporary folder it writes one run of ``--rows`` estimate rows through
DuckDB's native path, and ``--sample``-row runs through both the native path and the portable
SQLAlchemy executemany fallback.  Then it writes a whole run shaped like a fit of ``--assets`` x
``--dates`` (estimates, one factor path, the parameter table with both N x N covariances, an EM trace,
diagnostics) to DuckDB and, given ``--postgres URL`` (default ``$RISKPREM_BENCH_PG_URL``), to
PostgreSQL through COPY and through executemany, and prints the times and their ratios.  On
PostgreSQL it works in a scratch schema of the database the URL names and drops it afterwards.
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd
from sqlalchemy import create_engine, text

from panel.data import Panel
from panel.store.connection import open_store, public_location
from panel.store.writer import write_dataset, write_run

PG_ENV = "RISKPREM_BENCH_PG_URL"
_VALUE_COLUMNS = ("filtered_mean", "filtered_std", "smoothed_mean", "smoothed_std", "predictive_mean",
                  "predictive_std", "std_innovation")


def synthetic_estimates(n_rows: int, n_assets: int = 500, seed: int = 0) -> pd.DataFrame:
    """An estimates table of ``n_rows`` rows (rounded down to whole dates), random values."""
    rng = np.random.default_rng(seed)
    n_dates = max(1, n_rows // n_assets)
    dates = pd.date_range("1800-01-31", periods=n_dates, freq="ME")
    names = np.array([f"asset_{i:04d}" for i in range(n_assets)], dtype=object)
    frame = pd.DataFrame({"date": np.repeat(dates.values, n_assets), "asset": np.tile(names, n_dates)})
    for name in _VALUE_COLUMNS:
        frame[name] = rng.normal(size=len(frame))
    return frame


def synthetic_run(n_assets: int, n_dates: int, seed: int = 0) -> dict[str, pd.DataFrame]:
    """The result tables of a one-factor fit with a factor return-shock covariance on ``n_assets``
    x ``n_dates`` (random values, PanelFit columns): ``n_assets * n_dates`` estimates,
    ``2 n_assets^2 + 4 n_assets`` parameter rows, a 300-step trace, one diagnostic per asset."""
    rng = np.random.default_rng(seed)
    estimates = synthetic_estimates(n_assets * n_dates, n_assets, seed)
    estimates.loc[::7, "std_innovation"] = np.nan                 # missing returns
    dates = estimates["date"].unique()
    factors = pd.DataFrame({"date": dates, "factor": 1, **{c: rng.normal(size=len(dates)) for c in
                            ("filtered_mean", "filtered_std", "smoothed_mean", "smoothed_std")}})
    assets = [f"asset_{i:04d}" for i in range(n_assets)]
    pairs = pd.MultiIndex.from_product([assets, assets]).to_frame(index=False, name=["row", "col"])
    blocks = [pd.DataFrame({"name": "loading", "row": assets, "col": "f1"}),
              pd.DataFrame({"name": "idio_premium_var", "row": assets, "col": None}),
              pairs.assign(name="premium_cov"), pairs.assign(name="return_cov"),
              pd.DataFrame({"name": "return_loading", "row": assets, "col": "g1"}),
              pd.DataFrame({"name": "return_idio_var", "row": assets, "col": None})]
    parameters = pd.concat(blocks, ignore_index=True)[["name", "row", "col"]]
    parameters["value"] = rng.normal(size=len(parameters))
    parameters["std_error"] = np.where(rng.random(len(parameters)) < 0.5, np.nan, 0.1)
    steps = 300
    trace = pd.DataFrame({"iteration": np.arange(1, steps + 1), "objective": rng.normal(size=steps),
                          "loglik": rng.normal(size=steps), "elapsed_s": np.linspace(0.01, 3.0, steps),
                          "step": ["em"] * (steps - 1) + ["quasi-newton"]})
    diagnostics = pd.DataFrame({"asset": assets, "statistic": "ljung_box", "lags": 12,
                                "value": rng.uniform(1, 30, n_assets), "pvalue": rng.uniform(0, 1, n_assets)})
    return {"estimates": estimates, "factors": factors, "parameters": parameters, "trace": trace,
            "diagnostics": diagnostics}


def _tiny_panel() -> Panel:
    index = pd.date_range("2000-01-31", periods=2, freq="ME")
    return Panel.from_frame(pd.DataFrame({"a": [0.01, 0.02]}, index=index))


def _timed_write(store, digest: str, tables: dict, native: bool) -> float:
    start = time.perf_counter()
    write_run(store, {"dataset_hash": digest, "kind": "bench", "settings": {"native": native},
                      "status": "fixed"}, tables, native=native)
    return time.perf_counter() - start


def _median_write(store, digest: str, tables: dict, native: bool, repeat: int) -> float:
    return statistics.median(_timed_write(store, digest, tables, native) for _ in range(repeat))


def run(rows: int, sample: int, folder: Path, *, assets: int = 100, dates: int = 600,
        postgres: str | None = None, repeat: int = 3) -> dict:
    """Run the benchmark (DuckDB files in ``folder``; PostgreSQL at ``postgres`` if given); returns
    the measurements in seconds and rows per second."""
    panel = _tiny_panel()
    big = {"estimates": synthetic_estimates(rows)}
    small = {"estimates": synthetic_estimates(sample, n_assets=min(500, sample))}
    whole = synthetic_run(assets, dates)
    n_small = len(small["estimates"])
    with open_store(folder / "bench.duckdb") as store:
        digest = write_dataset(store, panel, "bench")
        native_big = _timed_write(store, digest, big, native=True)
        native_small = _timed_write(store, digest, small, native=True)
        fallback_small = _timed_write(store, digest, small, native=False)
        duckdb_run = _median_write(store, digest, whole, True, repeat)
    result = {"rows": len(big["estimates"]), "native_s": native_big,
              "native_rows_per_s": len(big["estimates"]) / native_big,
              "sample": n_small, "native_sample_rows_per_s": n_small / native_small,
              "executemany_s": fallback_small, "executemany_rows_per_s": n_small / fallback_small,
              "ratio": fallback_small / native_small,
              "run_shape": {k: len(v) for k, v in whole.items()}, "run_assets": assets, "run_dates": dates,
              "duckdb_run_s": duckdb_run}
    if postgres:
        result.update(_postgres_runs(postgres, panel, whole, repeat))
        result["copy_vs_duckdb"] = result["postgres_copy_s"] / duckdb_run
    return result


def _postgres_runs(url: str, panel: Panel, whole: dict, repeat: int) -> dict:
    """COPY and executemany times of ``whole`` in a scratch schema of the database at ``url``."""
    schema = f"riskprem_bench_{os.getpid()}"
    admin = create_engine(url)
    with admin.begin() as conn:
        conn.execute(text(f"CREATE SCHEMA {schema}"))
    scratch = url + ("&" if "?" in url else "?") + f"options=-csearch_path%3D{schema}"
    try:
        with open_store(scratch) as store:
            digest = write_dataset(store, panel, "bench")
            copy = _median_write(store, digest, whole, True, repeat)
            executemany = _median_write(store, digest, whole, False, max(1, repeat // 2))
            server = store.engine.dialect.server_version_info
    finally:
        with admin.begin() as conn:
            conn.execute(text(f"DROP SCHEMA {schema} CASCADE"))
        admin.dispose()
    return {"postgres": public_location(url), "postgres_server": ".".join(map(str, server or ())),
            "postgres_copy_s": copy, "postgres_executemany_s": executemany}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m panel.bench.store", description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=2_000_000, help="estimate rows for the native run")
    parser.add_argument("--sample", type=int, default=20_000, help="rows for the native vs executemany comparison")
    parser.add_argument("--assets", type=int, default=100, help="N of the whole-run comparison")
    parser.add_argument("--dates", type=int, default=600, help="T of the whole-run comparison")
    parser.add_argument("--repeat", type=int, default=3, help="writes per path; the median is shown")
    parser.add_argument("--postgres", metavar="URL", default=os.environ.get(PG_ENV),
                        help=f"a PostgreSQL database to compare against (default ${PG_ENV}), e.g. "
                             "postgresql+psycopg://user@localhost/scratch")
    args = parser.parse_args(argv)
    with tempfile.TemporaryDirectory() as folder:
        result = run(args.rows, args.sample, Path(folder), assets=args.assets, dates=args.dates,
                     postgres=args.postgres, repeat=args.repeat)
    out = sys.stdout
    out.write(f"native path      : {result['rows']:>10,} rows in {result['native_s']:.2f} s = "
              f"{result['native_rows_per_s']:>12,.0f} rows/s\n")
    out.write(f"native (sample)  : {result['sample']:>10,} rows            = "
              f"{result['native_sample_rows_per_s']:>12,.0f} rows/s\n")
    out.write(f"executemany      : {result['sample']:>10,} rows in {result['executemany_s']:.2f} s = "
              f"{result['executemany_rows_per_s']:>12,.0f} rows/s\n")
    out.write(f"native / executemany on the same sample: {result['ratio']:,.0f}x\n")
    shape = ", ".join(f"{k} {v:,}" for k, v in result["run_shape"].items())
    out.write(f"\nwhole run, N = {result['run_assets']}, T = {result['run_dates']} ({shape} rows; "
              f"median of {args.repeat}):\n")
    out.write(f"  DuckDB native            {result['duckdb_run_s']:.3f} s\n")
    if "postgres_copy_s" in result:
        out.write(f"  PostgreSQL {result['postgres_server']} COPY      {result['postgres_copy_s']:.3f} s  "
                  f"= {result['copy_vs_duckdb']:.2f}x DuckDB\n")
        out.write(f"  PostgreSQL executemany   {result['postgres_executemany_s']:.3f} s  "
                  f"= {result['postgres_executemany_s'] / result['duckdb_run_s']:.1f}x DuckDB\n")
    else:
        out.write(f"  (no PostgreSQL: give --postgres URL or set {PG_ENV})\n")
    return 0


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())
