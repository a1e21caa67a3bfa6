"""Benchmark of the Gibbs sampler against the ML fit of the same panel, in the same process:
``python -m panel.bench.bayes [--quick] [--threads N]``.

Panel: ``panel.bench.fit.simulate`` (invented, balanced, monthly; N=100, T=600 by default, with one
premium factor and one return factor).  Timed: the ML fit ``panel.model.fit.fit`` (default
settings, one factor, factor H) and ``panel.bayes.sample`` with 4 chains of 250 warm-up and 500
kept sweeps.  Printed: seconds per E-step and per sweep, the cost of 2,000 sweeps against the ML
fit (target: within 15x), the summary and diagnostics stages, and min ESS and max R-hat with ESS
per second of sampling.  Then (b): the panel with 2% gaps sampled both ways (gap cells drawn, the
default, or integrated out), per-sweep cost against the balanced sweep and ESS per second.
Timing never fails anything.
"""

from __future__ import annotations

import argparse
import os

FULL = {"N": 100, "T": 600, "chains": 4, "warmup": 250, "draws": 500, "n_summary": 100,
        "gap_warmup": 50, "gap_draws": 150}
QUICK = {"N": 10, "T": 120, "chains": 2, "warmup": 50, "draws": 100, "n_summary": 20,
         "gap_warmup": 20, "gap_draws": 40}
TARGET = 15.0


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(prog="python -m panel.bench.bayes", description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="small panel, short chains")
    parser.add_argument("--threads", type=int, default=1, help="BLAS threads (default 1)")
    args = parser.parse_args(argv)
    # numpy may already be loaded (by an importer of this module) before this line, so the limit goes
    # through riskprem's own threadpoolctl limit around fit and sample
    # (panel.threads); the variables still reach worker processes.
    os.environ["RISKPREM_BLAS_THREADS"] = str(args.threads)
    for var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
        os.environ[var] = str(args.threads)
    import time

    import numpy as np

    from panel.bayes import sample
    from panel.bench.fit import simulate
    from panel.model.fit import fit
    from panel.model.spec import ModelSpec

    cfg = QUICK if args.quick else FULL
    frame, _, _ = simulate(cfg["N"], cfg["T"], "balanced")
    spec = ModelSpec(premium_factors=1, return_shocks="factor")
    fit(frame.iloc[:60, :5], ModelSpec(premium_factors=1, max_iter=5))      # warm imports
    sample(frame.iloc[:60, :5], k=1, draws=5, chains=2, warmup=5, n_summary=2)

    t0 = time.perf_counter()
    ml = fit(frame, spec)
    t_ml = time.perf_counter() - t0
    t0 = time.perf_counter()
    res = sample(frame, k=1, structure="factor", draws=cfg["draws"], chains=cfg["chains"],
                 warmup=cfg["warmup"], seed=0, n_summary=cfg["n_summary"])
    t_total = time.perf_counter() - t0
    sweeps = cfg["chains"] * (cfg["warmup"] + cfg["draws"])
    per_sweep = res.timings["sampling"] / sweeps
    per_estep = t_ml / ml.n_iter
    p = res.parameters
    ess = np.minimum(p["ess_bulk"], p["ess_tail"])
    print(f"panel: balanced N={cfg['N']} T={cfg['T']} (invented, panel.bench.fit.simulate), "
          f"k=1, factor H r=1, BLAS threads {args.threads}")
    print(f"ML fit: {t_ml:.2f} s, {ml.n_iter} E-steps ({per_estep * 1e3:.2f} ms each), "
          f"status {ml.status}")
    print(f"Gibbs: {sweeps} sweeps ({cfg['chains']} chains x {cfg['warmup']} warm-up + "
          f"{cfg['draws']} kept) in {res.timings['sampling']:.2f} s: {per_sweep * 1e3:.2f} ms a "
          f"sweep = {per_sweep / per_estep:.1f} E-steps; path route {res.settings['path_route']}")
    t2000 = 2000 * per_sweep
    verdict = "within" if t2000 / t_ml <= TARGET else "OVER"
    print(f"2,000 draws: {t2000:.2f} s = {t2000 / t_ml:.1f}x the ML fit ({verdict} the "
          f"{TARGET:.0f}x target)")
    print(f"summaries ({res.settings['n_summary']} filter/smoother runs, mixture quantiles): "
          f"{res.timings['summary']:.2f} s; R-hat/ESS (ArviZ, {len(p)} quantities): "
          f"{res.timings['diagnostics']:.2f} s; whole run {t_total:.2f} s = "
          f"{t_total / t_ml:.1f}x the ML fit")
    worst = p.loc[p["rhat"].idxmax()]
    print(f"max split R-hat {p['rhat'].max():.3f} ({worst['name']} {worst['row']}); min ESS "
          f"{ess.min():.0f} -> {ess.min() / res.timings['sampling']:.1f} ESS/s; median ESS "
          f"{ess.median():.0f} -> {ess.median() / res.timings['sampling']:.1f} ESS/s; status "
          f"{res.status}")
    _gap_panel(cfg, per_sweep)
    return 0


def _gap_panel(cfg, balanced_sweep):
    """(b) The same model on the panel with 2% of its returns missing at random: the sampler that
    draws the gaps (default) against the one that integrates them out, same sweeps and seed."""
    import numpy as np

    from panel.bayes import sample
    from panel.bench.fit import simulate

    frame, _, _ = simulate(cfg["N"], cfg["T"], "gaps_2")
    chains, warmup, draws = 2, cfg["gap_warmup"], cfg["gap_draws"]
    print(f"\n(b) 2% gaps (panel.bench.fit.simulate 'gaps_2'), {chains} chains x {warmup} warm-up + "
          f"{draws} kept, seed 0, each way:")
    for augment in (True, False):
        res = sample(frame, k=1, structure="factor", draws=draws, chains=chains, warmup=warmup,
                     seed=0, n_summary=5, augment_gaps=augment)
        per = res.timings["sampling"] / (chains * (warmup + draws))
        p = res.parameters
        ess = np.minimum(p["ess_bulk"], p["ess_tail"])
        name = "drawn (augment_gaps)" if augment else "integrated out"
        print(f"  gaps {name:21s}: {per * 1e3:8.2f} ms a sweep = {per / balanced_sweep:6.1f}x the "
              f"balanced sweep; {res.settings['gap_cells']} gap cells drawn; route "
              f"{res.settings['path_route']}; median ESS {ess.median():.0f} -> "
              f"{ess.median() / res.timings['sampling']:.1f} ESS/s, min {ess.min():.0f}; "
              f"max R-hat {p['rhat'].max():.3f}")


if __name__ == "__main__":
    raise SystemExit(main())
