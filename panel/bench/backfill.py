"""Backfill benchmark: ``python -m panel.bench.backfill [--quick] [--json [PATH]] [--max-iter M]``.

Times one backfill of 120 monthly cut-offs on an invented panel of N = 30 sleeves x T = 600 months
(the last 120 dates are the cut-offs), once with 1 worker (in-process) and once with 2 local worker
processes, in the SAME benchmark process on the SAME panel and settings, each into a fresh DuckDB
store in a temporary folder, and prints the times and the speed-up (1-worker time / 2-worker time).
It also checks that both runs stored identical vintages (the chain scheme makes the result
independent of the number of workers).  ``--quick``: 6 sleeves x 120 months, 8 cut-offs.

The measurement runs in a child process whose BLAS libraries use ``--threads`` threads (default 1;
worker processes inherit it), so the two sides compete for the same cores alike.  The fit speed
depends on the E-step path the estimator picks; this measures whatever is there.  Nothing here
fails on timing.  The data are invented (a fictional fund's sleeves, fixed seed).
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

FULL = {"assets": 30, "dates": 600, "cutoffs": 120, "chain": 12, "max_iter": 200}
QUICK = {"assets": 6, "dates": 120, "cutoffs": 8, "chain": 2, "max_iter": 30}
WORKERS = (1, 2)


def sleeves(n_assets: int, n_dates: int, seed: int = 20250301):
    """Invented monthly excess returns of a fictional fund's sleeves, simulated from the model:
    one common premium factor plus own random walks, one market return shock plus own noise."""
    import numpy as np
    import pandas as pd

    from panel.data import Panel

    rng = np.random.default_rng(seed)
    loadings = rng.uniform(0.2, 1.0, n_assets) * 0.0008
    premia = (0.004 + np.outer(np.cumsum(rng.normal(0, 1, n_dates)), loadings)
              + np.cumsum(rng.normal(0, 0.0004, (n_dates, n_assets)), axis=0))
    market = np.outer(rng.normal(0, 1, n_dates), rng.uniform(0.01, 0.04, n_assets))
    values = premia + market + rng.normal(0, 1, (n_dates, n_assets)) * rng.uniform(0.015, 0.04, n_assets)
    dates = pd.date_range("1974-01-31", periods=n_dates, freq="ME")
    frame = pd.DataFrame(values, index=dates, columns=[f"sleeve_{i:02d}" for i in range(n_assets)])
    return Panel.from_frame(frame, "M", meta={"source_file": "invented (panel.bench.backfill)"})


def measure(config: dict) -> dict:
    """Run the backfill with each worker count of :data:`WORKERS`; times and a same-result check."""
    import numpy as np

    from panel.vintages.backfill import backfill
    from panel.model.spec import ModelSpec
    from panel.store import list_runs, open_store, run_tables, write_dataset

    panel = sleeves(config["assets"], config["dates"])
    spec = ModelSpec(std_errors="never", max_iter=config["max_iter"])
    start = panel.dates[-config["cutoffs"]]
    rows, stored = [], {}
    with tempfile.TemporaryDirectory(prefix="riskprem-bench-") as folder:
        for workers in WORKERS:
            with open_store(Path(folder) / f"workers{workers}.duckdb") as store:
                write_dataset(store, panel, "bench")
                t0 = time.perf_counter()
                report = backfill(store, "bench", spec, start=start, chain=config["chain"], workers=workers)
                seconds = time.perf_counter() - t0
                runs = list_runs(store, "bench").sort_values("as_of")
                stored[workers] = [run_tables(store, int(i))["parameters"]["value"].to_numpy() for i in runs["id"]]
                rows.append({"workers": workers, "where": report.where, "seconds": seconds,
                             "vintages": len(report.written), "seconds_per_vintage": seconds / len(report.written),
                             "mean_iterations": float(np.mean([w.n_iter for w in report.written])),
                             "fit_seconds_total": float(sum(w.fit_s for w in report.written))})
    base = rows[0]["seconds"]
    for row in rows:
        row["speedup"] = base / row["seconds"]
    same = all(len(stored[w]) == len(stored[WORKERS[0]]) and
               all(np.array_equal(a, b) for a, b in zip(stored[w], stored[WORKERS[0]])) for w in WORKERS)
    return {"benchmark": "backfill", "config": config, "cpus": os.cpu_count(),
            "blas_threads": os.environ.get("OPENBLAS_NUM_THREADS"), "runs": rows, "identical_vintages": same}


def _child(config: dict, threads: int) -> dict:
    env = dict(os.environ)
    for name in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
        env[name] = str(threads)
    done = subprocess.run([sys.executable, "-m", "panel.bench.backfill", "--worker", json.dumps(config)],
                          env=env, capture_output=True, text=True, check=False)
    if done.returncode != 0:
        tail = (done.stderr.strip().splitlines() or ["no output"])[-1]
        raise SystemExit(f"error: the benchmark process failed: {tail}")
    return json.loads(done.stdout.strip().splitlines()[-1])


def format_result(result: dict) -> str:
    c = result["config"]
    lines = [f"backfill benchmark: {c['cutoffs']} monthly cut-offs, N={c['assets']} sleeves x T={c['dates']} "
             f"months, chains of {c['chain']}, max {c['max_iter']} EM iterations per vintage, "
             f"{result['cpus']} CPUs, BLAS threads {result['blas_threads']}",
             f"{'workers':>8} {'seconds':>9} {'s/vintage':>10} {'iterations':>11} {'speed-up':>9}  where"]
    for r in result["runs"]:
        lines.append(f"{r['workers']:>8} {r['seconds']:>9.2f} {r['seconds_per_vintage']:>10.3f} "
                     f"{r['mean_iterations']:>11.1f} {r['speedup']:>8.2f}x  {r['where']}")
    lines.append("identical vintages with 1 and 2 workers: " + ("yes" if result["identical_vintages"] else "NO"))
    return "\n".join(lines)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(prog="python -m panel.bench.backfill", description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="a small smoke-test configuration")
    parser.add_argument("--json", nargs="?", const="-", metavar="PATH",
                        help="write the results as JSON to PATH (stdout without PATH)")
    parser.add_argument("--max-iter", type=int, help="EM iterations per vintage at most (default: 200; quick 30)")
    parser.add_argument("--threads", type=int, default=1, help="BLAS threads per process (default 1)")
    parser.add_argument("--worker", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.worker:
        print(json.dumps(measure(json.loads(args.worker))))
        return 0
    config = dict(QUICK if args.quick else FULL)
    if args.max_iter:
        config["max_iter"] = int(args.max_iter)
    result = _child(config, args.threads)
    if args.json == "-":
        print(json.dumps(result, indent=1))
    else:
        print(format_result(result))
        if args.json:
            Path(args.json).write_text(json.dumps(result, indent=1) + "\n", encoding="utf-8")
    return 0 if result["identical_vintages"] else 1


if __name__ == "__main__":
    raise SystemExit(main())
