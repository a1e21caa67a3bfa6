"""The EM loop: generalised EM steps, SQUAREM acceleration, a quasi-Newton finish, stopping rules
and the trace.

SQUAREM (Varadhan & Roland 2008, scheme S3): from ``theta0`` take two EM steps ``theta1, theta2``,
extrapolate ``theta0 - 2 a r + a^2 v`` with ``r = theta1 - theta0``, ``v = theta2 - 2 theta1 +
theta0`` and ``a = min(-1, -|r| / |v|)``, in the packed scale (log variances), halving the step
towards ``a = -1`` while the objective is below that of ``theta2``.

EM crawls near the optimum for variance parameters, so ``acceleration="quasi-newton"`` (the
default) hands over, once EM's relative progress per step falls below ``HANDOVER``, to L-BFGS-B on
the exact log-likelihood with the score that each E-step gives by Fisher's identity; log variances
are bounded below by the variance floor, so a boundary solution shows up as a variance at the floor.

Only steps that do not lower the objective are accepted: the trace is monotone.
"""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np

from panel.model.params import Packer, Params

#: Allowed fall of the objective per step, relative — rounding noise, not a decrease.
NOISE = 1e-11
#: EM relative progress per step below which the quasi-Newton finish takes over.  EM's slow
#: directions are the ill-conditioned ones; L-BFGS-B started while EM still moves builds its
#: curvature on them sooner (measured on the benchmark panels: 1e-5 took 1.3-2.2x the E-steps of
#: 1e-4 to reach the same optimum; 1e-3 once ended in a worse local optimum).
HANDOVER = 1e-4


@dataclass(frozen=True)
class EMOutcome:
    params: Params
    estep: object               # the E-step at ``params``
    objective: float
    n_estep: int
    status: str                 # converged | max_iter | time_budget | stalled
    message: str
    trace: tuple                # (iteration, objective, loglik, elapsed_s, step)


def run_em(p0: Params, estep, mstep, objective, packer: Packer, *, tol: float, param_tol: float,
           max_iter: int, time_budget: float | None, accelerate: bool, score=None,
           bounds=None, extrapolate: bool = True, project=None, progress=None) -> EMOutcome:
    """Iterate to a stationary point of the objective (log-likelihood plus log prior).

    ``estep(p) -> EStep``, ``mstep(e, p) -> Params``, ``objective(e, p) -> float``;
    ``score(e, p) -> (n_theta,)`` enables the quasi-Newton finish, within ``bounds`` (a list of
    (low, high) per packed parameter), which also clip SQUAREM's extrapolation;
    ``extrapolate=False`` turns SQUAREM off; ``project(p) -> Params`` maps an extrapolated point
    onto a constraint that is not a box (the M-step's own projection), so SQUAREM can run there
    too.  ``max_iter`` bounds the number of E-steps.
    ``progress(n_estep, objective)`` is called after every accepted step.
    """
    accelerate = accelerate and extrapolate
    lo = hi = None
    if bounds is not None:
        lo = np.array([-np.inf if b[0] is None else b[0] for b in bounds])
        hi = np.array([np.inf if b[1] is None else b[1] for b in bounds])
    start = time.perf_counter()
    p, e = p0, estep(p0)
    obj = objective(e, p)
    n = 1
    trace = _Trace(progress)
    trace.append((0, obj, e.loglik, time.perf_counter() - start, "start"))

    def elapsed():
        return time.perf_counter() - start

    status, message = "max_iter", f"stopped after {max_iter} E-steps without meeting the tolerance"
    while True:
        if n >= max_iter:
            break
        if time_budget is not None and elapsed() > time_budget:
            status, message = "time_budget", f"stopped by the time budget of {time_budget:g} s"
            break
        p1 = mstep(e, p)
        e1 = estep(p1)
        o1 = objective(e1, p1)
        n += 1
        step = "em"
        cand = (p1, e1, o1)
        if o1 < obj - NOISE * abs(obj):
            status = "stalled"
            message = (f"an EM step lowered the objective ({obj:.10g} -> {o1:.10g}); "
                       "a bound is probably active — result kept at the last accepted step")
            break
        if accelerate and n < max_iter:
            p2 = mstep(e1, p1)
            e2 = estep(p2)
            o2 = objective(e2, p2)
            n += 1
            if o2 >= o1 - NOISE * abs(o1):
                cand = (p2, e2, o2)
                t0, t1, t2 = packer.pack(p), packer.pack(p1), packer.pack(p2)
                r, v = t1 - t0, t2 - 2.0 * t1 + t0
                nv = np.linalg.norm(v)
                a = min(-1.0, -np.linalg.norm(r) / nv) if nv > 0 else -1.0
                while a < -1.01 and n < max_iter:
                    try:
                        te = t0 - 2.0 * a * r + a * a * v
                        if lo is not None:
                            te = np.clip(te, lo, hi)
                        pe = packer.unpack(te, p2)
                        if project is not None:
                            pe = project(pe)
                        ee = estep(pe)
                        oe = objective(ee, pe)
                    except (np.linalg.LinAlgError, ValueError, FloatingPointError):
                        oe = -np.inf  # extrapolated point not admissible
                    n += 1
                    if np.isfinite(oe) and oe >= o2:
                        cand, step = (pe, ee, oe), "squarem"
                        break
                    a = 0.5 * (a - 1.0)
        p_new, e_new, o_new = cand
        dtheta = np.max(np.abs(packer.pack(p_new) - packer.pack(p)), initial=0.0)
        rel = abs(o_new - obj) / max(1.0, abs(obj))
        p, e, obj = p_new, e_new, o_new
        trace.append((n, obj, e.loglik, elapsed(), step))
        if rel < tol and dtheta < param_tol:
            status, message = "converged", f"converged after {n} E-steps"
            break
        if score is not None and rel < HANDOVER:
            remaining = None if time_budget is None else time_budget - elapsed()
            p, e, obj, n, status, message = _quasi_newton(
                p, e, obj, n, estep, objective, score, packer, bounds, max_iter, remaining,
                trace, elapsed)
            break
    return EMOutcome(params=p, estep=e, objective=obj, n_estep=n, status=status, message=message,
                     trace=tuple(trace))


