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
#: 1e-4 to reach the same optimum).  1e-3, measured 2026-12-03 with the active-set finish, is not
#: kept: on 12 simulated panels and spec variants it took a median 147 E-steps against 239 at the
#: same optimum, but on 18 fits of Fama-French portfolio sets it ended in a worse local optimum in 4
#: (by 0.22, 0.64, 1.4 and 14) and a better one only by up to 2e-3; EM's longer path to the
#: hand-over keeps the fit in its start's basin more often.
HANDOVER = 1e-4
#: L-BFGS-B iterations over which the gain must stay below ``loglik_tol`` (active-set finish).
GAIN_WINDOW = 3
#: Rounds of the active-set finish (each after a pinned variance was released).
MAX_ROUNDS = 50
#: L-BFGS-B correction pairs in the active-set finish: with 100-400 free parameters of very
#: different curvature, 100 pairs took 0.6-0.9x the E-steps of 20 on the benchmark panels.
MAXCOR = 100


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
           bounds=None, extrapolate: bool = True, project=None, progress=None,
           loglik_tol: float | None = None, stopping: str = "gain-model", cap=None,
           keep: dict | None = None, em_estep=None) -> EMOutcome:
    """Iterate to a stationary point of the objective (log-likelihood plus log prior).

    ``estep(p) -> EStep``, ``mstep(e, p) -> Params``, ``objective(e, p) -> float``;
    ``score(e, p) -> (n_theta,)`` enables the quasi-Newton finish, within ``bounds`` (a list of
    (low, high) per packed parameter), which also clip SQUAREM's extrapolation;
    ``extrapolate=False`` turns SQUAREM off; ``project(p) -> Params`` maps an extrapolated point
    onto a constraint that is not a box (the M-step's own projection), so SQUAREM can run there
    too.  ``max_iter`` bounds the number of E-steps.
    ``progress(n_estep, objective)`` is called after every accepted step.
    ``loglik_tol`` (log-likelihood units) selects the active-set finish and its stopping rule
    (:func:`_active_set_finish`); None is the legacy finish (:func:`_quasi_newton`).
    ``stopping`` is the active-set finish's rule ("gain-model" or "gradient", ``ModelSpec.stopping``).
    ``cap = (cap, q_floor (N,))``: one premium factor under ``Lambda_i^2 + q_i <= cap``; the
    active-set finish works in coordinates where that bound is a box (:class:`_Coords`; the
    legacy finish never gets it: ``panel.model.fit._quasi_newton_setup``).
    ``keep``: a dict the active-set finish fills with its last round's coordinates and curvature
    pairs (``coords``, ``curvature``), for a finish that goes on from them (:mod:`panel.model.warm`).
    ``em_estep(p)``: the E-step of the EM and SQUAREM steps, whose score is never taken (cheaper:
    without the score's terms, same log-likelihood and moments); the E-step at the hand-over
    point and the one returned are then redone by ``estep``, not counted again (the same point).
    """
    accelerate = accelerate and extrapolate
    step_e = estep if em_estep is None else em_estep

    def scored(p, e):
        return e if em_estep is None else estep(p)
    lo = hi = None
    if bounds is not None:
        lo = np.array([-np.inf if b[0] is None else b[0] for b in bounds])
        hi = np.array([np.inf if b[1] is None else b[1] for b in bounds])
    start = time.perf_counter()
    p, e = p0, step_e(p0)
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
        e1 = step_e(p1)
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
            e2 = step_e(p2)
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
                        ee = step_e(pe)
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
            e = scored(p, e)
            remaining = None if time_budget is None else time_budget - elapsed()
            if loglik_tol is None:
                p, e, obj, n, status, message = _quasi_newton(
                    p, e, obj, n, estep, objective, score, packer, bounds, max_iter, remaining,
                    trace, elapsed)
            else:
                p, e, obj, n, status, message = _active_set_finish(
                    p, e, obj, n, estep, objective, score, packer, bounds, max_iter, remaining,
                    trace, elapsed, loglik_tol, stopping, cap, keep)
            return EMOutcome(params=p, estep=e, objective=obj, n_estep=n, status=status,
                             message=message, trace=tuple(trace))
    return EMOutcome(params=p, estep=scored(p, e), objective=obj, n_estep=n, status=status,
                     message=message, trace=tuple(trace))


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


def _lbfgs_outcome(res, n: int, converged_message: str) -> tuple[str, str]:
    """(status, message) of an L-BFGS-B run that ended by itself after ``n`` E-steps."""
    if res.success:
        return "converged", converged_message
    if res.status == 1:             # L-BFGS-B ran out of function evaluations
        return "max_iter", f"quasi-Newton finish stopped: {res.message}"
    # e.g. its line search found no increase: not a budget stop
    return "stalled", (f"quasi-Newton finish stopped after {n} E-steps without meeting its tolerance "
                       f"({res.message.strip(': ')}); result kept at the best point")


