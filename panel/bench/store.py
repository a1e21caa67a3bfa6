"""Write-speed benchmark of the store: ``python -m panel.bench.store [--rows N] [--sample M]``.

Writes one run of ``N`` estimate rows through DuckDB's native path, and ``M``-row runs through both
the native path and the portable SQLAlchemy executemany fallback, into a fresh store in a temporary
folder, and prints rows per second and the native/executemany ratio.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

from panel.data import Panel
from panel.store.connection import open_store
from panel.store.writer import write_dataset, write_run

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


def _timed_write(store, digest: str, frame: pd.DataFrame, native: bool) -> float:
    start = time.perf_counter()
    write_run(store, {"dataset_hash": digest, "kind": "bench", "settings": {"native": native},
                      "status": "fixed"}, {"estimates": frame}, native=native)
    return time.perf_counter() - start


def run(rows: int, sample: int, folder: Path) -> dict:
    """Run the benchmark in ``folder``; returns the measurements."""
    panel = Panel.from_frame(pd.DataFrame({"a": [0.01, 0.02]}, index=pd.date_range("2000-01-31", periods=2, freq="ME")))
    big = synthetic_estimates(rows)
    small = synthetic_estimates(sample, n_assets=min(500, sample))
    with open_store(folder / "bench.duckdb") as store:
        digest = write_dataset(store, panel, "bench")
        native_big = _timed_write(store, digest, big, native=True)
        native_small = _timed_write(store, digest, small, native=True)
        fallback_small = _timed_write(store, digest, small, native=False)
    return {"rows": len(big), "native_s": native_big, "native_rows_per_s": len(big) / native_big,
            "sample": len(small), "native_sample_rows_per_s": len(small) / native_small,
            "executemany_s": fallback_small, "executemany_rows_per_s": len(small) / fallback_small,
            "ratio": (len(small) / native_small) / (len(small) / fallback_small)}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m panel.bench.store", description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=2_000_000, help="estimate rows for the native run")
    parser.add_argument("--sample", type=int, default=20_000, help="rows for the native vs executemany comparison")
    args = parser.parse_args(argv)
    with tempfile.TemporaryDirectory() as folder:
        result = run(args.rows, args.sample, Path(folder))
    out = sys.stdout
    out.write(f"native path      : {result['rows']:>10,} rows in {result['native_s']:.2f} s = "
              f"{result['native_rows_per_s']:>12,.0f} rows/s\n")
    out.write(f"native (sample)  : {result['sample']:>10,} rows            = "
              f"{result['native_sample_rows_per_s']:>12,.0f} rows/s\n")
    out.write(f"executemany      : {result['sample']:>10,} rows in {result['executemany_s']:.2f} s = "
              f"{result['executemany_rows_per_s']:>12,.0f} rows/s\n")
    out.write(f"native / executemany on the same sample: {result['ratio']:,.0f}x\n")
    return 0


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())
