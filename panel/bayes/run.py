"""``sample(data, ...) -> BayesResult``: the Bayesian estimator (pure: no I/O, no printing).

Chains run one after another in this process, each from its own ``SeedSequence(seed).spawn``
child, so a run is bit-identical for the same data and settings.  After sampling, the filter and
smoother run at ``n_summary`` kept parameter draws spread evenly over all chains
(:mod:`panel.bayes.summary`), and ArviZ computes R-hat and ESS (:mod:`panel.bayes.diagnostics`).
"""

from __future__ import annotations

import math
import time

import numpy as np
import pandas as pd

from panel.bayes import diagnostics as dg
from panel.bayes import summary as sm
from panel.bayes.priors import Priors
from panel.bayes.result import BayesResult, draw_params
from panel.bayes.sampler import Gibbs, resolved_model, run_chain
from panel.data import Panel
from panel.kalman.paths import Plan
from panel.model.params import Params
from panel.model.spec import ModelSpec, SpecError
from panel.threads import blas_limited


def _data(data, ppy):
    """(Y (T, N), dates, assets, ppy) from a Panel, a dates x assets DataFrame or an array."""
    if isinstance(data, pd.DataFrame):
        data = Panel.from_frame(data)
    if isinstance(data, Panel):
        return (data.values.to_numpy(dtype=float), data.dates, tuple(data.assets),
                int(ppy or data.periods_per_year))
    Y = np.asarray(data, dtype=float)
    if Y.ndim == 1:
        Y = Y[:, None]
    if ppy is None:
        raise SpecError("an array panel needs ppy (periods per year); pass ppy=12 for monthly data")
    return Y, pd.RangeIndex(Y.shape[0], name="date"), tuple(f"A{i}" for i in range(Y.shape[1])), int(ppy)


def _per_asset(value, N, name, positive=False):
    """(N,) per-period variances with NaN = free, from None, a scalar or a sequence."""
    if value is None:
        return None
    arr = np.broadcast_to(np.asarray(value, dtype=float), (N,)).copy() if np.ndim(value) == 0 \
        else np.asarray(value, dtype=float)
    if arr.shape != (N,):
        raise SpecError(f"{name} needs one value per asset ({N}), got shape {arr.shape}")
    given = arr[~np.isnan(arr)]
    if np.any(~np.isfinite(given)) or np.any(given < 0) or (positive and np.any(given <= 0)):
        bound = "positive" if positive else "non-negative"
        raise SpecError(f"{name} must be {bound} per-period variances (NaN = free)")
    return arr


def _check_counts(draws, chains, warmup, n_summary):
    for name, value, low in (("draws", draws, 1), ("chains", chains, 1), ("warmup", warmup, 0),
                             ("n_summary", n_summary, 1)):
        if not isinstance(value, (int, np.integer)) or value < low:
            raise SpecError(f"{name} must be an integer >= {low}, got {value!r}")


