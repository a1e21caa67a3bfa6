"""Dense reference Kalman filter and RTS smoother over the assets active at each date.

State at date t: ``x_t = (f_t, mu_t[A_t])`` — the k common factors (only when loadings are given,
for reporting) followed by the premia of the active assets ``A_t`` (those observed at least once up
to t), in asset order.  Transition is the identity with innovation covariance
``[[I_k, Lambda'], [Lambda, Sigma]]``; the factor is 0 at the first date.

Exact diffuse initialisation (Durbin & Koopman 2012, ch. 5): an asset's level carries no prior
information until its first observation.  At that date the entering assets E are handled exactly:
the returns of the continuing assets C update the existing state; the entering returns then pin
the new levels, ``mu_E = y_E - eps_E`` with ``eps_E | y_C`` Gaussian; they contribute only
``-0.5 log(2 pi)`` each to the log-likelihood — the convention of the univariate exact diffuse
filter of statsmodels.  With an informative prior instead, entrants join the state with that prior
and are updated like any other state.

This path is O(T (k + N)^3); it is the oracle that every faster path is checked against.
"""

from __future__ import annotations

from collections import defaultdict
from dataclasses import dataclass

import numpy as np
from scipy import linalg

from panel.kalman.types import EStep, MomentGroup, Smoothed

LOG2PI = float(np.log(2.0 * np.pi))


def first_observations(Y: np.ndarray) -> np.ndarray:
    """(N,) index of each asset's first observed date; raises if an asset is never observed."""
    obs = ~np.isnan(Y)
    if not obs.any(axis=0).all():
        raise ValueError("every asset needs at least one observation")
    return obs.argmax(axis=0)


def _sym(P: np.ndarray) -> np.ndarray:
    return 0.5 * (P + P.T)


def _solve_pd(A: np.ndarray, B: np.ndarray) -> np.ndarray:
    """A^{-1} B for symmetric positive (semi)definite A: Cholesky, pseudo-inverse only if singular."""
    if A.shape[0] == 0:
        return np.zeros_like(B)
    try:
        return linalg.cho_solve(linalg.cho_factor(A, lower=True, check_finite=False), B,
                                check_finite=False)
    except linalg.LinAlgError:
        return np.linalg.pinv(A, hermitian=True) @ B


def dense_smoother(Y, Sigma, H, scale2=None, *, init=None, Lambda=None, cov_at=(),
                   want_estep=True) -> Smoothed:
    """Filter and smooth the premium panel on the dense path.

    Parameters
    ----------
    Y : (T, N) excess returns, NaN = missing; every asset observed at least once.
    Sigma : (N, N) premium innovation covariance; H : (N, N) return-shock covariance.
    scale2 : (T,) squared volatility scale ``s_t^2`` (None = ones).
    init : None for the exact diffuse start, or ``(m0, v0)``: prior mean and variance (per period)
        of each asset's level at its first observation.
    Lambda : (N, k) loadings; when given, the common factors are carried in the state and reported.
    cov_at : date indices at which to return the full filtered and smoothed covariance of the premia.
    want_estep : also return the EM sufficient statistics.
    """
    Y = np.asarray(Y, dtype=float)
    T, N = Y.shape
    s2 = np.ones(T) if scale2 is None else np.asarray(scale2, dtype=float)
    flt = dense_filter(Y, Sigma, H, s2, init=init, Lambda=Lambda)
    out = _report_arrays(T, N, flt.k, flt.alive, flt.mf, flt.Pf, flt.mp, flt.Pp, H, s2)
    return _smooth(Y, ~np.isnan(Y), s2, flt.k, flt.alive, flt.mf, flt.Pf, flt.mp, flt.Pp,
                   flt.loglik, flt.innov, flt.innov_var, out, cov_at=set(cov_at),
                   want_estep=want_estep)


def joint_innovation_cov(Sigma, Lambda=None) -> np.ndarray:
    """(k+N, k+N) innovation covariance of the state ``(f, mu)``: ``[[I, Lambda'], [Lambda, Sigma]]``
    (factor shocks drive the premia through the loadings)."""
    N = Sigma.shape[0]
    k = 0 if Lambda is None else Lambda.shape[1]
    Q = np.zeros((k + N, k + N))
    Q[:k, :k] = np.eye(k)
    Q[k:, k:] = Sigma
    if k:
        Q[k:, :k] = Lambda
        Q[:k, k:] = Lambda.T
    return Q


