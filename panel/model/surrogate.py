"""The fit of a panel with gaps on its gap-filled copy: the same optimum, to the finish's
tolerance, for a few exact E-steps.

A panel with gaps (returns missing inside an asset's history, or not yet published at its last
dates: :func:`panel.kalman.gapfill.fillable`) changes
its observed set at nearly every date, so its exact E-step takes the dense filter step there: 100 to
250 times a balanced E-step.  The same panel with its gaps filled by their conditional means is
balanced (or ragged only by entries and exits) and takes the fast exact paths.  Its log-likelihood
``f_s`` is not the panel's ``f``, but close: it counts the filled cells as data.  The fit therefore
works on it and corrects it with the exact E-step, the first-order model management of Alexandrov,
Dennis, Lewis & Torczon (1998, Structural Optimization 15, 16-23):

1. Fill the gaps at the starting values and fit the filled panel by the usual EM, SQUAREM and
   active-set finish (:func:`panel.model.em.run_em`), all on its cheap E-steps.
2. At the current point ``theta_k`` one exact pass gives ``f``, its score (Fisher's identity) and
   the smoothed premia; the gaps are refilled there.  The corrected surrogate
   ``f_s(theta) + c'(theta - theta_k)``, ``c = grad f(theta_k) - grad f_s(theta_k)``, has the exact
   gradient at ``theta_k``; the active-set finish maximises it on cheap E-steps.  Its end is
   accepted when the exact objective increases (halving the step otherwise), so the trace of exact
   objectives is monotone.
3. It stops when the finish on the corrected surrogate gains less than ``loglik_tol`` from
   ``theta_k`` itself: there the surrogate's gradient is the exact one, so the exact projected
   gradient is small and the filled panel's curvature says less than ``loglik_tol`` is left.  That
   curvature is stiffer than the exact one (filled cells count as data), so like the direct
   finish's rule this models the gain left and does not bound it: measured within 4e-4 of the
   direct route's optimum (``route``).

With ``ModelSpec.filled_warm`` (the default) the route reuses what it already knows.  The first
fill comes from the copy's own smoother, not from an exact pass.  The outer steps' finishes start
where the previous finish left off (:mod:`panel.model.warm`): the corrected surrogates differ
little from one step to the next, so the secant pairs of the previous finish still describe their
curvature.  Restarted from scratch, L-BFGS-B relearnt it every time: on a simulated N = 100, T =
600 panel with 2% gaps the three outer steps took 744, 518 and 62 E-steps on the copy, warm 45, 14
and 11 (whole fit 381 E-steps against 1,633, ending 1.3e-4 higher).

Opt-in (``ModelSpec.finish``, default "direct"): the path differs from the direct fit's, and
where the likelihood has several local optima the two can end in different ones (measured on 11
simulated N = 60, T = 300 panels with gaps: 5 differed, by 0.002 to 14 log-likelihood units, either
route ahead).

Each outer step shrinks the remaining gain by the mismatch of the two curvatures, which grows with
the share of cells filled: measured on simulated N = 100, T = 600 panels with 2% gaps, 6.4 ->
1e-3 -> 4e-5 in three steps.  With exits filled as well (a quarter to half of an asset's dates) it
was 2x per step, slower than the direct finish, so exits and entries are never filled and the route
is chosen only when the filled panel's E-step is much cheaper (:func:`route`).
"""

from __future__ import annotations

import time

import numpy as np

from panel.kalman import paths
from panel.kalman.gapfill import fill_gaps, fillable
from panel.model import em, mstep as ms
from panel.model.em import EMOutcome, run_em
from panel.model.warm import warm_finish

