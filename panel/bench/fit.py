"""Side-by-side benchmark: ``python -m panel.bench [--json PATH] [--quick] [--threads N]``.

Every ratio compares two codes timed in the SAME worker process on the SAME simulated panel
(invented data, fixed seeds), so a slow or busy machine changes both sides alike:

(a) our E-step (``panel.kalman.paths.estep``, method "auto") against statsmodels' general
    state-space smoother (``MLEModel`` with design I, transition I, state_cov Sigma, obs_cov H,
    exact diffuse initialisation) on the identical model; the log-likelihoods must agree;
(b) one EM iteration of ours (E-step + ``panel.model.mstep.mstep``) against one EM iteration of
    statsmodels' ``DynamicFactorMQ(factors=1, factor_orders=1, idiosyncratic_ar1=True)`` — a
    different model (AR(1) idiosyncratic noise, no premium random walks), so indicative only.
    Its iterations are averaged over iterations 2-21 from its default start, as
    ``(t(21) - t(1)) / 20`` (which removes its set-up and final smoothing): its first iterations
    are much cheaper than later ones (measured at N=100: ~0.03 s for the second, 0.7-1 s from the
    fifth on, single-threaded), so a two-iteration sample would understate a fit's cost;
(c) our full fit to convergence (``panel.fit``): time, E-steps, final log-likelihood.
Scale rows (ours alone, each in its own subprocess for its own peak RSS): N=500, T=1200
balanced; N=200, T=1200 staircase.
(d) ragged panels: for each N, one worker times our E-step (method "auto") on the balanced panel
and on the same draws with a ragged pattern (:data:`RAGGED`), and statsmodels' smoother on each;
ratios against our balanced E-step and against statsmodels, all in that one process.
(e) ragged fits: our full fit per pattern, each in its own worker (E-steps, status, peak RSS).

Workers run with ``OPENBLAS_NUM_THREADS`` (and OMP/MKL) set to ``--threads`` (default 1): on small
matrices multi-threaded BLAS can be many times slower than one thread, for both sides.
statsmodels is imported lazily (a test/benchmark dependency only).  Timing never fails anything.
"""

from __future__ import annotations

import argparse
import json
import os
import re
import subprocess
import sys
import time

import numpy as np

from panel.kalman.gapfill import fillable

#: Ragged patterns applied to the balanced panel's draws (so ratios compare like with like):
#: staircase entries over the first half; exits (10% of the assets leave, spread over the second
#: half); one cell missing at the last date; isolated gaps, each cell missing with 0.5% or 2%.
RAGGED = ("staircase", "exits", "last_cell", "gaps_0.5", "gaps_2")
FULL = {"compare": [(30, 600, "balanced"), (30, 600, "staircase"), (100, 600, "balanced"),
                    (100, 600, "staircase")],
        "scale": [(500, 1200, "balanced"), (200, 1200, "staircase")], "dfm_iters": (1, 21),
        "time_budget": 600.0, "ragged": [(100, 1200), (300, 1200)],
        "ragged_fit": [(100, 600, p) for p in ("balanced",) + RAGGED]}
QUICK = {"compare": [(6, 60, "balanced"), (6, 60, "staircase")],
         "scale": [(20, 120, "balanced")], "dfm_iters": (1, 2), "time_budget": 60.0,
         "ragged": [(8, 80)], "ragged_fit": [(6, 60, "balanced"), (6, 60, "exits"),
                                                (6, 60, "gaps_2")]}
SECTIONS = ("compare", "scale", "ragged", "ragged_fit")
#: Largest statsmodels smoother run (bytes of its per-date covariance arrays) in the ragged rows.
SM_MEMORY = 12e9
#: (T, N, N) float arrays statsmodels' smoother holds at once: measured 6.3 GB at N=100, T=1200,
#: i.e. about 66 of them (not ten: the N=300 worker died of that estimate at 57 GB).
SM_ARRAYS = 66


