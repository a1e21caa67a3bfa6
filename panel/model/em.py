"""The EM loop: generalised EM steps, SQUAREM acceleration, stopping rules and the trace.

SQUAREM (Varadhan & Roland 2008, scheme S3): from ``theta0`` take two EM steps ``theta1, theta2``,
extrapolate ``theta0 - 2 a r + a^2 v`` with ``r = theta1 - theta0``, ``v = theta2 - 2 theta1 +
theta0`` and ``a = min(-1, -|r| / |v|)``, in the packed scale (log variances); the extrapolated
point is accepted only if its objective is at least that of ``theta2``.  Every accepted step
therefore has an objective no lower than the one before (monotone trace).
"""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np

from panel.model.params import Packer, Params

#: Allowed fall of the objective per step, relative — rounding noise, not a decrease.
NOISE = 1e-11


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
           max_iter: int, time_budget: float | None, accelerate: bool) -> EMOutcome:
    """Iterate to a stationary point of the objective (log-likelihood plus log prior).

    ``estep(p) -> EStep``, ``mstep(e, p) -> Params``, ``objective(e, p) -> float``.
    ``max_iter`` bounds the number of E-steps.
    """
    start = time.perf_counter()
    p, e = p0, estep(p0)
    obj = objective(e, p)
    n = 1
    trace = [(0, obj, e.loglik, time.perf_counter() - start, "start")]

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
                if nv > 0 and n < max_iter:
                    a = min(-1.0, -np.linalg.norm(r) / nv)
                    try:
                        pe = packer.unpack(t0 - 2.0 * a * r + a * a * v, p2)
                        ee = estep(pe)
                        oe = objective(ee, pe)
                        n += 1
                        if np.isfinite(oe) and oe >= o2:
                            cand, step = (pe, ee, oe), "squarem"
                    except (np.linalg.LinAlgError, ValueError, FloatingPointError):
                        pass  # extrapolated point not admissible: keep the EM step
        p_new, e_new, o_new = cand
        dtheta = np.max(np.abs(packer.pack(p_new) - packer.pack(p)), initial=0.0)
        rel = abs(o_new - obj) / max(1.0, abs(obj))
        p, e, obj = p_new, e_new, o_new
        trace.append((n, obj, e.loglik, elapsed(), step))
        if rel < tol and dtheta < param_tol:
            status, message = "converged", f"converged after {n} E-steps"
            break
    return EMOutcome(params=p, estep=e, objective=obj, n_estep=n, status=status, message=message,
                     trace=tuple(trace))
