"""The estimator: ``fit(panel, spec) -> PanelFit`` and ``evaluate(panel, params, spec)``.

Pandas in, immutable result out; no printing, no I/O.
"""

from __future__ import annotations

import time

import numpy as np
import pandas as pd

from panel.model import inference, mstep as ms, surrogate
from panel.model.em import run_em
from panel.model.params import Params, count_free
from panel.model.problem import Problem, as_panel
from panel.model.result import PanelFit
from panel.model.spec import ModelSpec, SpecError
from panel.model.start import perturbed_start, starting_values
from panel.threads import blas_limited

#: Free parameters above which ``std_errors="auto"`` skips the observed information.
AUTO_SE_LIMIT = 150
#: Multi-start fits whose objectives differ by less than this (log-likelihood units) reached the same
#: optimum (common practice: differences below 0.01 are immaterial for inference).
SAME_OPTIMUM = 0.01


def default_start(data, spec: ModelSpec | None = None) -> tuple[Params, str]:
    """The moment-based starting values :func:`fit` uses when no ``start`` is given, and the H
    structure the spec resolves to for ``data`` (Panel or DataFrame)."""
    prob = Problem(as_panel(data), spec or ModelSpec())
    return starting_values(prob.Y, prob.rs), prob.rs.structure


@blas_limited
def fit(data, spec: ModelSpec | None = None, start: Params | None = None, *,
        progress=None) -> PanelFit:
    """Fit the premium panel by EM.

    Parameters
    ----------
    data : Panel or DataFrame (dates x assets, decimal excess returns per period, NaN missing).
    spec : ModelSpec (default settings when None).
    start : Params to start from (a warm start); None uses the moment-based rule.
    progress : optional ``callable(n_estep, objective)``, called after every accepted EM step (a
        Bayesian spec: ``callable(n_sweeps, None)`` after every sweep of every chain).  If it also
        has a ``stage(name, expected)`` method, that is called when the standard errors start
        (``expected`` E-steps, one per free parameter not at a bound), and the callable then counts
        their E-steps from 1 with ``objective`` None.

    ``spec.estimation == "bayes"`` samples the posterior instead (:mod:`panel.bayes.estimate`).
    """
    t0 = time.perf_counter()
    panel = as_panel(data)
    spec = spec or ModelSpec()
    prob = Problem(panel, spec)
    rs = prob.rs
    n_free = count_free(rs, prob.Y.shape[1])
    check_estimable(prob.Y, prob.panel.assets, rs)
    if spec.bayes:
        from panel.bayes.estimate import fit_bayes

        return fit_bayes(prob, None if start is None else _check_start(start, prob), progress)
    p0 = starting_values(prob.Y, rs) if start is None else _check_start(start, prob)
    if rs.max_sigma_diag is not None:      # start inside the cap: EM never accepts a step down
        lam, q = ms.cap_premium(p0.Lambda, p0.q, rs.max_sigma_diag, prob.packer.free_q)
        p0 = Params(Lambda=lam, q=q, H=p0.H, B=p0.B, psi=p0.psi)
    floor = ms.VAR_FLOOR * np.diag(p0.H)   # per asset: a variance here is a boundary solution
    if n_free == 0:
        e = prob.estep(p0)
        p, status, message, n_iter = p0, "fixed", "all parameters fixed: filter and smoother only", 1
        objective, trace = prob.objective(e, p0), ((1, prob.objective(e, p0), e.loglik, 0.0, "fixed"),)
        loglik = e.loglik
    else:
        outcomes = [_estimate(prob, p0, floor, progress)]
        for j in range(1, spec.starts):
            outcomes.append(_estimate(prob, perturbed_start(p0, rs, j, rs.max_sigma_diag), floor, progress))
        outcome = max(outcomes, key=lambda o: o.objective)   # the first of equals: the default start
        p, status, message, n_iter = outcome.params, outcome.status, outcome.message, outcome.n_estep
        objective, trace, loglik = outcome.objective, outcome.trace, outcome.estep.loglik
        e = outcome.estep
        if spec.starts > 1:
            reached = sum(o.objective >= objective - SAME_OPTIMUM for o in outcomes)
            message += (f"; best of {spec.starts} starts, {reached} reached it (within {SAME_OPTIMUM:g} "
                        f"log-likelihood units), {sum(o.n_estep for o in outcomes)} E-steps in all")
        status, message = _boundary_status(p, rs, floor, panel.assets, status, message)
        missed, speedup = surrogate.missed_gaps(prob)
        if missed:
            message += (f"; {missed} gap cells fitted on the panel itself: finish='filled' (--gaps filled) "
                        f"fits on a gap-filled copy whose E-step is estimated {speedup:.{int(speedup < 10)}f}x cheaper")
    se, se_note = None, ""
    want_se = spec.std_errors == "always" or (spec.std_errors == "auto" and n_free <= AUTO_SE_LIMIT)
    if n_free and want_se:
        q_bound, psi_bound, _ = _at_bounds(p, rs, floor)
        at_bound = prob.packer.packed_variances(q_bound, psi_bound)
        forward = {}
        if spec.loglik_tol is not None:     # the score at the optimum is free: forward differences
            forward = {"base": ms.expected_complete_loglik_grad(e, p, rs, prob.packer, prob.sigma_prior,
                                                                prob.h_prior),
                       "rel_step": inference.FORWARD_STEP,
                       "central_fallback": spec.stopping != "gradient"}
        expected = int(np.size(at_bound) - np.sum(at_bound)) * (1 if forward else 2)
        score = _reporting(lambda th: prob.score(th, p), progress, expected)
        se, se_note = inference.standard_errors(p, prob.packer, score, rs.structure, at_bound=at_bound,
                                                **forward)
    elif n_free and spec.std_errors == "auto":
        se_note = f"standard errors skipped ({n_free} free parameters > {AUTO_SE_LIMIT}; std_errors='always' forces them)"
    if se_note:
        message = f"{message}; {se_note}"
    return _result(prob, p, start, loglik, objective, n_free, n_iter, status, message, trace, se,
                   time.perf_counter() - t0)