def simulate(N: int, T: int, pattern: str, seed: int = 20240601):
    """Invented monthly excess-return panel from the model itself, decimal per month.

    Returns (DataFrame dates x assets, Sigma, H).  "staircase": asset i enters at date
    ``round(i T / (2 N))`` (entries spread over the first half), balanced afterwards.
    """
    import pandas as pd

    if pattern in RAGGED and pattern != "staircase":
        frame, Sigma, H = simulate(N, T, "balanced", seed)
        return _ragged(frame, pattern, seed), Sigma, H
    rng = np.random.default_rng(seed + 7919 * N + T + (pattern == "staircase"))
    lam = rng.normal(0.0006, 0.0003, size=(N, 1))
    Sigma = lam @ lam.T + np.diag(rng.uniform(0.0002, 0.0005, N) ** 2)
    B = rng.normal(0.035, 0.01, size=(N, 1))
    H = B @ B.T + np.diag(rng.uniform(0.02, 0.05, N) ** 2)
    mu = 0.005 + np.cumsum(rng.multivariate_normal(np.zeros(N), Sigma, size=T), axis=0)
    Y = mu + rng.multivariate_normal(np.zeros(N), H, size=T)
    if pattern == "staircase":
        for i in range(N):
            Y[: int(round(i * T / (2 * N))), i] = np.nan
    dates = pd.date_range("1950-01-31", periods=T, freq="ME")
    return pd.DataFrame(Y, index=dates, columns=[f"A{i:03d}" for i in range(N)]), Sigma, H