class _Trace(list):
    """The accepted steps; reports each one to an optional progress callback."""

    def __init__(self, progress):
        super().__init__()
        self.progress = progress

    def append(self, row) -> None:
        super().append(row)
        if self.progress is not None:
            self.progress(row[0], row[1])


class _OutOfTime(Exception):
    pass


def _quasi_newton(p, e, obj, n, estep, objective, score, packer, bounds, max_iter, time_left,
                  trace, elapsed):
    """L-BFGS-B on the objective with the Fisher-identity score; keeps the best point evaluated.

    Converged means L-BFGS-B's own test passed: the projected gradient of the objective (scaled
    by its magnitude) below 1e-10, with variances at their floor counting as on a bound.
    """
    from scipy import optimize

    best = {"p": p, "e": e, "obj": obj}
    count = {"n": n}
    t_start = elapsed()
    theta0 = packer.pack(p)
    # The optimiser works on x: raw entries (loadings) scaled by their magnitude, and log entries
    # turned back into standard deviations s = exp(theta / a) scaled by their start value.  In logs
    # a variance heading for zero is an endless flat road; in s it reaches its bound in a few steps.
    a = packer.log_power()
    logs = a > 0
    d = np.ones(theta0.size)
    mag = np.abs(theta0[~logs])
    if (~logs).any():
        d[~logs] = np.maximum(mag, np.median(mag[mag > 0]) if (mag > 0).any() else 1.0)
    d[logs] = np.exp(theta0[logs] / a[logs])

    def to_theta(x):
        theta = x * d
        theta[logs] = a[logs] * np.log(theta[logs])
        return theta

    def dtheta_dx(x):
        out = d.copy()
        out[logs] = a[logs] / x[logs]
        return out

    scale = max(1.0, abs(obj))

    def f(x):
        if count["n"] >= max_iter:
            raise _OutOfTime("max_iter")
        if time_left is not None and elapsed() - t_start > time_left:
            raise _OutOfTime("time_budget")
        count["n"] += 1
        try:
            pp = packer.unpack(to_theta(x), p)
            ee = estep(pp)
            oo = objective(ee, pp)
            grad = score(ee, pp)
        except (np.linalg.LinAlgError, FloatingPointError):
            # a trial point whose covariance is not numerically positive definite (a log-Cholesky
            # diagonal far below its floor): worse than anything seen, so the line search backs off
            return -best["obj"] / scale + 1.0, np.zeros_like(x)
        if oo > best["obj"]:
            best.update(p=pp, e=ee, obj=oo)
            trace.append((count["n"], oo, ee.loglik, elapsed(), "quasi-newton"))
        return -oo / scale, -grad * dtheta_dx(x) / scale

    xbounds = []
    for j, (lo, hi) in enumerate(bounds if bounds is not None else [(None, None)] * theta0.size):
        if logs[j]:
            lo = np.exp(lo / a[j]) / d[j] if lo is not None else 1e-12
            hi = np.exp(hi / a[j]) / d[j] if hi is not None else None
        else:
            lo = None if lo is None else lo / d[j]
            hi = None if hi is None else hi / d[j]
        xbounds.append((lo, hi))
    x0 = theta0 / d
    x0[logs] = 1.0
    try:
        res = optimize.minimize(f, np.clip(x0, [b[0] if b[0] is not None else -np.inf for b in xbounds],
                                           [b[1] if b[1] is not None else np.inf for b in xbounds]),
                                jac=True, method="L-BFGS-B", bounds=xbounds,
                                options={"maxfun": max(1, max_iter - n), "ftol": 1e-15, "gtol": 1e-10,
                                         "maxcor": 20})
        if res.success:
            status, message = "converged", f"converged after {count['n']} E-steps (quasi-Newton finish)"
        elif res.status == 1:       # L-BFGS-B ran out of function evaluations
            status, message = "max_iter", f"quasi-Newton finish stopped: {res.message}"
        else:                       # e.g. its line search found no increase: not a budget stop
            status = "stalled"
            message = (f"quasi-Newton finish stopped after {count['n']} E-steps without meeting "
                       f"its tolerance ({res.message.strip(': ')}); result kept at the best point")
    except _OutOfTime as stop:
        status = str(stop)
        message = (f"stopped after {count['n']} E-steps without meeting the tolerance"
                   if status == "max_iter" else "stopped by the time budget")
    return best["p"], best["e"], best["obj"], count["n"], status, message
