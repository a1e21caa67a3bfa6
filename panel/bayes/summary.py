"""Posterior summaries of premia and factors: the Kalman filter and smoother run at kept parameter
draws, mixed over the draws (Rao-Blackwellised: each draw contributes its exact Gaussian, not a
single path).

At each of M parameter draws the E-step's report (:meth:`panel.kalman.paths.Plan.report`) gives the
filtered, smoothed and predicted means ``m_j`` and variances ``v_j`` per asset and date.  The
posterior is the equal-weight mixture: mean ``avg m_j``, variance ``avg v_j + var(m_j)`` (law of
total variance), quantiles by root-finding on ``avg Phi((x - m_j) / sqrt(v_j))``, and
``P(mu > 0) = avg Phi(m_j / sqrt(v_j))``.
"""

from __future__ import annotations

import numpy as np
from scipy import special

from panel.kalman.paths import Plan
from panel.model.params import Params

QUANTILES = (0.05, 0.95)
_CHUNK = 20000            # cells per quantile solve: bounds the (M, cells) work arrays
_TINY = 1e-300


def mixture_quantile(means: np.ndarray, sds: np.ndarray, p: float, tol: float = 1e-9) -> np.ndarray:
    """p-quantile of equal-weight normal mixtures: ``means``, ``sds`` (M, ...) -> (...).

    Safeguarded Newton on ``F(x) = avg Phi((x - m_j) / s_j) - p`` inside the bracket
    ``[min_j, max_j]`` of the components' own p-quantiles (which always holds the root); a step
    that leaves the bracket bisects.  Cells stop once a step is below ``tol`` times the mixture's
    sd; components with zero sd are point masses.
    """
    M = means.shape[0]
    shape = means.shape[1:]
    m = means.reshape(M, -1)
    s = np.maximum(sds.reshape(M, -1), _TINY)
    zp = special.ndtri(p)
    comp = m + zp * s
    lo, hi = comp.min(axis=0), comp.max(axis=0)
    sd = np.sqrt((s ** 2).mean(axis=0) + m.var(axis=0))
    x = np.clip(m.mean(axis=0) + zp * sd, lo, hi)
    todo = np.flatnonzero(hi > lo)
    for _ in range(100):
        if todo.size == 0:
            break
        for a in range(0, todo.size, _CHUNK):
            cells = todo[a:a + _CHUNK]
            mm, ss, xc = m[:, cells], s[:, cells], x[cells]
            z = np.clip((xc - mm) / ss, -40.0, 40.0)
            F = special.ndtr(z).mean(axis=0) - p
            dens = (np.exp(-0.5 * z * z) / ss).mean(axis=0) / np.sqrt(2 * np.pi)
            lo[cells] = np.where(F < 0, xc, lo[cells])
            hi[cells] = np.where(F > 0, xc, hi[cells])
            with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
                new = xc - F / dens
            bad = ~np.isfinite(new) | (new <= lo[cells]) | (new >= hi[cells])
            new = np.where(bad, 0.5 * (lo[cells] + hi[cells]), new)
            x[cells] = new
            done = (np.abs(new - xc) <= tol * sd[cells]) | (F == 0)
            todo[a:a + _CHUNK] = np.where(done, -1, cells)
        todo = todo[todo >= 0]
    return x.reshape(shape)


def mix(means: np.ndarray, variances: np.ndarray, quantiles=QUANTILES) -> dict:
    """Summary of equal-weight normal mixtures over axis 0: mean, std, quantiles ``q05``/``q95``
    and ``prob_positive``; NaN cells (inactive assets) stay NaN."""
    nan = np.isnan(means[0])
    m = np.where(nan, 0.0, means)
    v = np.maximum(np.where(nan, 1.0, variances), 0.0)
    sd = np.sqrt(v)
    mean = m.mean(axis=0)
    var = v.mean(axis=0) + m.var(axis=0)
    with np.errstate(divide="ignore", invalid="ignore"):
        z = np.where(sd > 0, m / np.where(sd > 0, sd, 1.0), np.where(m > 0, np.inf, -np.inf))
    out = {"mean": mean, "std": np.sqrt(var), "prob_positive": special.ndtr(z).mean(axis=0)}
    for p in quantiles:
        out[f"q{round(100 * p):02d}"] = mixture_quantile(m, sd, p)
    return {key: np.where(nan, np.nan, val) for key, val in out.items()}