def _ragged(frame, pattern: str, seed: int):
    """The balanced ``frame`` with the cells of a :data:`RAGGED` pattern set missing."""
    Y = frame.to_numpy().copy()
    T, N = Y.shape
    rng = np.random.default_rng(seed + 31 * N + T)
    if pattern == "exits":
        leavers = rng.choice(N, size=max(1, N // 10), replace=False)
        for j, i in enumerate(sorted(leavers)):
            Y[int(T * (0.5 + 0.45 * j / len(leavers))):, i] = np.nan
    elif pattern == "last_cell":
        Y[-1, rng.integers(N)] = np.nan
    elif pattern.startswith("gaps_"):
        holes = rng.random((T, N)) < float(pattern[5:]) / 100.0
        holes[0] = False                     # every asset enters at the first date
        Y[holes] = np.nan
    return frame.__class__(Y, index=frame.index, columns=frame.columns)


def _best(fn, repeats):
    times = []
    out = None
    for _ in range(repeats):
        t0 = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t0)
    return min(times), out


def _statsmodels_smoother(Y, Sigma, H):
    import warnings

    from statsmodels.tsa.statespace.mlemodel import MLEModel

    N = Y.shape[1]
    mod = MLEModel(Y, k_states=N)
    mod.ssm["design"] = np.eye(N)
    mod.ssm["transition"] = np.eye(N)
    mod.ssm["selection"] = np.eye(N)
    mod.ssm["state_cov"] = Sigma
    mod.ssm["obs_cov"] = H
    mod.ssm.initialize_diffuse()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return mod.ssm.smooth()


def _dfm_iteration(Y, iters):
    """Seconds per EM iteration of DynamicFactorMQ: (t(k2) - t(k1)) / (k2 - k1) removes set-up."""
    import warnings

    from statsmodels.tsa.statespace.dynamic_factor_mq import DynamicFactorMQ

    def model(data):
        return DynamicFactorMQ(data, factors=1, factor_orders=1, idiosyncratic_ar1=True)

    times = []
    for k in iters:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            mod = model(Y)
            # its default start (PCA) refuses leading missing values: start from the balanced rows
            start = model(Y[~np.isnan(Y).any(axis=1)]).start_params if np.isnan(Y).any() else None
            t0 = time.perf_counter()
            mod.fit(start_params=start, maxiter=k, tolerance=0.0, disp=False)
            times.append(time.perf_counter() - t0)
    k1, k2 = iters
    return max((times[1] - times[0]) / (k2 - k1), times[1] / k2 / 10)


def _ours(frame, time_budget, want_iteration=True, finish="auto"):
    """(E-step s, EM iteration s, report s, fit dict) for our code on ``frame``; ``finish`` the
    fit's :attr:`panel.ModelSpec.finish`."""
    import panel
    from panel.kalman import paths
    from panel.model import mstep as ms
    from panel.model.problem import Problem
    from panel.model.start import starting_values

    pan = panel.Panel.from_frame(frame)
    spec = panel.ModelSpec(time_budget=time_budget, finish=finish)
    prob = Problem(pan, spec)
    p0 = starting_values(prob.Y, prob.rs)
    floor = ms.VAR_FLOOR * float(np.mean(np.diag(p0.H)))
    prob.estep(p0)                                   # warm-up (memoised basis), as inside a fit
    out = {"method": paths.choose(prob.Y, "auto", prob.s2)}
    out["estep_s"], _ = _best(lambda: prob.estep(p0), 3)
    if want_iteration:
        out["em_iter_s"], _ = _best(
            lambda: ms.mstep(prob.em_estep(p0), p0, prob.rs, floor, prob.sigma_prior, prob.h_prior),
            3)
    out["report_s"], _ = _best(lambda: paths.report(prob.Y, p0.Sigma, p0.H, prob.s2, prob.init,
                                                    Lambda=p0.Lambda), 1)
    t0 = time.perf_counter()
    res = panel.fit(pan, spec)
    out.update(fit_s=time.perf_counter() - t0, fit_esteps=int(res.n_iter),
               fit_loglik=float(res.loglik), fit_status=res.status, fit_message=res.message)
    return out


def run_task(task: dict) -> dict:
    """One benchmark row (run inside a worker process)."""
    import resource

    if task["kind"] == "ragged":
        return _ragged_task(task)
    N, T, pattern = task["N"], task["T"], task["pattern"]
    frame, Sigma, H = simulate(N, T, pattern)
    Y = frame.to_numpy()
    row = {"N": N, "T": T, "pattern": pattern}
    if task["kind"] == "compare":
        from panel.kalman import paths

        paths.estep(Y, Sigma, H, None, None, "auto")
        row["estep_true_s"], est = _best(lambda: paths.estep(Y, Sigma, H, None, None, "auto"), 5)
        _statsmodels_smoother(Y[:3, :2], Sigma[:2, :2], H[:2, :2])    # its one-time set-up
        row["sm_smoother_s"], res = _best(lambda: _statsmodels_smoother(Y, Sigma, H), 1)
        row["loglik"], row["sm_loglik"] = float(est.loglik), float(res.llf)
        row["loglik_rel_diff"] = abs(est.loglik - res.llf) / abs(res.llf)
        row["smoother_ratio"] = row["sm_smoother_s"] / row["estep_true_s"]
        try:
            row["dfmq_iter_s"] = _dfm_iteration(Y, tuple(task["dfm_iters"]))
        except (np.linalg.LinAlgError, ValueError) as exc:   # statsmodels' own failure: record it
            row["dfmq_iter_s"], row["dfmq_error"] = None, f"{type(exc).__name__}: {exc}"
        row.update(_ours(frame, task["time_budget"]))
        row["em_ratio"] = None if row["dfmq_iter_s"] is None else row["dfmq_iter_s"] / row["em_iter_s"]
    else:                                   # scale and ragged_fit rows: our fit alone
        row.update(_ours(frame, task["time_budget"], want_iteration=False))
        if task["kind"] == "ragged_fit" and fillable(Y).any():
            # the other finish on the same panel, in this process
            row["finish"] = "filled" if "gap-filled" in row["fit_message"] else "direct"
            row["alt_finish"] = "direct" if row["finish"] == "filled" else "filled"
            alt = _ours(frame, task["time_budget"], want_iteration=False, finish=row["alt_finish"])
            row.update({f"alt_{key}": alt[key] for key in
                        ("fit_s", "fit_esteps", "fit_loglik", "fit_status", "fit_message")})
    row["peak_rss_mb"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    return row


def _ragged_task(task: dict) -> list:
    """E-step rows of every pattern at one (N, T), timed in this one process."""
    import resource

    from panel.kalman import paths

    N, T = task["N"], task["T"]
    rows, base = [], None
    for pattern in ("balanced",) + RAGGED:
        frame, Sigma, H = simulate(N, T, pattern)
        Y = frame.to_numpy()
        plan = paths.Plan(Y)
        plan.estep(Sigma, H)                                   # warm-up (memoised bases)
        t, est = _best(lambda: plan.estep(Sigma, H), task.get("repeats", 3))
        base = t if pattern == "balanced" else base
        row = {"N": N, "T": T, "pattern": pattern, "method": plan.method, "estep_s": t,
               "vs_balanced": t / base, "missing_cells": int(np.isnan(Y).sum()),
               "sm_smoother_s": None, "smoother_ratio": None, "loglik_rel_diff": None}
        if SM_ARRAYS * 8 * T * N * N <= SM_MEMORY:
            _statsmodels_smoother(Y[:3, :2], Sigma[:2, :2], H[:2, :2])
            sm_t, res = _best(lambda: _statsmodels_smoother(Y, Sigma, H), 1)
            row.update(sm_smoother_s=sm_t, smoother_ratio=sm_t / t,
                       loglik_rel_diff=abs(est.loglik - res.llf) / abs(res.llf))
        rows.append(row)
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    for r in rows:
        r["worker_peak_rss_mb"] = rss
    return rows


def _spawn(task: dict, threads: int) -> dict:
    env = dict(os.environ)
    for var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
        env[var] = str(threads)
    proc = subprocess.run([sys.executable, "-m", "panel.bench.fit", "--worker", json.dumps(task)],
                          env=env, capture_output=True, text=True)
    if proc.returncode < 0:                 # killed by a signal: SIGKILL is the kernel's OOM killer
        return {**task, "error": f"worker killed by signal {-proc.returncode}"
                                 + (" (out of memory?)" if proc.returncode == -9 else "")}
    if proc.returncode != 0:
        return {**task, "error": proc.stderr.strip().splitlines()[-1] if proc.stderr else "failed"}
    return json.loads(proc.stdout.strip().splitlines()[-1])


def run(quick: bool = False, threads: int = 1, only=None) -> dict:
    """Run every row (each in a worker subprocess) and return the JSON-able results;
    ``only`` restricts to some of :data:`SECTIONS`."""
    cfg = QUICK if quick else FULL
    out = {"meta": {"quick": quick, "threads": threads, "python": sys.version.split()[0],
                    "numpy": np.__version__, "cpus": os.cpu_count(), "dfm_iters": cfg["dfm_iters"]}}
    for kind in SECTIONS:
        out[kind] = []
        if only and kind not in only:
            continue
        if kind == "ragged":
            for N, T in cfg[kind]:
                rows = _spawn({"kind": kind, "N": N, "T": T}, threads)
                out[kind].extend(rows if isinstance(rows, list) else [rows])
            continue
        for N, T, pattern in cfg[kind]:
            task = {"kind": kind, "N": N, "T": T, "pattern": pattern,
                    "dfm_iters": cfg["dfm_iters"], "time_budget": cfg["time_budget"]}
            out[kind].append(_spawn(task, threads))
    return out


def _head(r: dict) -> str:
    """A row's first columns: N, T and the pattern."""
    return f"{r['N']:>4} {r['T']:>5} {r['pattern']:<10}"


def format_table(res: dict) -> str:
    """Compact text table of :func:`run`'s results."""
    lines = [f"riskprem benchmark (BLAS threads={res['meta']['threads']}, "
             f"cpus={res['meta']['cpus']}); ratios are statsmodels time / ours, same process",
             "(a) E-step vs statsmodels smoother, identical model at the true parameters",
             f"{'N':>4} {'T':>5} {'pattern':<10} {'method':<8} {'ours_s':>9} {'sm_s':>9} "
             f"{'ratio':>8} {'loglik_rel':>10}"]
    for r in res["compare"]:
        if "error" in r:
            lines.append(f"{_head(r)} ERROR {r['error']}")
            continue
        lines.append(f"{_head(r)} {r['method']:<8} "
                     f"{r['estep_true_s']:>9.4f} {r['sm_smoother_s']:>9.3f} "
                     f"{r['smoother_ratio']:>8.0f} {r['loglik_rel_diff']:>10.1e}")
    k1, k2 = res["meta"].get("dfm_iters", (1, 21))
    lines += ["(b) one EM iteration vs DynamicFactorMQ(1 factor, AR(1) idiosyncratic), its time "
              f"averaged over its iterations {k1 + 1}-{k2} — different models, indicative",
              f"{'N':>4} {'T':>5} {'pattern':<10} {'ours_s':>9} {'dfmq_s':>9} {'ratio':>8}"]
    for r in res["compare"]:
        if "error" in r:
            continue
        if r["dfmq_iter_s"] is None:
            lines.append(f"{_head(r)} {r['em_iter_s']:>9.4f} "
                         f"  statsmodels failed: {r['dfmq_error'][:60]}")
        else:
            lines.append(f"{_head(r)} {r['em_iter_s']:>9.4f} "
                         f"{r['dfmq_iter_s']:>9.3f} {r['em_ratio']:>8.0f}")
    lines += ["(c) our full fit (panel.fit, default ModelSpec); scale rows and (e) ragged fits "
              "(ours alone, each in its own worker)",
              f"{'N':>4} {'T':>5} {'pattern':<10} {'estep_s':>9} {'report_s':>9} {'fit_s':>9} "
              f"{'E-steps':>8} {'status':<12} {'loglik':>14} {'peakRSS_MB':>10}"]
    fits = res["compare"] + res["scale"] + res.get("ragged_fit", [])
    for r in fits:
        if "error" in r:
            lines.append(f"{_head(r)} ERROR {r['error']}")
            continue
        lines.append(f"{_head(r)} {r['estep_s']:>9.4f} "
                     f"{r['report_s']:>9.3f} {r['fit_s']:>9.2f} {r['fit_esteps']:>8d} "
                     f"{r['fit_status']:<12} {r['fit_loglik']:>14.4f} {r['peak_rss_mb']:>10.0f}")
    counts = [r["fit_esteps"] for r in fits if "error" not in r]
    if counts:
        lines.append(f"median E-steps per fit over these {len(counts)} fits: {np.median(counts):.0f}")
    gaps = [r for r in res.get("ragged_fit", []) if "alt_fit_s" in r]
    if gaps:
        lines += ["(e') panels with gaps: the fit above (finish auto took the route in 'auto') and "
                  "the other route on the same panel, same worker; 'filled' = on the gap-filled "
                  "copy, 'direct' = on the panel itself",
                  f"{'N':>4} {'T':>5} {'pattern':<10} {'auto':<7} {'other':<7} {'other_s':>9} "
                  f"{'E-steps':>8} {'status':<12} {'direct/filled':>13} {'loglik filled-direct':>20}"]
        for r in gaps:
            split = re.search(r"(\d+) exact passes on the panel, (\d+) on its gap-filled copy",
                              r["fit_message"] if r["finish"] == "filled" else r.get("alt_fit_message", ""))
            t = {r["finish"]: r["fit_s"], r["alt_finish"]: r["alt_fit_s"]}
            ll = {r["finish"]: r["fit_loglik"], r["alt_finish"]: r["alt_fit_loglik"]}
            lines.append(f"{_head(r)} {r['finish']:<7} {r['alt_finish']:<7} {r['alt_fit_s']:>9.2f} "
                         f"{r['alt_fit_esteps']:>8d} {r['alt_fit_status']:<12} "
                         f"{t['direct'] / t['filled']:>13.1f} {ll['filled'] - ll['direct']:>20.1e}"
                         + (f"  (filled: {split[1]} exact passes + {split[2]} E-steps on the copy)"
                            if split else ""))
    if res.get("ragged"):
        lines += ["(d) ragged E-steps (auto path) vs our balanced E-step and statsmodels' smoother, "
                  "one process per N",
                  f"{'N':>4} {'T':>5} {'pattern':<10} {'method':<8} {'missing':>7} {'ours_s':>9} "
                  f"{'x_bal':>6} {'sm_s':>8} {'sm/ours':>8} {'loglik_rel':>10} {'RSS_MB':>7}"]
        for r in res["ragged"]:
            if "error" in r:
                lines.append(f"{r['N']:>4} {r['T']:>5} ragged ERROR {r['error']}")
                continue
            sm = ("   (statsmodels skipped: memory)" if r["sm_smoother_s"] is None else
                  f"{r['sm_smoother_s']:>8.2f} {r['smoother_ratio']:>8.0f} "
                  f"{r['loglik_rel_diff']:>10.1e}")
            lines.append(f"{_head(r)} {r['method']:<8} "
                         f"{r['missing_cells']:>7d} {r['estep_s']:>9.4f} {r['vs_balanced']:>6.1f} "
                         f"{sm} {r['worker_peak_rss_mb']:>7.0f}")
    return "\n".join(lines)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(prog="python -m panel.bench", description=__doc__.splitlines()[0])
    ap.add_argument("--json", metavar="PATH", help="also write the results as JSON")
    ap.add_argument("--quick", action="store_true", help="small sizes (smoke test)")
    ap.add_argument("--threads", type=int, default=1, help="BLAS threads in the workers")
    ap.add_argument("--only", action="append", choices=SECTIONS,
                    help="run only this section (repeatable)")
    ap.add_argument("--worker", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.worker:
        print(json.dumps(run_task(json.loads(args.worker))))
        return 0
    res = run(quick=args.quick, threads=args.threads, only=args.only)
    print(format_table(res))
    if args.json:
        with open(args.json, "w") as fh:
            json.dump(res, fh, indent=1)
    return 0


if __name__ == "__main__":
    sys.exit(main())