def _reporting(score, progress, expected: int):
    """``score`` that counts its calls to ``progress`` when ``progress`` has a ``stage`` method
    (``fit``'s docstring), announcing about ``expected`` of them: the standard errors take one
    E-step per free parameter (two by central differences), on a slow panel as long as the fit."""
    stage = getattr(progress, "stage", None)
    if stage is None:
        return score
    stage("standard errors", expected)
    calls = [0]

    def counted(theta):
        out = score(theta)
        calls[0] += 1
        progress(calls[0], None)
        return out
    return counted


def _estimate(prob: Problem, p0: Params, floor: np.ndarray, progress):
    """One EM run (with its accelerations) from ``p0``; on the panel's gap-filled copy where
    :func:`panel.model.surrogate.route` says so."""
    spec, rs = prob.spec, prob.rs
    if surrogate.route(prob, spec.finish):
        return surrogate.estimate(prob, p0, floor, progress, lambda pr: _quasi_newton_setup(pr, floor))
    return run_em(
        p0, prob.estep,
        lambda e, p: ms.mstep(e, p, rs, floor, prob.sigma_prior, prob.h_prior),
        prob.objective, prob.packer, tol=spec.tol, param_tol=spec.param_tol,
        max_iter=spec.max_iter, time_budget=spec.time_budget,
        accelerate=spec.acceleration != "none", progress=progress, loglik_tol=spec.loglik_tol,
        stopping=spec.stopping, **_quasi_newton_setup(prob, floor))


def check_estimable(Y: np.ndarray, assets, rs) -> None:
    """Refuse, with one line (:class:`SpecError`), data on which the likelihood has no proper
    maximum.  ``Y`` (T, N) decimal returns per period, NaN missing; ``rs`` the spec resolved for
    them.  Cheap: the backfill planner runs it at every cut-off before fitting anything."""
    n_free = count_free(rs, Y.shape[1])
    T, N = Y.shape
    if T < 2:
        raise SpecError(f"the panel has {T} date; estimation needs at least 2 (several years are advisable)")
    with np.errstate(invalid="ignore"):
        spread = np.nanmax(Y, axis=0) - np.nanmin(Y, axis=0)
    counts = (~np.isnan(Y)).sum(axis=0)
    flat = (spread == 0) & (counts >= 2)
    if flat.any():
        names = ", ".join(np.array(assets)[flat][:5])
        raise SpecError(f"constant returns for {names}: a premium model needs returns that vary; drop them")
    informative = int(counts.sum()) - N     # an asset's first return only places its diffuse level
    if n_free > informative:
        raise SpecError(f"{n_free} free parameters but only {informative} returns after each asset's first; "
                        "use fewer factors, a simpler return_shocks, fixed volatilities or more data")
    if rs.structure == "full" and T - 1 <= N:
        raise SpecError(f"return_shocks='full' with {N} assets needs more than {N + 1} dates (has {T}): "
                        "its likelihood is unbounded; use return_shocks='factor' or 'diagonal'")