@dataclass
class Filtered:
    """Dense filter output for dates ``0..stop-1``: per-date active assets, filtered and predicted
    state moments (state ``(f, mu[alive])``), log-likelihood and innovations; ``Q`` the joint
    innovation covariance."""

    k: int
    Q: np.ndarray
    alive: list
    mf: list
    Pf: list
    mp: list
    Pp: list
    loglik: float
    innov: np.ndarray
    innov_var: np.ndarray

    def predict(self):
        """(mean, cov, assets) of the state predicted for date ``stop`` from the last filtered one."""
        prev = self.alive[-1]
        idx = np.concatenate([np.arange(self.k), self.k + prev])
        return self.mf[-1], self.Pf[-1] + self.Q[np.ix_(idx, idx)], prev


def dense_filter(Y, Sigma, H, s2, *, init=None, Lambda=None, stop=None) -> Filtered:
    """Dense exact-diffuse filter over dates ``0..stop-1`` (all dates when ``stop`` is None); the
    arguments are those of :func:`dense_smoother` with ``s2`` the (T,) squared scale."""
    T, N = Y.shape
    stop = T if stop is None else stop
    Sigma = np.asarray(Sigma, dtype=float)
    H = np.asarray(H, dtype=float)
    k = 0 if Lambda is None else Lambda.shape[1]
    obs = ~np.isnan(Y)
    entry = first_observations(Y)
    Q = joint_innovation_cov(Sigma, Lambda)

    alive, mf, Pf, mp, Pp = [], [], [], [], []
    innov = np.full((T, N), np.nan)
    innov_var = np.full((T, N), np.nan)
    loglik = 0.0
    prev = np.zeros(0, dtype=int)
    m = np.zeros(k)
    P = np.zeros((k, k))
    fidx = np.arange(k)
    for t in range(stop):
        if t > 0:
            idx = np.concatenate([fidx, k + prev])
            P = P + Q[np.ix_(idx, idx)]
        mp.append(m)
        Pp.append(P)
        entering = np.flatnonzero(entry == t)
        observed = np.flatnonzero(obs[t])
        Ht = s2[t] * H
        state_assets = prev
        if init is not None and entering.size:
            m0, v0 = init
            m = np.concatenate([m, np.full(entering.size, m0)])
            P = linalg.block_diag(P, v0 * np.eye(entering.size))
            state_assets = np.concatenate([prev, entering])
            entering = entering[:0]
        posmap = np.full(N, -1)
        posmap[state_assets] = k + np.arange(state_assets.size)
        C = observed[posmap[observed] >= 0]
        pc = posmap[C]
        if C.size:
            v = Y[t, C] - m[pc]
            F = P[np.ix_(pc, pc)] + Ht[np.ix_(C, C)]
            cf = linalg.cho_factor(F, lower=True, check_finite=False)
            PZ = P[:, pc]
            Fiv = linalg.cho_solve(cf, v, check_finite=False)
            m = m + PZ @ Fiv
            P = _sym(P - PZ @ linalg.cho_solve(cf, PZ.T, check_finite=False))
            loglik -= 0.5 * (C.size * LOG2PI + 2.0 * np.log(np.diag(cf[0])).sum() + v @ Fiv)
            innov[t, C] = v
            innov_var[t, C] = np.diag(F)
        if entering.size:
            HEE = Ht[np.ix_(entering, entering)]
            if C.size:
                G = linalg.cho_solve(cf, Ht[np.ix_(C, entering)], check_finite=False).T  # H_EC F^-1
                mean_eps = G @ v
                cross = PZ @ G.T                       # Cov(x, mu_E) = -Cov(x, eps_E | y_C)
                V = _sym(HEE - G @ Ht[np.ix_(C, entering)])
            else:
                mean_eps = np.zeros(entering.size)
                cross = np.zeros((m.size, entering.size))
                V = HEE
            m = np.concatenate([m, Y[t, entering] - mean_eps])
            P = np.block([[P, cross], [cross.T, V]])
            state_assets = np.concatenate([state_assets, entering])
            loglik -= 0.5 * entering.size * LOG2PI
        order = np.argsort(state_assets, kind="stable")
        perm = np.concatenate([fidx, k + order])
        m = m[perm]
        P = P[np.ix_(perm, perm)]
        prev = state_assets[order]
        alive.append(prev)
        mf.append(m)
        Pf.append(P)

    return Filtered(k, Q, alive, mf, Pf, mp, Pp, loglik, innov, innov_var)


def _report_arrays(T, N, k, alive, mf, Pf, mp, Pp, H, s2):
    fm = np.full((T, N), np.nan)
    fv = np.full((T, N), np.nan)
    pm = np.full((T, N), np.nan)
    pv = np.full((T, N), np.nan)
    ffm = np.zeros((T, k))
    ffv = np.zeros((T, k))
    for t in range(T):
        a = alive[t]
        fm[t, a] = mf[t][k:]
        fv[t, a] = np.diag(Pf[t])[k:]
        ffm[t] = mf[t][:k]
        ffv[t] = np.diag(Pf[t])[:k]
        if t > 0:
            b = alive[t - 1]
            pm[t, b] = mp[t][k:]
            pv[t, b] = np.diag(Pp[t])[k:]
    return {"fm": fm, "fv": fv, "pm": pm, "pv": pv, "ffm": ffm, "ffv": ffv}