def reports(plan: Plan, draws: list[Params], k: int):
    """Per-draw report arrays stacked over draws: dict of (M, T, N) / (M, T, k) arrays."""
    keys = ("filtered_mean", "filtered_var", "smoothed_mean", "smoothed_var", "predicted_mean",
            "predicted_var", "factor_filtered_mean", "factor_filtered_var",
            "factor_smoothed_mean", "factor_smoothed_var")
    stacks = {key: [] for key in keys}
    h_diag = []
    for p in draws:
        rep = plan.report(p.Sigma, p.H, Lambda=p.Lambda if k else None)
        for key in keys:
            stacks[key].append(getattr(rep, key))
        h_diag.append(np.diag(p.H))
    out = {key: np.array(val) for key, val in stacks.items()}
    out["h_diag"] = np.array(h_diag)
    return out


def premium_summary(plan: Plan, draws: list[Params], k: int) -> dict:
    """Filtered, smoothed and predictive mixtures at the parameter ``draws``.

    Returns dict with ``filtered``/``smoothed`` (each :func:`mix` of (T, N)), ``factor_filtered``/
    ``factor_smoothed`` ((T, k)), ``predictive_mean``/``predictive_std`` (T, N) of the return
    forecast made at t-1 (premium plus return shock ``s_t^2 H_ii``), and ``std_innovation``.
    """
    rep = reports(plan, draws, k)
    out = {"filtered": mix(rep["filtered_mean"], rep["filtered_var"]),
           "smoothed": mix(rep["smoothed_mean"], rep["smoothed_var"]),
           "factor_filtered": mix(rep["factor_filtered_mean"], rep["factor_filtered_var"]),
           "factor_smoothed": mix(rep["factor_smoothed_mean"], rep["factor_smoothed_var"])}
    pm, pv = rep["predicted_mean"], rep["predicted_var"]
    shock = plan.s2[None, :, None] * rep["h_diag"][:, None, :]
    pred_mean = pm.mean(axis=0)
    pred_var = (pv + shock).mean(axis=0) + pm.var(axis=0)
    out["predictive_mean"] = pred_mean
    out["predictive_std"] = np.sqrt(pred_var)
    with np.errstate(invalid="ignore"):
        out["std_innovation"] = (plan.Y - pred_mean) / out["predictive_std"]
    return out


def pairwise_at(plan: Plan, draws: list[Params], t: int, kind: str):
    """(P(mu > 0) (N,), P(mu_i > mu_j) (N, N)) at date index ``t`` from the mixture of the
    draws' joint ``kind`` ("filtered" | "smoothed") distributions; NaN for inactive assets."""
    out = cross_section_mixture(plan, draws, t, kind)
    return out[2], out[3]


def cross_section_mixture(plan: Plan, draws: list[Params], t: int, kind: str):
    """(mean (N,), cov (N, N), P(mu > 0) (N,), P(mu_i > mu_j) (N, N), 5% and 95% quantiles (N,),
    (N,)) at date index ``t``: the mixture of the draws' joint ``kind`` distributions (moments by
    the law of total variance); NaN for inactive assets."""
    pos, greater, means, covs = [], [], [], []
    for p in draws:
        rep = plan.report(p.Sigma, p.H, cov_at=(t,), only_cov=True)
        mean = getattr(rep, f"{kind}_mean")[t]
        cov = rep.covariances[t][kind]
        d = np.diag(cov)
        pos.append(special.ndtr(mean / np.sqrt(d)))
        diff = mean[:, None] - mean[None, :]
        var = np.maximum(d[:, None] + d[None, :] - 2.0 * cov, 0.0)
        with np.errstate(divide="ignore", invalid="ignore"):
            z = np.where(var > 0, diff / np.sqrt(var), np.sign(diff) * np.inf)
        greater.append(special.ndtr(z))
        means.append(mean)
        covs.append(cov)
    M = np.array(means)
    centred = M - M.mean(axis=0)
    cov = np.mean(covs, axis=0) + centred.T @ centred / len(draws)
    G = np.mean(greater, axis=0)
    np.fill_diagonal(G, np.nan)
    sds = np.sqrt(np.maximum(np.array([np.diag(c) for c in covs]), 0.0))
    live = ~np.isnan(M[0])
    q = np.full((2, M.shape[1]), np.nan)
    for row, p in enumerate(QUANTILES):
        q[row, live] = mixture_quantile(M[:, live], sds[:, live], p)
    return M.mean(axis=0), cov, np.mean(pos, axis=0), G, q[0], q[1]