def _quasi_newton_setup(prob: Problem, floor: np.ndarray) -> dict:
    """Box bounds of the packed parameters (for SQUAREM's extrapolation and the quasi-Newton
    finish), the score, and the EM steps' E-step (``em_estep``: without the score's terms, which
    they never take; :func:`panel.model.em.run_em`).  With factors and a premium-volatility cap
    the bound is not a box: SQUAREM's extrapolated points are projected onto it by the M-step's
    own rule (its safeguard keeps the objective monotone); with one factor (``cap_method="box"``)
    the finish then works in coordinates where the bound is a box (``cap``,
    :class:`panel.model.em._Coords`), with more there is no quasi-Newton finish."""
    rs = prob.rs
    logvar = prob.packer.log_variance_mask()
    n_lam = int(prob.packer.lam_free.sum())
    n_q = int(prob.packer.free_q.sum())
    q_slice = slice(n_lam, n_lam + n_q)
    low = np.full(logvar.size, -np.inf)
    low[q_slice] = np.log(floor[prob.packer.free_q])
    if rs.structure == "full":  # log Cholesky diagonal: half the log variance
        low[q_slice.stop:][logvar[q_slice.stop:]] = 0.5 * np.log(floor.min())
    else:
        n_psi = int(prob.packer.free_psi.sum())
        low[logvar.size - n_psi:] = np.log(floor[prob.packer.free_psi])
    high = np.full(logvar.size, np.inf)
    if rs.max_sigma_diag is not None:
        high[q_slice] = np.log(rs.max_sigma_diag)
    bounds = [(None if not np.isfinite(lo) else lo, None if not np.isfinite(hi) else hi)
              for lo, hi in zip(low, high)]

    def score(e, p):
        return ms.expected_complete_loglik_grad(e, p, rs, prob.packer, prob.sigma_prior, prob.h_prior)

    qn = prob.spec.acceleration == "quasi-newton"
    # EM steps never take the score: their E-steps skip its terms (same moments, for less)
    base = {"bounds": bounds, "em_estep": prob.em_estep if prob.plan.terms else None}
    if rs.max_sigma_diag is not None and rs.k > 0:
        free_q = prob.packer.free_q

        def project(p):
            lam, q = ms.cap_premium(p.Lambda, p.q, rs.max_sigma_diag, free_q)
            return Params(Lambda=lam, q=q, H=p.H, B=p.B, psi=p.psi)
        if rs.k == 1 and prob.spec.cap_method == "box" and prob.spec.loglik_tol is not None:
            return {**base, "score": score if qn else None, "project": project,
                    "cap": (rs.max_sigma_diag, floor)}
        return {**base, "project": project}
    return {**base, "score": score if qn else None}


@blas_limited
def evaluate(data, params: Params, spec: ModelSpec | None = None) -> PanelFit:
    """Filter and smooth at given parameters (no estimation): the known-parameters filter."""
    t0 = time.perf_counter()
    panel = as_panel(data)
    prob = Problem(panel, spec or ModelSpec())
    p = _check_start(params, prob)
    e = prob.estep(p)
    obj = prob.objective(e, p)
    return _result(prob, p, None, e.loglik, obj, count_free(prob.rs, p.n_assets), 1, "fixed",
                   "evaluated at given parameters", ((1, obj, e.loglik, 0.0, "fixed"),), None,
                   time.perf_counter() - t0)


def _check_start(p: Params, prob: Problem) -> Params:
    N = prob.Y.shape[1]
    rs = prob.rs
    if p.n_assets != N or p.Lambda.shape[1] != rs.k or p.H.shape != (N, N):
        raise SpecError(f"start parameters are for {p.n_assets} assets and {p.Lambda.shape[1]} "
                        f"premium factors; the model has {N} and {rs.k}")
    if rs.structure == "factor" and (p.B is None or p.B.shape[1] != rs.r):
        raise SpecError("start parameters do not have the model's return-factor structure")
    if rs.structure != "full" and p.psi is None:
        raise SpecError("start parameters have a full H; the model needs psi")
    return p


def _at_bounds(p, rs, floor):
    """(N,) masks of free own premium variances at zero, free own return variances at their floor
    (Heywood cases), and total premium variances at the cap."""
    free_q = np.ones(p.n_assets, bool) if rs.fixed_q is None else np.isnan(rs.fixed_q)
    at_zero = free_q & (p.q <= ms.BOUNDARY_RATIO * np.diag(p.H))
    heywood = np.zeros(p.n_assets, bool)
    if p.psi is not None:
        free_psi = np.ones(p.n_assets, bool) if rs.fixed_psi is None else np.isnan(rs.fixed_psi)
        heywood = free_psi & (p.psi <= floor * 1.0001)
    capped = np.zeros(p.n_assets, bool)
    if rs.max_sigma_diag is not None:
        capped = np.diag(p.Sigma) >= rs.max_sigma_diag * (1 - 1e-8)
    return at_zero, heywood, capped