def _budget_outcome(stop: Exception, n: int) -> tuple[str, str]:
    status = str(stop)
    return status, (f"stopped after {n} E-steps without meeting the tolerance" if status == "max_iter"
                    else "stopped by the time budget")


def _charge(count: dict, max_iter: int, time_left, spent: float) -> None:
    """Count one more E-step of a quasi-Newton finish, or stop it at the E-step or time budget."""
    if count["n"] >= max_iter:
        raise _OutOfTime("max_iter")
    if time_left is not None and spent > time_left:
        raise _OutOfTime("time_budget")
    count["n"] += 1


def _quasi_newton(p, e, obj, n, estep, objective, score, packer, bounds, max_iter, time_left,
                  trace, elapsed):
    """L-BFGS-B on the objective with the Fisher-identity score; keeps the best point evaluated.
    The legacy finish (``ModelSpec.loglik_tol=None``, runs stored before it existed).

    Converged means L-BFGS-B's own test passed: the projected gradient of the objective (scaled
    by its magnitude) below 1e-10, with variances at their floor counting as on a bound.
    """
    from scipy import optimize

    best = {"p": p, "e": e, "obj": obj}
    count = {"n": n}
    t_start = elapsed()
    co = _Coords(packer.pack(p), packer, bounds)
    scale = max(1.0, abs(obj))

    def f(x):
        _charge(count, max_iter, time_left, elapsed() - t_start)
        try:
            pp = packer.unpack(co.theta(x), p)
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
        return -oo / scale, -co.gradient(x, grad) / scale

    try:
        res = optimize.minimize(f, co.x0, jac=True, method="L-BFGS-B", bounds=co.xbounds,
                                options={"maxfun": max(1, max_iter - n), "ftol": 1e-15, "gtol": 1e-10,
                                         "maxcor": 20})
        status, message = _lbfgs_outcome(res, count["n"],
                                         f"converged after {count['n']} E-steps (quasi-Newton finish)")
    except _OutOfTime as stop:
        status, message = _budget_outcome(stop, count["n"])
    return best["p"], best["e"], best["obj"], count["n"], status, message