@blas_limited
def sample(data, *, ppy: int | None = None, k: int | None = None, structure: str | None = None,
           r: int = 1, priors: Priors | None = None, draws: int = 1000, chains: int = 4,
           seed: int = 0, warmup: int | None = None, fixed_q=None, fixed_psi=None,
           max_sigma_diag: float | None = None, scale2=None, init=None,
           start: Params | None = None, method: str = "auto", n_summary: int = 100,
           augment_gaps: bool = True, progress=None) -> BayesResult:
    """Sample the posterior of the premium panel by Gibbs (DESIGN §3a).

    Parameters
    ----------
    data : Panel, dates x assets DataFrame, or (T, N) array (then ``ppy`` is required);
        decimal excess returns per period, NaN missing.
    ppy : periods per year (None: the panel's).
    k, structure, r : premium factors, return-shock structure ("diagonal" | "factor" | "full"),
        return factors — defaults and checks of :class:`panel.model.spec.ModelSpec`.
    priors : :class:`panel.bayes.priors.Priors` (None: the documented defaults).
    draws, chains, warmup : kept draws per chain, chains, discarded sweeps per chain (None: =
        draws).
    seed : root of every chain's random stream.
    fixed_q, fixed_psi : per-period own premium / return-shock variances held fixed (scalar or
        (N,), NaN = free); ``fixed_q`` may be 0 (a constant own premium), ``fixed_psi`` must be
        positive and is not available with a full H.
    max_sigma_diag : cap on each ``Sigma_ii = Lambda_i Lambda_i' + q_i`` (per period).
    scale2 : (T,) squared volatility scale ``s_t^2``; init : ``(m0, v0)`` per-period informative
        prior of each premium at its first observation (None: exact diffuse start).
    start : Params to start every chain from (dispersed per chain); None: the ML fit's moment rule.
    method : E-step path for the mean-correction draws and the summaries (``paths.METHODS``).
    n_summary : parameter draws at which the filter and smoother are run for the summaries.
    augment_gaps : draw the panel's gaps (returns missing inside an asset's history, or not yet
        published at its last one to three dates) as part of the chain, so that each sweep runs
        on a panel without them (:mod:`panel.bayes.sampler`, step 5): the same posterior, each
        sweep as cheap as on a balanced panel.  False: every sweep integrates them out on the
        panel's exact path (dense at the gap dates).
    progress : optional ``callable(n)`` called with 1 after every sweep.
    """
    t0 = time.perf_counter()
    Y, dates, assets, ppy = _data(data, ppy)
    T, N = Y.shape
    if T == 0 or N == 0:
        raise SpecError("the panel is empty")
    never = np.isnan(Y).all(axis=0)
    if never.any():
        raise SpecError(f"assets with no observation: {', '.join(np.array(assets)[never])}; drop them")
    warmup = draws if warmup is None else warmup
    _check_counts(draws, chains, warmup, n_summary)
    rs0 = ModelSpec(premium_factors=k, return_shocks=structure, return_factors=r,
                    periods_per_year=ppy).resolve(N, ppy, T, assets)
    fq = _per_asset(fixed_q, N, "fixed_q")
    fp = _per_asset(fixed_psi, N, "fixed_psi", positive=True)
    if fp is not None and rs0.structure == "full":
        raise SpecError("fixed_psi needs structure 'diagonal' or 'factor' (a full H has no psi)")
    if max_sigma_diag is not None:
        if not (math.isfinite(max_sigma_diag) and max_sigma_diag > 0):
            raise SpecError(f"max_sigma_diag must be a positive per-period variance, got {max_sigma_diag}")
        if fq is not None and np.nanmax(np.append(fq, 0.0)) > max_sigma_diag:
            raise SpecError("a fixed_q exceeds max_sigma_diag; lower one of them")
    s2 = np.ones(T) if scale2 is None else np.asarray(scale2, dtype=float)
    if s2.shape != (T,) or not np.all(s2 > 0):
        raise SpecError(f"scale2 needs one positive value per date ({T})")
    if init is not None and not (len(init) == 2 and init[1] > 0):
        raise SpecError("init must be (mean, variance) per period with a positive variance")
    rs = resolved_model(rs0.k, rs0.structure, rs0.r, ppy, fq, fp, max_sigma_diag)
    priors = priors or Priors()
    prior = priors.resolve(Y, ppy, rs.structure)
    gibbs = Gibbs(Y, s2, init, rs, prior, method, augment=bool(augment_gaps))

    t_sample = time.perf_counter()
    children = np.random.SeedSequence(seed).spawn(chains)
    per_chain = [run_chain(gibbs, ss, draws, warmup, start, progress).arrays for ss in children]
    all_draws = {key: np.stack([c[key] for c in per_chain]) for key in per_chain[0]}
    t_summary = time.perf_counter()

    M = min(n_summary, chains * draws)
    flat = np.unique(np.linspace(0, chains * draws - 1, M).round().astype(int))
    picks = np.column_stack(divmod(flat, draws))
    plan = Plan(Y, s2, init, method)
    summ = sm.premium_summary(plan, [draw_params(all_draws, rs.structure, c, j) for c, j in picks],
                               rs.k)
    t_diag = time.perf_counter()

    parameters = dg.parameter_table(all_draws, assets, rs.k, rs.r, rs.structure, ppy)
    status, message = dg.mixing_status(parameters)
    t_end = time.perf_counter()
    settings = {"draws": draws, "chains": chains, "warmup": warmup, "seed": seed,
                "n_summary": int(len(picks)), "fixed_q": _json_list(fq), "fixed_psi": _json_list(fp),
                "max_sigma_diag": max_sigma_diag, "method": method, "path_route": gibbs.paths.route,
                "augment_gaps": bool(augment_gaps), "gap_cells": int(gibbs.gap_at[0].size),
                "summary_method": plan.method, "init": None if init is None else list(map(float, init)),
                "scale2_given": scale2 is not None}
    return BayesResult(
        assets=assets, dates=dates, periods_per_year=ppy, k=rs.k, r=rs.r, structure=rs.structure,
        priors=priors.to_dict(), priors_resolved=prior.to_dict(), settings=settings, status=status,
        message=message, elapsed=t_end - t0,
        timings={"setup": t_sample - t0, "sampling": t_summary - t_sample,
                 "summary": t_diag - t_summary, "diagnostics": t_end - t_diag},
        draws=all_draws, estimates=_estimates(summ, dates, assets),
        factors=_factors(summ, dates, rs.k), parameters=parameters,
        prob_positive_filtered=summ["filtered"]["prob_positive"],
        prob_positive_smoothed=summ["smoothed"]["prob_positive"], summary_draws=picks, Y=Y,
        scale2=s2, init=init)


