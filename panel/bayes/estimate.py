"""A Bayesian run as a :class:`panel.model.result.PanelFit`: ``panel.fit(data, ModelSpec(
estimation="bayes", ...))`` lands here, so the store, the CLI, cross-sections, plots, the report and
backfill take a Bayesian run like any other.

The spec maps onto :func:`panel.bayes.sample` through the fit's :class:`panel.model.problem.Problem`
(fixed volatilities in the spec's own premium-volatility convention, the cap, the volatility scale,
the initial premium).  The PanelFit holds:

- ``params``: the posterior means of ``Lambda`` (identified rotation), ``q``, ``B``, ``psi`` or
  ``H``; ``loglik`` (and AIC/BIC) at those parameters;
- ``status`` "mixed" | "not mixed" (``converged`` = mixed), ``n_iter`` the sweeps of all chains;
- ``estimates`` and ``factors`` with ``filtered_q05/q95`` and ``smoothed_q05/q95`` (posterior
  mixtures over ``spec.summary_draws`` parameter draws);
- ``parameters``: ``value`` at the posterior-mean parameters (so a stored run's parameters rebuild
  ``params`` exactly), ``std_error`` the posterior std, and ``q05, q50, q95, rhat, ess_bulk,
  ess_tail`` of each monitored quantity (NaN for the rest: off-diagonal covariances);
- ``posterior``: the :class:`panel.bayes.BayesResult` (draws, InferenceData, ``prob_greater``).
"""

from __future__ import annotations

import time

import numpy as np
import pandas as pd

from panel.bayes.priors import Priors
from panel.bayes.run import sample
from panel.model import inference
from panel.model.params import Params, count_free
from panel.model.problem import Problem
from panel.model.result import PanelFit

#: Posterior columns of a Bayesian run's ``parameters`` table, after the PanelFit columns.
POSTERIOR_COLUMNS = ("q05", "q50", "q95", "rhat", "ess_bulk", "ess_tail")


def sampler_seed(seed: int, last_date) -> int:
    """The sampler's root seed for spec seed ``seed`` and data ending at ``last_date``: each vintage
    of a backfill draws its own stream, and a rebuild of the same vintage the same one."""
    day = pd.Timestamp(last_date).toordinal()
    return int(np.random.SeedSequence([int(seed), day]).generate_state(1, dtype=np.uint32)[0])


def fit_bayes(prob: Problem, start: Params | None = None, progress=None) -> PanelFit:
    """Sample the posterior of ``prob`` (a fit's Problem with ``spec.estimation == "bayes"``)."""
    t0 = time.perf_counter()
    spec, rs, panel = prob.spec, prob.rs, prob.panel
    seed = sampler_seed(spec.seed, panel.dates[-1])
    done = [0]

    def tick(n):
        done[0] += n
        progress(done[0], None)

    res = sample(panel, ppy=rs.ppy, k=rs.k, structure=rs.structure, r=spec.return_factors,
                 priors=Priors.from_dict(spec.prior_settings()), draws=spec.draws,
                 chains=spec.chains, seed=seed, warmup=spec.warmup,
                 fixed_q=None if rs.fixed_q is None else np.array(rs.fixed_q),
                 fixed_psi=None if rs.fixed_psi is None else np.array(rs.fixed_psi),
                 max_sigma_diag=rs.max_sigma_diag,
                 scale2=None if spec.vol_scale is None else prob.s2, init=prob.init, start=start,
                 method=spec.method, n_summary=spec.summary_draws, augment_gaps=spec.augment_gaps,
                 progress=None if progress is None else tick)
    p = posterior_mean_params(res)
    loglik = float(prob.estep(p).loglik)
    sweeps = spec.chains * (spec.draws + res.settings["warmup"])
    gaps = res.settings["gap_cells"]
    message = (f"{res.message}; {spec.chains} chains x {spec.draws} draws after "
               f"{res.settings['warmup']} warm-up, sampler seed {seed} (from seed {spec.seed} and "
               f"{panel.dates[-1].date()})" + (f"; {gaps} gap cells drawn by the sampler" if gaps else ""))
    return PanelFit(panel=panel, spec=spec, start=start, params=p, k=rs.k, structure=rs.structure,
                    periods_per_year=rs.ppy, loglik=loglik, objective=loglik,
                    n_params=count_free(rs, p.n_assets), n_obs=prob.n_obs, n_iter=int(sweeps),
                    converged=res.status == "mixed", status=res.status, message=message,
                    elapsed=time.perf_counter() - t0, estimates=res.estimates, factors=res.factors,
                    parameters=parameter_table(res, p),
                    trace=pd.DataFrame({"iteration": [sweeps], "objective": [loglik],
                                        "loglik": [loglik], "elapsed_s": [res.elapsed],
                                        "step": ["gibbs"]}),
                    diagnostics=_diagnostics(prob, res), posterior=res)