class _Coords:
    """The quasi-Newton finish's coordinates ``x`` of the packed vector ``theta``.

    Raw entries (loadings) are scaled by their magnitude, and log entries turned back into standard
    deviations ``s = exp(theta / a)`` scaled by their start value.  In logs a variance heading for
    zero is an endless flat road; in ``s`` it reaches its bound in a few steps.  A unit change of
    any ``x`` is thus a change of the parameter by about its own size.

    ``cap = (cap, q_floor)`` with one premium factor: the bound ``Lambda_i^2 + q_i <= cap`` is not
    a box in ``(Lambda_i, q_i)``, so each asset with a free ``q_i`` gets the coordinates
    ``x_t = sqrt(t_i / cap)`` in ``[0, sqrt(1 - floor_i / cap)]`` and ``rho_i`` in ``[-1, 1]``, with

        Lambda_i = sqrt(cap) x_t rho,      q_i = floor_i + cap x_t^2 (1 - rho^2)

    (``t_i = Sigma_ii - floor_i``: the cap is ``x_t`` at its top, the own variance at its floor is
    ``rho = +-1``), in place of its loading and log variance; a fixed ``q_i`` bounds the loading
    alone, ``|Lambda_i| <= sqrt(cap - q_i)``.  L-BFGS-B handles these bounds itself (they are not
    pinned or released by the active set).
    """

    def __init__(self, theta0: np.ndarray, packer: Packer, bounds, cap=None):
        a = packer.log_power()
        logs = a > 0
        d = np.ones(theta0.size)
        mag = np.abs(theta0[~logs])
        if (~logs).any():
            d[~logs] = np.maximum(mag, np.median(mag[mag > 0]) if (mag > 0).any() else 1.0)
        d[logs] = np.exp(theta0[logs] / a[logs])
        self.a, self.logs, self.d = a, logs, d
        xbounds = []
        for j, (lo, hi) in enumerate(bounds if bounds is not None else [(None, None)] * theta0.size):
            if logs[j]:
                lo = np.exp(lo / a[j]) / d[j] if lo is not None else 1e-12
                hi = np.exp(hi / a[j]) / d[j] if hi is not None else None
            else:
                lo = None if lo is None else lo / d[j]
                hi = None if hi is None else hi / d[j]
            xbounds.append((lo, hi))
        self.floored = logs & np.array([b[0] is not None for b in bounds]) if bounds is not None \
            else np.zeros(theta0.size, bool)
        x0 = theta0 / d
        x0[logs] = 1.0
        self.pairs = None
        self.plain = logs.copy()            # log entries mapped one by one
        if cap is not None:
            self._cap_box(theta0, packer, *cap, x0, xbounds)
            self.plain[self.pairs[1]] = False
        self.xbounds = xbounds
        self.lower = np.array([-np.inf if b[0] is None else b[0] for b in xbounds])
        self.upper = np.array([np.inf if b[1] is None else b[1] for b in xbounds])
        self.x0 = np.clip(x0, self.lower, self.upper)

    def _cap_box(self, theta0, packer, cap, floor, x0, xbounds):
        """Replace each free ``(Lambda_i, log q_i)`` by ``(x_t, rho)`` (class docstring)."""
        n_lam = int(packer.lam_free.sum())
        free = np.flatnonzero(packer.free_q)
        jl, jq = free, n_lam + np.arange(free.size)        # k = 1: one loading per asset
        f = np.asarray(floor, float)[free]
        lam, q = theta0[jl], np.exp(theta0[jq])
        t = np.clip(lam ** 2 + q - f, 0.0, cap - f)
        x0[jl] = np.sqrt(t / cap)
        with np.errstate(invalid="ignore", divide="ignore"):
            x0[jq] = np.clip(np.where(t > 0, lam / np.sqrt(t), 0.0), -1.0, 1.0)
        for j, top in zip(jl, np.sqrt(1.0 - f / cap)):
            xbounds[j] = (0.0, float(top))
        for j in jq:
            xbounds[j] = (-1.0, 1.0)
        self.floored[jq] = False
        fixed = np.flatnonzero(~packer.free_q)
        q_fixed = packer.rs.fixed_q
        for i in fixed:
            reach = np.sqrt(max(cap - q_fixed[i], 0.0)) / self.d[i]
            xbounds[i] = (-reach, reach)
        self.pairs = (jl, jq, np.sqrt(cap), f)

    def coordinates(self, theta: np.ndarray) -> np.ndarray:
        """The inverse of :meth:`theta`: ``x`` of another packed vector (clipped into the box)."""
        x = theta / self.d
        plain = self.plain
        x[plain] = np.exp(theta[plain] / self.a[plain]) / self.d[plain]
        if self.pairs is not None:
            jl, jq, c, f = self.pairs
            lam, q = theta[jl], np.exp(theta[jq])
            t = np.maximum(lam ** 2 + q - f, 0.0)
            x[jl] = np.sqrt(t) / c
            with np.errstate(invalid="ignore", divide="ignore"):
                x[jq] = np.where(t > 0, lam / np.sqrt(t), 0.0)
        return np.clip(x, self.lower, self.upper)

    def theta(self, x: np.ndarray) -> np.ndarray:
        theta = x * self.d
        plain = self.plain
        theta[plain] = self.a[plain] * np.log(theta[plain])
        if self.pairs is not None:
            jl, jq, c, f = self.pairs
            xt, rho = x[jl], x[jq]
            theta[jl] = c * xt * rho
            theta[jq] = np.log(f + c * c * xt * xt * (1.0 - rho * rho))
        return theta

    def gradient(self, x: np.ndarray, g: np.ndarray) -> np.ndarray:
        """The objective's gradient in ``x`` from its gradient ``g`` in ``theta`` (chain rule)."""
        out = self.d * g
        plain = self.plain
        out[plain] = self.a[plain] / x[plain] * g[plain]
        if self.pairs is not None:
            jl, jq, c, f = self.pairs
            xt, rho = x[jl], x[jq]
            q = f + c * c * xt * xt * (1.0 - rho * rho)
            g_lam, g_logq = g[jl], g[jq]
            out[jl] = g_lam * c * rho + g_logq * 2.0 * c * c * xt * (1.0 - rho * rho) / q
            out[jq] = g_lam * c * xt - g_logq * 2.0 * c * c * xt * xt * rho / q
        return out

    def at_floor(self, x: np.ndarray) -> np.ndarray:
        """Log entries (variances, log-Cholesky diagonals) at their finite lower bound."""
        return self.floored & (x <= self.lower * (1 + 1e-12))