def _json_list(arr):
    return None if arr is None else [None if np.isnan(v) else float(v) for v in arr]


def _estimates(summ, dates, assets) -> pd.DataFrame:
    flt, smo = summ["filtered"], summ["smoothed"]
    ti, ai = np.nonzero(~np.isnan(flt["mean"]))
    cols = {"date": dates[ti], "asset": np.array(assets, dtype=object)[ai],
            "filtered_mean": flt["mean"][ti, ai], "filtered_std": flt["std"][ti, ai],
            "smoothed_mean": smo["mean"][ti, ai], "smoothed_std": smo["std"][ti, ai],
            "predictive_mean": summ["predictive_mean"][ti, ai],
            "predictive_std": summ["predictive_std"][ti, ai],
            "std_innovation": summ["std_innovation"][ti, ai],
            "filtered_q05": flt["q05"][ti, ai], "filtered_q95": flt["q95"][ti, ai],
            "smoothed_q05": smo["q05"][ti, ai], "smoothed_q95": smo["q95"][ti, ai]}
    return pd.DataFrame(cols)


def _factors(summ, dates, k) -> pd.DataFrame:
    columns = ["date", "factor", "filtered_mean", "filtered_std", "smoothed_mean", "smoothed_std",
               "filtered_q05", "filtered_q95", "smoothed_q05", "smoothed_q95"]
    flt, smo = summ["factor_filtered"], summ["factor_smoothed"]
    frames = [pd.DataFrame({"date": dates, "factor": j + 1,
                            "filtered_mean": flt["mean"][:, j], "filtered_std": flt["std"][:, j],
                            "smoothed_mean": smo["mean"][:, j], "smoothed_std": smo["std"][:, j],
                            "filtered_q05": flt["q05"][:, j], "filtered_q95": flt["q95"][:, j],
                            "smoothed_q05": smo["q05"][:, j], "smoothed_q95": smo["q95"][:, j]})
              for j in range(k)]
    return pd.concat(frames, ignore_index=True) if frames else pd.DataFrame(columns=columns)