def posterior_mean_params(res) -> Params:
    """Posterior means of the primitive parameters as :class:`Params`."""
    mean = {key: np.asarray(val).mean(axis=(0, 1)) for key, val in res.draws.items()}
    if res.structure == "full":
        return Params.build(mean["Lambda"], mean["q"], "full", H=mean["H"])
    return Params.build(mean["Lambda"], mean["q"], res.structure,
                        B=mean["B"] if res.structure == "factor" else None, psi=mean["psi"])


def parameter_table(res, p: Params) -> pd.DataFrame:
    """PanelFit's parameter rows at ``p`` with the posterior columns of the monitored quantities."""
    rows = inference.parameter_rows(list(res.assets), res.k, res.r, res.structure)
    table = pd.DataFrame(rows, columns=["name", "row", "col"])
    table["value"] = inference.parameter_vector(p, res.structure)
    post = res.parameters.rename(columns={"std": "std_error"})
    post = post[["name", "row", "col", "std_error", *POSTERIOR_COLUMNS]]
    return table.merge(post, on=["name", "row", "col"], how="left", validate="one_to_one")


def _diagnostics(prob: Problem, res) -> pd.DataFrame:
    """Ljung-Box per asset on the standardized innovations of the posterior predictive."""
    z = res.estimates.pivot(index="date", columns="asset", values="std_innovation")
    z = z.reindex(index=prob.panel.dates, columns=list(prob.panel.assets))
    rows = [(a, "ljung_box", *_lb(z[a].to_numpy(dtype=float))) for a in prob.panel.assets]
    return pd.DataFrame(rows, columns=["asset", "statistic", "lags", "value", "pvalue"])


def _lb(z):
    q, lags, pv = inference.ljung_box(z)
    return lags, q, pv


def draws_from_rows(rows: pd.DataFrame, assets, structure: str) -> list[Params]:
    """The Params of each stored summary draw (:meth:`panel.bayes.BayesResult.draw_rows`) for the
    assets ``assets`` (their stored order)."""
    index = pd.Index(list(assets))
    N = len(index)
    out = []
    for _, frame in rows.sort_values("draw", kind="stable").groupby("draw", sort=True):
        groups = {name: g for name, g in frame.groupby("name", sort=False)}

        def vector(name):
            g = groups[name]
            v = np.zeros(N)
            v[index.get_indexer(g["row"])] = g["value"].to_numpy(dtype=float)
            return v

        def matrix(name, prefix):
            g = groups.get(name)
            if g is None:
                return np.zeros((N, 0))
            cols = np.array([int(str(c)[len(prefix):]) - 1 for c in g["col"]])
            m = np.zeros((N, cols.max() + 1))
            m[index.get_indexer(g["row"]), cols] = g["value"].to_numpy(dtype=float)
            return m

        lam, q = matrix("loading", "f"), vector("idio_premium_var")
        if structure == "full":
            g = groups["return_cov"]
            H = np.zeros((N, N))
            i, j = index.get_indexer(g["row"]), index.get_indexer(g["col"])
            H[i, j] = H[j, i] = g["value"].to_numpy(dtype=float)
            out.append(Params.build(lam, q, "full", H=H))
        else:
            B = matrix("return_loading", "g") if structure == "factor" else None
            out.append(Params.build(lam, q, structure, B=B, psi=vector("return_idio_var")))
    return out