def _boundary_status(p, rs, floor, assets, status, message):
    at_zero, heywood, capped = _at_bounds(p, rs, floor)
    notes = []
    if at_zero.any():
        names = ", ".join(np.array(assets)[at_zero][:5])
        notes.append(f"own premium innovation variance at zero (boundary) for {names}; "
                     "a premium prior or a fixed own_premium_vol keeps it away")
    if heywood.any():
        names = ", ".join(np.array(assets)[heywood][:5])
        notes.append(f"own return-shock variance at zero (boundary) for {names}; "
                     "use fewer return factors or return_shocks='full'")
    if capped.any():
        names = ", ".join(np.array(assets)[capped][:5])
        notes.append(f"premium volatility at the upper bound for {names}")
    if not notes:
        return status, message
    # "boundary" qualifies a converged fit; an unfinished one keeps saying why it stopped
    return ("boundary" if status == "converged" else status), f"{message}; " + "; ".join(notes)


def _result(prob, p, start, loglik, objective, n_free, n_iter, status, message, trace, se, elapsed):
    rs, panel = prob.rs, prob.panel
    lam = p.Lambda if rs.k else None
    out = prob.plan.report(p.Sigma, p.H, Lambda=lam)
    assets = list(panel.assets)
    T, N = prob.Y.shape
    active = ~np.isnan(out.filtered_mean)
    ti, ai = np.nonzero(active)
    ret_var = out.predicted_var + prob.s2[:, None] * np.diag(p.H)[None, :]
    with np.errstate(invalid="ignore"):
        z = out.innovation / np.sqrt(out.innovation_var)
    estimates = pd.DataFrame({
        "date": panel.dates[ti], "asset": np.array(assets, dtype=object)[ai],
        "filtered_mean": out.filtered_mean[ti, ai], "filtered_std": np.sqrt(out.filtered_var[ti, ai]),
        "smoothed_mean": out.smoothed_mean[ti, ai], "smoothed_std": np.sqrt(out.smoothed_var[ti, ai]),
        "predictive_mean": out.predicted_mean[ti, ai], "predictive_std": np.sqrt(ret_var[ti, ai]),
        "std_innovation": z[ti, ai]})
    # The factor is known (variance 0) at the first date: clip rounding just below zero.
    ffs, fss = (np.sqrt(np.maximum(v, 0.0)) for v in (out.factor_filtered_var, out.factor_smoothed_var))
    fac = [pd.DataFrame({"date": panel.dates, "factor": j + 1,
                         "filtered_mean": out.factor_filtered_mean[:, j], "filtered_std": ffs[:, j],
                         "smoothed_mean": out.factor_smoothed_mean[:, j], "smoothed_std": fss[:, j]})
           for j in range(rs.k)]
    factors = pd.concat(fac, ignore_index=True) if fac else pd.DataFrame(
        columns=["date", "factor", "filtered_mean", "filtered_std", "smoothed_mean", "smoothed_std"])
    rows = inference.parameter_rows(assets, rs.k, rs.r, rs.structure)
    values = inference.parameter_vector(p, rs.structure)
    parameters = pd.DataFrame(rows, columns=["name", "row", "col"])
    parameters["value"] = values
    parameters["std_error"] = np.nan if se is None else se
    trace_frame = pd.DataFrame(list(trace), columns=["iteration", "objective", "loglik", "elapsed_s", "step"])
    diag_rows = []
    for i, a in enumerate(assets):
        q, lags, pv = inference.ljung_box(z[:, i])
        diag_rows.append((a, "ljung_box", lags, q, pv))
    diagnostics = pd.DataFrame(diag_rows, columns=["asset", "statistic", "lags", "value", "pvalue"])
    return PanelFit(panel=panel, spec=prob.spec, start=start, params=p, k=rs.k, structure=rs.structure,
                    periods_per_year=rs.ppy, loglik=float(loglik), objective=float(objective),
                    n_params=int(n_free), n_obs=prob.n_obs, n_iter=int(n_iter),
                    converged=status in ("converged", "fixed"), status=status, message=message,
                    elapsed=float(elapsed), estimates=estimates, factors=factors,
                    parameters=parameters, trace=trace_frame, diagnostics=diagnostics)