#: The filled panel's E-step must be estimated at least this many times cheaper than the exact one
#: (each outer step costs one exact pass — two on the segment path — and some cheap E-steps: a
#: few dozen warm, a few hundred cold).
MIN_SPEEDUP = 10.0
#: ... and the exact E-step estimated to cost at least this (units of
#: :func:`panel.kalman.paths.estimated_cost`; about 20 ms on the benchmark machine): below it the
#: direct finish is quick anyway, and its optimum is usually far tighter than ``loglik_tol``.
MIN_EXACT_COST = 2e8
#: ... and no asset may have more than this share of its observed span filled (the outer steps
#: slow down as the share grows; see the module docstring).
MAX_GAP_SHARE = 0.10
#: A direct fit names the filled route in its message when the copy's E-step is estimated at least
#: this many times cheaper (and the exact one at least ``MIN_EXACT_COST``).  Measured 2026-12-04
#: on 8 simulated panels shaped like research data (N = 20-100, T = 300-600; entries in cohorts
#: and singly, a few exits, 0.1-1% isolated gaps, late last cells): estimated 1.9-2.95x, the
#: filled route's fit took 1.4-2.65x less time; estimated 1.3-1.7x, 1.0-1.2x; every one ended
#: 2e-6 to 4.3e-5 below the direct route's optimum (within ``loglik_tol``).
HINT_SPEEDUP = 2.0
#: Outer steps before the direct finish takes over (measured: 3 on the benchmark's 2% gaps).
MAX_OUTER = 30
#: Step fractions tried when the corrected surrogate's step does not raise the exact objective.
FRACTIONS = (1.0, 0.5, 0.25)


def route(prob, finish: str) -> bool:
    """Whether ``prob`` (a :class:`panel.model.problem.Problem`) is fitted on its gap-filled copy:
    ``finish`` "filled" whenever it has gaps, "auto" when its gaps are a small share of every
    asset's span, its exact E-step is expensive and ``MIN_SPEEDUP`` times the filled panel's
    (estimated), and it has at most one premium and one return factor.  Never with a premium
    volatility cap that has no boxed finish (two or more premium factors, or
    ``cap_method="projection"``): the corrected surrogate needs the active-set finish.
    Likelihoods with more factors have several local optima, and the two routes' paths can end in
    different ones (measured on nine simulated N = 40, T = 300 panels with 2% gaps and two
    factors of either kind: three differed, by 0.04 to 8 log-likelihood units, either route ahead;
    with one factor each, 14 panels and spec variants of N = 40-100 agreed within 4e-4, but 5 of
    11 of N = 60, T = 300 did not: module docstring)."""
    if finish == "direct":
        return False
    gaps = _fillable_here(prob)
    if gaps is None:
        return False
    if finish == "filled":
        return True
    return _auto(prob, gaps)


def _fillable_here(prob) -> np.ndarray | None:
    """The panel's fillable gaps ((T, N) bool) where the filled route can run on it (it has gaps,
    and the spec has the active-set finish the corrected surrogate needs), else None."""
    spec = prob.spec
    capped = prob.rs.max_sigma_diag is not None and prob.rs.k > 0
    if (spec.acceleration != "quasi-newton" or spec.loglik_tol is None
            or (capped and (prob.rs.k > 1 or spec.cap_method != "box"))):
        return None
    gaps = fillable(prob.Y)
    return gaps if gaps.any() else None


def _auto(prob, gaps: np.ndarray) -> bool:
    """Whether "auto" takes the filled route for a panel with these ``gaps``."""
    if prob.rs.k > 1 or prob.rs.r > 1:
        return False                      # several local optima: keep the direct route's path
    span = prob.Y.shape[0] - (~np.isnan(prob.Y)).argmax(axis=0)       # from each asset's entry
    if np.max(gaps.sum(axis=0) / span) > MAX_GAP_SHARE:
        return False
    return _pays(prob, gaps)


def _pays(prob, gaps: np.ndarray) -> bool:
    """Whether the exact E-step is estimated expensive and ``MIN_SPEEDUP`` times the filled copy's."""
    exact, filled = _costs(prob, gaps)
    return exact >= max(MIN_EXACT_COST, MIN_SPEEDUP * filled)     # the rule stored "auto" runs took


def _costs(prob, gaps: np.ndarray) -> tuple[float, float]:
    """Estimated costs of one E-step on the panel and on its copy with ``gaps`` filled."""
    method = prob.spec.method
    filled = np.where(gaps, 0.0, prob.Y)
    return (paths.estep_cost(prob.Y, method, prob.s2, prob.init),
            paths.estep_cost(filled, method, prob.s2, prob.init))