class _Curvature:
    """The log-likelihood's curvature as L-BFGS sees it: the last ``most`` secant pairs of the
    accepted iterates, in the finish's coordinates (Nocedal & Wright 2006, Numerical Optimization,
    2nd ed., Algorithm 7.4, the two-loop recursion)."""

    def __init__(self, most: int):
        self.most, self.pairs, self.prev = most, [], None

    def add(self, x: np.ndarray, grad: np.ndarray) -> None:
        """Record the accepted iterate ``x`` with the objective's gradient there (ascent)."""
        if self.prev is not None:
            s, y = x - self.prev[0], self.prev[1] - grad       # y = change of the minimised gradient
            sy = float(s @ y)
            if sy > 1e-12 * float(np.linalg.norm(s) * np.linalg.norm(y)):  # curvature condition
                self.pairs = (self.pairs + [(s, y, 1.0 / sy)])[-self.most:]
        self.prev = (x.copy(), grad.copy())

    def widened(self, free: np.ndarray) -> "_Curvature":
        """A copy whose pairs live in the full coordinate vector (zero where ``free`` is False)."""
        out = _Curvature(self.most)
        for s, y, rho in self.pairs:
            S, Y = np.zeros(free.size), np.zeros(free.size)
            S[free], Y[free] = s, y
            out.pairs.append((S, Y, rho))
        return out

    def step(self, g: np.ndarray) -> np.ndarray:
        """The quasi-Newton ascent step ``B^{-1} g`` (two-loop recursion; L-BFGS's own initial
        matrix, the last pair's ``s'y / y'y``); ``g`` itself before any pair."""
        if not self.pairs:
            return g.astype(float).copy()
        s, y, _ = self.pairs[-1]
        return self._apply(g, float(s @ y) / float(y @ y))

    def remaining_gain(self, g: np.ndarray) -> float:
        """``g' B^{-1} g / 2``: the gain a Newton step on the quadratic model would still make
        (log-likelihood units) from the projected gradient ``g``; infinite without curvature yet."""
        if not self.pairs:
            return np.inf
        # initial matrix: the flattest curvature seen (largest s'y / y'y), not the last pair's as in
        # L-BFGS's own steps, so directions the pairs have not explored are not assumed stiff
        gamma = max(1.0 / (rho * float(y @ y)) for s, y, rho in self.pairs)
        return 0.5 * float(g @ self._apply(g, gamma))

    def _apply(self, g: np.ndarray, gamma: float) -> np.ndarray:
        """``B^{-1} g`` with initial matrix ``gamma I`` (Nocedal & Wright Algorithm 7.4)."""
        q, alphas = g.astype(float).copy(), []
        for s, y, rho in reversed(self.pairs):
            a = rho * float(s @ q)
            alphas.append(a)
            q -= a * y
        q *= gamma
        for (s, y, rho), a in zip(self.pairs, reversed(alphas)):
            q += (a - rho * float(y @ q)) * s
        return q


class _Converged(Exception):
    """Raised from the L-BFGS-B callback when the active-set finish's stopping rule holds."""