def _smooth(Y, obs, s2, k, alive, mf, Pf, mp, Pp, loglik, innov, innov_var, rep, cov_at, want_estep,
            terminal=None):
    """RTS smoother over the filtered dates of ``Y`` (T, N).  ``terminal = (ms, Ps, mp, Pp, alive)``
    gives the smoothed and predicted state at date T (after the last filtered one, from a faster
    path); the smoother then starts there, so the moments of ``w_T`` are included."""
    T, N = Y.shape
    sm = np.full((T, N), np.nan)
    sv = np.full((T, N), np.nan)
    fsm = np.zeros((T, k))
    fsv = np.zeros((T, k))
    w_sum = defaultdict(lambda: [None, 0, None])
    e_sum = defaultdict(lambda: [None, 0, None])
    covs = {}

    def record(t, m, P):
        a = alive[t]
        sm[t, a] = m[k:]
        sv[t, a] = np.diag(P)[k:]
        fsm[t] = m[:k]
        fsv[t] = np.diag(P)[:k]
        if want_estep:
            O = np.flatnonzero(obs[t])
            if O.size:
                po = k + np.searchsorted(a, O)
                r = Y[t, O] - m[po]
                _accumulate(e_sum, O, N, (np.outer(r, r) + P[np.ix_(po, po)]) / s2[t])
        if t in cov_at:
            full_f = np.full((N, N), np.nan)
            full_s = np.full((N, N), np.nan)
            full_f[np.ix_(a, a)] = Pf[t][k:, k:]
            full_s[np.ix_(a, a)] = P[k:, k:]
            covs[t] = {"filtered": full_f, "smoothed": full_s}

    if terminal is None:
        ms, Ps = mf[T - 1], Pf[T - 1]
        record(T - 1, ms, Ps)
        last = T - 1
    else:
        ms, Ps, m_next, P_next, a_next = terminal
        alive, mp, Pp = alive + [a_next], mp + [m_next], Pp + [P_next]
        last = T
    for t in range(last, 0, -1):
        a_prev = alive[t - 1]
        pos = np.concatenate([np.arange(k), k + np.searchsorted(alive[t], a_prev)])
        J = _solve_pd(Pp[t], Pf[t - 1]).T                  # Pf_{t-1} Pp_t^{-1}
        ms_prev = mf[t - 1] + J @ (ms[pos] - mp[t])
        Ps_prev = _sym(Pf[t - 1] + J @ (Ps[np.ix_(pos, pos)] - Pp[t]) @ J.T)
        if want_estep:
            lag = Ps[:, pos] @ J.T                         # Cov(x_t, x_{t-1} | Y)
            a = pos[k:]
            b = k + np.arange(a_prev.size)
            cross = lag[np.ix_(a, b)] + np.outer(ms[a], ms_prev[b])
            M = (Ps[np.ix_(a, a)] + np.outer(ms[a], ms[a]) - cross - cross.T
                 + Ps_prev[np.ix_(b, b)] + np.outer(ms_prev[b], ms_prev[b]))
            _accumulate(w_sum, a_prev, N, M)
        ms, Ps = ms_prev, Ps_prev
        record(t - 1, ms, Ps)

    estep = None
    if want_estep:
        estep = EStep(loglik=loglik,
                      w_groups=[MomentGroup(v[0], v[1], _sym(v[2])) for v in w_sum.values()],
                      e_groups=[MomentGroup(v[0], v[1], _sym(v[2])) for v in e_sum.values()])
    return Smoothed(loglik=loglik, filtered_mean=rep["fm"], filtered_var=rep["fv"],
                    smoothed_mean=sm, smoothed_var=sv, predicted_mean=rep["pm"],
                    predicted_var=rep["pv"], innovation=innov, innovation_var=innov_var,
                    factor_filtered_mean=rep["ffm"], factor_filtered_var=rep["ffv"],
                    factor_smoothed_mean=fsm, factor_smoothed_var=fsv, estep=estep,
                    covariances=covs)


def _accumulate(groups, members, N, M):
    mask = np.zeros(N, bool)
    mask[members] = True
    key = mask.tobytes()
    g = groups[key]
    if g[0] is None:
        g[0], g[1], g[2] = mask, 1, M.copy()
    else:
        g[1] += 1
        g[2] += M