def missed_gaps(prob) -> tuple[int, float]:
    """``(gap cells, estimated E-step speedup)`` of a panel fitted on itself (``finish="direct"``)
    whose E-steps the filled route would make at least ``HINT_SPEEDUP`` times cheaper (the exact
    one costing at least ``MIN_EXACT_COST``), else ``(0, 1.0)``: the fit's message says so."""
    gaps = None if prob.spec.finish != "direct" else _fillable_here(prob)
    if gaps is None:
        return 0, 1.0
    exact, filled = _costs(prob, gaps)
    if exact < MIN_EXACT_COST or exact < HINT_SPEEDUP * filled:
        return 0, 1.0
    return int(gaps.sum()), exact / filled


def estimate(prob, p0, floor, progress, setup) -> EMOutcome:
    """Fit ``prob`` from ``p0`` by the filled-panel route (module docstring).  ``floor`` (N,) the
    variance floors, ``progress(n_estep, objective)`` as in :func:`panel.model.fit.fit` (objective
    None during the cheap E-steps), ``setup(problem) -> dict`` the bounds and score of the
    quasi-Newton finish for a problem (:func:`panel.model.fit._quasi_newton_setup`).

    E-steps counted in the result are both kinds: exact passes on the panel (E-steps and the
    smoothing passes that refill the gaps) and E-steps on the filled copy; the message gives each."""
    spec, rs, packer = prob.spec, prob.rs, prob.packer
    t_start = time.perf_counter()
    count = {"exact": 0, "cheap": 0}

    def elapsed():
        return time.perf_counter() - t_start

    def total():
        return count["exact"] + count["cheap"]

    def time_left():
        return None if spec.time_budget is None else spec.time_budget - elapsed()

    def exact(p):
        count["exact"] += 1
        e, mean = prob.estep_with_means(p)
        return e, mean, prob.objective(e, p)

    def mstep(e, p):
        return ms.mstep(e, p, rs, floor, prob.sigma_prior, prob.h_prior)

    def score(problem, e, p):
        return ms.expected_complete_loglik_grad(e, p, rs, packer, problem.sigma_prior, problem.h_prior)

    def cheap_progress(n, _objective):
        if progress is not None:
            progress(count["exact"] + count["cheap"] + n, None)

    trace = em._Trace(progress)
    keep = {}
    p = p0
    if spec.filled_warm:
        # the first fill from the copy's own smoother: each asset's mean return in the gaps, the
        # smoothed premia of that copy, the conditional means given them (one sweep of the
        # iteration whose fixed point is the exact fill; any fill serves, the outer steps correct it)
        mean = np.broadcast_to(np.nanmean(prob.Y, axis=0), prob.Y.shape)
        _, mean = prob.with_data(fill_gaps(prob.Y, mean, p0.H)).estep_with_means(p0)
        count["cheap"] += 1
        e, obj = None, -np.inf
    else:
        e, mean, obj = exact(p)
        trace.append((total(), obj, e.loglik, elapsed(), "start"))
    # 1. the filled panel's own fit from the start
    filled = prob.with_data(fill_gaps(prob.Y, mean, p0.H))
    run = run_em(p0, filled.estep, mstep, filled.objective, packer, tol=spec.tol,
                 param_tol=spec.param_tol, max_iter=max(1, spec.max_iter - total()),
                 time_budget=time_left(), accelerate=True, progress=cheap_progress,
                 loglik_tol=spec.loglik_tol, stopping=spec.stopping, keep=keep, **setup(filled))
    count["cheap"] += run.n_estep
    e1, mean1, obj1 = exact(run.params)
    if obj1 > obj or e is None:
        p, e, mean, obj = run.params, e1, mean1, obj1
        trace.append((total(), obj, e.loglik, elapsed(), "filled-fit"))
    status = run.status if run.status in ("max_iter", "time_budget") else None
    # 2. outer steps on the corrected surrogate
    qn = setup(prob)
    bounds, cap = qn["bounds"], qn.get("cap")
    outer = 0
    while status is None:
        if outer == MAX_OUTER:
            return _direct(prob, p, e, obj, count, setup, trace, elapsed, time_left)
        outer += 1
        filled = prob.with_data(fill_gaps(prob.Y, mean, p.H))
        es = filled.estep(p)
        count["cheap"] += 1
        theta0 = packer.pack(p)
        c = score(prob, e, p) - score(filled, es, p)

        def corrected(ee, pp, filled=filled, c=c, theta0=theta0):
            return filled.objective(ee, pp) + c @ (packer.pack(pp) - theta0)

        def corrected_score(ee, pp, filled=filled, c=c):
            return score(filled, ee, pp) + c

        base = corrected(es, p)
        before = total()
        inner_status, start = None, (p, es, base, before)
        if spec.filled_warm and keep:
            p1, e1, inner_obj, n, inner_status, _ = warm_finish(
                *start, filled.estep, corrected, corrected_score, packer, spec.max_iter,
                time_left(), elapsed, spec.loglik_tol, keep)
            start = (p1, e1, inner_obj, n)
        if inner_status in (None, "stalled"):   # no curvature yet, or no increase: go on cold
            p1, _, inner_obj, n, inner_status, _ = em._active_set_finish(
                *start, filled.estep, corrected, corrected_score, packer, bounds, spec.max_iter,
                time_left(), em._Trace(None), elapsed, spec.loglik_tol, spec.stopping, cap, keep)
        count["cheap"] += n - before
        if inner_status in ("max_iter", "time_budget"):
            status = inner_status
            break
        if inner_obj - base < spec.loglik_tol:
            # the exact stopping rule holds at p (module docstring); a finish whose line search
            # found no increase says so, as the direct finish would
            status = "converged" if inner_status == "converged" else "stalled"
            break
        theta1 = packer.pack(p1)
        for frac in FRACTIONS:
            trial = packer.unpack(theta0 + frac * (theta1 - theta0), p)
            et, mt, ot = exact(trial)
            if ot > obj:
                p, e, mean, obj = trial, et, mt, ot
                trace.append((total(), obj, e.loglik, elapsed(), "filled"))
                break
        else:       # the surrogate misleads here: the direct finish from the best point
            return _direct(prob, p, e, obj, count, setup, trace, elapsed, time_left)
    counts = (f"{count['exact']} exact passes on the panel, {count['cheap']} on its gap-filled "
              "copy; finish on the filled panel")
    message = {"converged": f"converged after {total()} E-steps ({counts})",
               "stalled": f"stopped after {total()} E-steps ({counts}): the finish's line search "
                          "found no further increase; result kept at the best point",
               "time_budget": f"stopped by the time budget of {spec.time_budget or 0:g} s ({counts})",
               }.get(status, f"stopped after {total()} E-steps without meeting the tolerance ({counts})")
    return EMOutcome(params=p, estep=e, objective=obj, n_estep=total(), status=status,
                     message=message, trace=tuple(trace))


def _direct(prob, p, e, obj, count, setup, trace, elapsed, time_left) -> EMOutcome:
    """The active-set finish on the exact E-steps from ``p`` (when the surrogate stops helping)."""
    spec = prob.spec
    qn = setup(prob)
    before = count["exact"] + count["cheap"]
    p, e, obj, n, status, message = em._active_set_finish(
        p, e, obj, before, prob.estep, prob.objective, qn["score"], prob.packer, qn["bounds"],
        spec.max_iter, time_left(), trace, elapsed, spec.loglik_tol, spec.stopping, qn.get("cap"))
    count["exact"] += n - before
    if status == "converged":
        message = (f"converged after {n} E-steps ({count['exact']} exact on the panel, "
                   f"{count['cheap']} on its gap-filled copy; finish on the panel itself)")
    return EMOutcome(params=p, estep=e, objective=obj, n_estep=n, status=status, message=message,
                     trace=tuple(trace))