def _active_set_finish(p, e, obj, n, estep, objective, score, packer, bounds, max_iter, time_left,
                       trace, elapsed, loglik_tol, stopping="gain-model", cap=None, keep=None):
    """L-BFGS-B with the Fisher-identity score on the variances not pinned at their floor.

    Active set: a variance at its floor whose score (d objective / d log variance, free from the
    E-step by Fisher's identity) is not positive is pinned there and dropped from the free vector.
    One that reaches its floor during a run is held there by L-BFGS-B's own bound handling while
    its projected gradient points outwards (restarting L-BFGS-B to drop it at once discards the
    curvature pairs: measured 1.6-5x the E-steps).  When the stopping rule holds, the scores of the
    variances at their floor are checked: a positive one (the objective increases away from the
    floor) is released (raised to a trial level accepted only if the objective increases), and the
    finish runs again with the others pinned; otherwise the fit has converged.

    Stops (converged) when the objective gained less than ``loglik_tol`` (log-likelihood units) over
    the last ``GAIN_WINDOW`` L-BFGS-B iterations, the gain still to be had by a Newton step on
    L-BFGS's own quadratic model (:class:`_Curvature`) is below ``loglik_tol`` too, and no free
    coordinate's projected gradient exceeds ``10 loglik_tol`` (a change of the parameter by its own
    size gains less than that at first order).  The model's estimate keeps flat problems honest (on
    the Nile data the gain test alone stopped with the variances 2e-5, relative, off statsmodels'
    optimum); the gradient test covers directions the model has not explored (without it, or with
    ``sqrt(loglik_tol)``, a just-released variance stopped 2e-4 short).  The earlier rule, projected
    gradient below ``loglik_tol`` itself, held stiff coordinates to far more than that gain: on the
    N=100 benchmark panel it spent its last 33 E-steps (of 273) gaining less than 1e-6 in all
    (the two rules' optima agree to the sixth decimal there); it remains
    as ``stopping="gradient"`` for runs stored before the model rule.
    """
    from scipy import optimize

    best = {"p": p, "e": e, "obj": obj}
    count = {"n": n}
    t_start = elapsed()
    scale = max(1.0, abs(obj))
    status = message = None
    for _ in range(MAX_ROUNDS):
        co = _Coords(packer.pack(best["p"]), packer, bounds, cap)
        like = best["p"]
        g0 = score(best["e"], best["p"])
        pinned = co.at_floor(co.x0) & (g0 <= 0)
        free = ~pinned
        x_full = co.x0.copy()
        last = {}

        def full(xs):
            x = x_full.copy()
            x[free] = xs
            return x

        def f(xs):
            _charge(count, max_iter, time_left, elapsed() - t_start)
            x = full(xs)
            try:
                pp = packer.unpack(co.theta(x), like)
                ee = estep(pp)
                oo = objective(ee, pp)
                grad = co.gradient(x, score(ee, pp))
            except (np.linalg.LinAlgError, FloatingPointError):
                # a trial point whose covariance is not numerically positive definite: worse than
                # anything seen, so the line search backs off
                return -best["obj"] / scale + 1.0, np.zeros_like(xs)
            if oo > best["obj"]:
                best.update(p=pp, e=ee, obj=oo)
                trace.append((count["n"], oo, ee.loglik, elapsed(), "quasi-newton"))
            last.update(x=xs.copy(), grad=grad[free])
            return -oo / scale, -grad[free] / scale

        history = [best["obj"]]
        lower, upper = co.lower[free], co.upper[free]
        curvature = _Curvature(MAXCOR)

        def callback(xs, *args):
            history.append(best["obj"])
            if "x" not in last or not np.array_equal(last["x"], xs):
                return
            g = last["grad"]
            curvature.add(xs, g)
            if len(history) > GAIN_WINDOW and history[-1] - history[-1 - GAIN_WINDOW] < loglik_tol:
                pg = np.where(((xs <= lower) & (g < 0)) | ((xs >= upper) & (g > 0)), 0.0, g)
                largest = np.max(np.abs(pg), initial=0.0)
                if (largest < loglik_tol if stopping == "gradient" else
                        largest < 10.0 * loglik_tol and curvature.remaining_gain(pg) < loglik_tol):
                    raise _Converged

        try:
            res = optimize.minimize(f, co.x0[free], jac=True, method="L-BFGS-B",
                                    bounds=[co.xbounds[j] for j in np.flatnonzero(free)],
                                    callback=callback,
                                    options={"maxfun": max(1, max_iter - count["n"]), "ftol": 0.0,
                                             "gtol": 1e-10, "maxcor": MAXCOR})
            status, message = _lbfgs_outcome(res, count["n"], "quasi-newton")
        except _Converged:
            status, message = "converged", "quasi-newton"
        except _OutOfTime as stop:
            status, message = _budget_outcome(stop, count["n"])
            break
        if keep is not None:
            keep.update(coords=co, curvature=curvature.widened(free))
        if status != "converged":
            break
        # release check: a variance at (or within a factor 2 of) its floor whose score is positive
        # is raised to the median level of its free peers (in s, EM and L-BFGS-B would only creep
        # away from the floor: both steps are proportional to its tiny s), halving towards the
        # floor (in logs) until the objective increases
        co = _Coords(packer.pack(best["p"]), packer, bounds, cap)
        g = score(best["e"], best["p"])
        near = co.floored & (co.x0 <= co.lower * np.sqrt(2.0))
        release = near & (g > 0)
        if not release.any() or count["n"] >= max_iter:
            break
        theta = packer.pack(best["p"])
        peers = theta[co.floored & ~near]
        target = np.median(peers) if peers.size else theta[release] + 2.0 * co.a[release]
        raised = False
        for frac in (1.0, 0.5, 0.25, 0.125):
            if count["n"] >= max_iter:
                break
            trial = theta.copy()
            trial[release] = theta[release] + frac * np.maximum(target - theta[release], 0.0)
            p1 = packer.unpack(trial, best["p"])
            e1 = estep(p1)
            o1 = objective(e1, p1)
            count["n"] += 1
            if o1 > best["obj"]:
                best.update(p=p1, e=e1, obj=o1)
                trace.append((count["n"], o1, e1.loglik, elapsed(), "release"))
                raised = True
                break
        if not raised:
            break
    if status == "converged":
        message = f"converged after {count['n']} E-steps (quasi-Newton finish with active set)"
    return best["p"], best["e"], best["obj"], count["n"], status, message
