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

from dataclasses import dataclass

import numpy as np
from scipy import linalg
from scipy.linalg.blas import dtrsm
from scipy.linalg.lapack import dpotrf

from panel.kalman import impute
from panel.kalman.checkpoints import BlockView, Recomputed, checkpoint_interval
from panel.kalman.types import EStep, MomentGroup, Smoothed

LOG2PI = float(np.log(2.0 * np.pi))
MAX_STEPS = 64      # filter steps (index work and blocks of H, one per pair of sets) kept for reuse
STEP_BYTES = 2 ** 26  # ... and at most about this much of their N x N blocks (two per step)


def steps_kept(n: int) -> int:
    """Filter steps (or pencils) kept for reuse with ``n`` state components: MAX_STEPS, fewer when
    their blocks would pass STEP_BYTES (N = 500: 33).  A dropped step is rebuilt from the same
    inputs (the same numbers); with isolated gaps few are ever reused."""
    return max(1, min(MAX_STEPS, int(STEP_BYTES // (16.0 * max(n, 1) ** 2))))


def first_observations(Y: np.ndarray) -> np.ndarray:
    """(N,) index of each asset's first observed date; raises if an asset is never observed."""
    obs = ~np.isnan(Y)
    if not obs.any(axis=0).all():
        raise ValueError("every asset needs at least one observation")
    return obs.argmax(axis=0)


def _sym(P: np.ndarray) -> np.ndarray:
    return 0.5 * (P + P.T)


def dense_smoother(Y, Sigma, H, scale2=None, *, init=None, Lambda=None, cov_at=(),
                   want_estep=True, bounded=False, terms=False) -> Smoothed:
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
    bounded : memory O(sqrt(T) (k+N)^2 + T (k+N)) instead of O(T (k+N)^2), the same numbers (bit
        for bit, the EM moments to rounding).  The covariances are kept every few dates and
        recomputed block by block for the backward pass (:func:`dense_filter`'s ``keep_every``;
        about one more forward pass); the E-step's moments are collapsed as they form
        (:class:`panel.kalman.impute.Folding`: valid for imputation under this ``Sigma`` and ``H``
        only).  A fit's E-steps and its final report set it beyond
        :data:`panel.kalman.paths.KEEP_ALL_BYTES`.
    terms : with ``want_estep`` (and no ``Lambda``), the premium innovations' moment groups also
        carry the disturbance smoother's score terms (:class:`panel.kalman.types.MomentGroup`'s
        ``score``; about 1.3-1.8x the E-step's CPU time).
    """
    Y = np.asarray(Y, dtype=float)
    T, N = Y.shape
    s2 = np.ones(T) if scale2 is None else np.asarray(scale2, dtype=float)
    flt = dense_filter(Y, Sigma, H, s2, init=init, Lambda=Lambda,
                       keep_every=checkpoint_interval(T) if bounded else None)
    return _smooth(Y, ~np.isnan(Y), s2, flt.k, flt.alive, flt.mf, flt.Pf, flt.mp, flt.Pp,
                   flt.loglik, flt.innov, flt.innov_var, flt.report_arrays(N), cov_at=set(cov_at),
                   want_estep=want_estep, fold_under=(Sigma, H) if bounded and want_estep else None,
                   terms=terms)


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


# ---------------------------------------------------------------- small exact kernels
# The per-date matrices are small (up to k + N), so the scipy wrappers' checks and the 2-D fancy
# indexing cost more than the arithmetic: call LAPACK/BLAS directly and index with slices
# wherever the positions are a contiguous run (the usual case: assets in entry order).

def _chol(A: np.ndarray) -> np.ndarray:
    """Lower Cholesky factor of the symmetric positive definite (n, n) ``A`` from its lower
    triangle, as a Fortran array whose upper triangle is left uncleared (only the lower is ever
    read).  Raises ``LinAlgError`` if ``A`` is not positive definite."""
    c, info = dpotrf(A, lower=1, clean=0)
    if info != 0:
        raise linalg.LinAlgError(f"matrix not positive definite (LAPACK dpotrf info={info})")
    return c


def _solve_right_pd(B: np.ndarray, A: np.ndarray) -> np.ndarray:
    """(m, n) ``B A^{-1}`` for symmetric positive (semi)definite (n, n) ``A``: two triangular
    solves with its Cholesky factor, the pseudo-inverse only if ``A`` is singular."""
    if A.shape[0] == 0:
        return np.zeros_like(B)
    try:
        c = _chol(A)
    except linalg.LinAlgError:
        return B @ np.linalg.pinv(A, hermitian=True)
    X = dtrsm(1.0, c, B, side=1, lower=1, trans_a=1)          # X L' = B (into a copy of B)
    return dtrsm(1.0, c, X, side=1, lower=1, overwrite_b=1)   # J L = X: J = B L^-T L^-1


def _compact(idx: np.ndarray):
    """Strictly increasing positions as a slice when they are one contiguous run (indexing then
    gives a view, not a copy), else the array itself."""
    n = idx.size
    if n and int(idx[-1]) - int(idx[0]) == n - 1:
        return slice(int(idx[0]), int(idx[0]) + n)
    return idx


def _sub(A: np.ndarray, rows, cols=None) -> np.ndarray:
    """``A[rows][:, cols]`` (``cols`` defaults to ``rows``) for indices from :func:`_compact`:
    a view when both are slices."""
    return A[rows][:, rows if cols is None else cols]


def _memo(build, most=None):
    """``build`` memoised on its arguments' bytes (index arrays and masks); with ``most``, only
    the ``most`` latest results are kept (the oldest is dropped first)."""
    cache = {}

    def get(*args):
        key = tuple(a.tobytes() for a in args)
        hit = cache.get(key)
        if hit is None:
            if most is not None and len(cache) >= most:
                del cache[next(iter(cache))]
            hit = cache[key] = build(*args)
        return hit
    return get


def _bordered(P: np.ndarray, D: np.ndarray) -> np.ndarray:
    """(n + e, n + e) block diagonal ``[[P, 0], [0, D]]``: a state joined by new components."""
    n = P.shape[0]
    out = np.zeros((n + D.shape[0],) * 2)
    out[:n, :n] = P
    out[n:, n:] = D
    return out


# ---------------------------------------------------------------- filter
@dataclass
class Filtered:
    """Dense filter output for dates ``0..stop-1``: per-date active assets, filtered and predicted
    state moments (state ``(f, mu[alive])``; ``Pf``, ``Pp`` possibly recomputed on reading, their
    diagonals ``vf``, ``vp`` always kept), log-likelihood and innovations; ``Q`` the joint
    innovation covariance."""

    k: int
    Q: np.ndarray
    alive: list
    mf: list
    Pf: list
    mp: list
    Pp: list
    vf: list
    vp: list
    loglik: float
    innov: np.ndarray
    innov_var: np.ndarray

    def report_arrays(self, N: int) -> dict:
        """Filtered and predicted means and variances as (stop, N) arrays (NaN where not active)
        and the factors' as (stop, k), from the kept means and diagonals (no covariance read)."""
        T, k = len(self.alive), self.k
        fm, fv, pm, pv = (np.full((T, N), np.nan) for _ in range(4))
        ffm, ffv = np.zeros((T, k)), np.zeros((T, k))
        for t in range(T):
            a = self.alive[t]
            fm[t, a] = self.mf[t][k:]
            fv[t, a] = self.vf[t][k:]
            ffm[t] = self.mf[t][:k]
            ffv[t] = self.vf[t][:k]
            if t > 0:
                b = self.alive[t - 1]
                pm[t, b] = self.mp[t][k:]
                pv[t, b] = self.vp[t][k:]
        return {"fm": fm, "fv": fv, "pm": pm, "pv": pv, "ffm": ffm, "ffv": ffv}

    def predict(self):
        """(mean, cov, assets) of the state predicted for date ``stop`` from the last filtered one."""
        prev = self.alive[-1]
        idx = np.concatenate([np.arange(self.k), self.k + prev])
        return self.mf[-1], self.Pf[-1] + self.Q[np.ix_(idx, idx)], prev


class _FilterStep:
    """The index work of one filter date, shared by every date with the same assets in the
    predicted state (``prev``) and the same observed assets (``observed``, sorted).

    The state after the date is ``(f, mu[alive])``; entrants (observed, not in ``prev``) join it:
    with a prior (``informative``) before the update, like any other state; diffusely after it,
    pinned by their own returns (the module docstring).
    """

    def __init__(self, prev, observed, k, Q, H, informative):
        self.Q = _sub(Q, _compact(np.concatenate([np.arange(k), k + prev])))
        posmap = np.full(H.shape[0], -1)                      # asset -> position in the state
        posmap[prev] = k + np.arange(prev.size)
        known = posmap[observed] >= 0
        entering = observed[~known]
        if informative:                                       # entrants join with the prior
            self.joined, self.E, self.C = entering, entering[:0], observed
            posmap[entering] = k + prev.size + np.arange(entering.size)
            pc = posmap[self.C]                               # increasing unless joined < prev
            self.pc = _compact(pc) if (pc[1:] > pc[:-1]).all() else pc
        else:                                                 # entrants join diffusely
            self.joined, self.E, self.C = entering[:0], entering, observed[known]
            self.pc = _compact(posmap[self.C])
        c, e = _compact(self.C), _compact(self.E)
        self.HCC, self.HEC, self.HEE = _sub(H, c), _sub(H, e, c), _sub(H, e)
        state = np.concatenate([prev, self.joined, self.E])
        self.alive, self.perm = state, None
        if (state[1:] < state[:-1]).any():                    # back to asset order
            order = np.argsort(state, kind="stable")
            self.alive = state[order]
            self.perm = np.concatenate([np.arange(k), k + order])

    def update(self, m, P, y, s2, init, innov, innov_var):
        """Filtered ``(m, P)`` over ``(f, mu[alive])`` from the predicted (n,) ``m``, (n, n) ``P``
        and the (N,) returns ``y`` with scale ``s2``; returns them with the log-likelihood
        contribution and writes the (N,) rows ``innov``, ``innov_var`` at the observed assets."""
        if self.joined.size:
            m = np.concatenate([m, np.full(self.joined.size, float(init[0]))])
            P = _bordered(P, init[1] * np.eye(self.joined.size))
        e = self.E.size
        loglik = -0.5 * e * LOG2PI
        if e:
            m = np.concatenate([m, y[self.E]])
            base = _bordered(P, s2 * self.HEE)
        else:
            base = P
        if self.C.size:
            # One triangular solve against F = L L' gives every term: with the rows
            # Z = [P_xC; -H_EC] L^-T and u = L^-1 v, the update of (x, mu_E = y_E - eps_E) is
            # mean += Z u, cov = diag(P, H_EE) - Z Z' (the cross block P_xC F^-1 H_CE is the
            # covariance of x with mu_E; D&K 2012 ch. 5 for the diffuse entry).
            n, p = P.shape[0], self.C.size
            v = y[self.C] - m[self.pc]
            F = _sub(P, self.pc) + s2 * self.HCC
            c = _chol(F)
            B = np.empty((n + e + 1, p), order="F")
            B[:n] = P[:, self.pc]
            B[n:n + e] = -s2 * self.HEC
            B[-1] = v
            X = dtrsm(1.0, c, B, side=1, lower=1, trans_a=1, overwrite_b=1)     # X L' = B
            Z, u = X[:-1], X[-1]
            m = m + Z @ u
            P = _sym(base - Z @ Z.T)
            loglik -= 0.5 * (p * LOG2PI + 2.0 * np.log(c.diagonal()).sum() + u @ u)
            innov[self.C] = v
            innov_var[self.C] = F.diagonal()
        else:
            P = base
        if self.perm is not None:
            m = m[self.perm]
            P = _sub(P, self.perm)
        return m, P, loglik


def dense_filter(Y, Sigma, H, s2, *, init=None, Lambda=None, stop=None, keep_every=None) -> Filtered:
    """Dense exact-diffuse filter over dates ``0..stop-1`` (all dates when ``stop`` is None); the
    arguments are those of :func:`dense_smoother` with ``s2`` the (T,) squared scale.

    ``keep_every = K`` keeps the covariances only every K dates (:class:`Recomputed`): ``Pf`` and
    ``Pp`` are then read-only sequences that rerun the filter a block at a time, with the same
    numbers, so that a backward pass holds O(T / K + K) N x N matrices instead of 2 T."""
    T, N = Y.shape
    stop = T if stop is None else stop
    H = np.asarray(H, dtype=float)
    k = 0 if Lambda is None else Lambda.shape[1]
    obs = ~np.isnan(Y)
    first_observations(Y)                                     # every asset is observed once
    Q = joint_innovation_cov(np.asarray(Sigma, dtype=float), Lambda)

    alive, mf, Pf, mp, Pp, vf, vp = [], [], [], [], [], [], []
    innov = np.full((T, N), np.nan)
    innov_var = np.full((T, N), np.nan)
    loglik = 0.0
    # a step holds blocks of H: with isolated gaps nearly every date has its own, so keep a few
    step_for = _memo(lambda prev, observed: _FilterStep(prev, np.flatnonzero(observed), k, Q, H,
                                                        init is not None), most=steps_kept(k + N))

    def advance(t, m, P, prev, innov_row, innov_var_row):
        """One date: (predicted P, step, filtered m, filtered P, log-likelihood term)."""
        step = step_for(prev, obs[t])
        if t > 0:
            P = P + step.Q
        m_new, P_new, ll = step.update(m, P, Y[t], s2[t], init, innov_row, innov_var_row)
        return P, step, m_new, P_new, ll

    def redo(t0, t1, m, P, prev):
        """(Pf, Pp) lists of dates t0..t1-1 from the filtered state before t0."""
        scratch = np.empty((2, N))
        filtered, predicted = [], []
        for t in range(t0, t1):
            P_pred, step, m, P, _ = advance(t, m, P, prev, scratch[0], scratch[1])
            prev = step.alive
            predicted.append(P_pred)
            filtered.append(P)
        return filtered, predicted

    ckpt = None
    if keep_every is not None:
        ckpt = Recomputed(int(keep_every), stop, redo)
        Pf, Pp = BlockView(ckpt, 0), BlockView(ckpt, 1)      # no cycle: freed with the views
    prev = np.zeros(0, dtype=int)
    m = np.zeros(k)
    P = np.zeros((k, k))
    for t in range(stop):
        if ckpt is not None and t % ckpt.K == 0:
            ckpt.starts.append((m, P, prev))
        mp.append(m)
        P_pred, step, m, P, ll = advance(t, m, P, prev, innov[t], innov_var[t])
        loglik += ll
        prev = step.alive
        alive.append(prev)
        mf.append(m)
        vp.append(P_pred.diagonal().copy())                  # copies: views would keep P alive
        vf.append(P.diagonal().copy())
        if ckpt is None:
            Pp.append(P_pred)
            Pf.append(P)

    return Filtered(k, Q, alive, mf, Pf, mp, Pp, vf, vp, loglik, innov, innov_var)


class _Appended:
    """``seq[t]`` for ``t < len(seq)``, then ``last``: one more item after a (read-only,
    possibly recomputed) sequence, without copying it."""

    def __init__(self, seq, last):
        self._seq, self._last, self._n = seq, last, len(seq)

    def __getitem__(self, t):
        return self._last if t == self._n else self._seq[t]


# ---------------------------------------------------------------- smoother
class _MomentSum:
    """Running ``sum_t E[x_t x_t' | Y]`` over the dates of one component set (``mask`` (N,)):
    the means are kept as rows and multiplied once at the end, the covariances summed as they
    come; ``lag`` terms ``L_t`` enter as ``-(L_t + L_t')`` (for differences ``x_t - x_{t-1}``).
    The first ``cov`` and ``lag`` passed are kept as the running sums: pass fresh arrays."""

    def __init__(self, mask):
        self.mask, self.rows, self.cov, self.lag, self.score = mask, [], None, None, None

    def add(self, mean, cov, lag=None, score=None):
        """``score``: this date's disturbance-smoother term ``r r' - N`` (None if not formed:
        the group then has none)."""
        first = not self.rows
        self.rows.append(mean)
        if first:
            self.cov, self.lag, self.score = cov, lag, score
        else:
            self.cov += cov
            if lag is not None:
                self.lag += lag
            self.score = None if score is None or self.score is None else self.score + score

    def reset(self):
        self.rows, self.cov, self.lag, self.score = [], None, None, None

    def group(self) -> MomentGroup:
        R = np.array(self.rows)
        M = R.T @ R + self.cov
        if self.lag is not None:
            M -= self.lag + self.lag.T
        return MomentGroup(self.mask, len(self.rows), _sym(M),
                           score=None if self.score is None else _sym(self.score))


def _disturbance_terms(Pp: np.ndarray, dm: np.ndarray, Ps: np.ndarray) -> np.ndarray:
    """``r r' - N`` of the state disturbance into a date (Durbin & Koopman 2012, ch. 4, disturbance
    smoothing) from the RTS moments: with predicted ``(a, Pp)`` and smoothed ``(a + dm, Ps)``, ``r =
    Pp^{-1} dm`` and ``N = Pp^{-1} (Pp - Ps) Pp^{-1}``. Dividing by ``Pp`` (filter uncertainty plus
    ``Sigma``) instead of ``Sigma`` keeps it exact as a variance in ``Sigma`` nears zero."""
    c = _chol(Pp)
    X = np.outer(dm, dm) - Pp + Ps
    Y = dtrsm(1.0, c, X, side=0, lower=1)                    # c^{-1} X
    Y = dtrsm(1.0, c, Y, side=0, lower=1, trans_a=1)         # Pp^{-1} X
    Y = dtrsm(1.0, c, np.ascontiguousarray(Y.T), side=0, lower=1)
    return dtrsm(1.0, c, Y, side=0, lower=1, trans_a=1)      # Pp^{-1} X' Pp^{-1} (X symmetric)


def _smooth(Y, obs, s2, k, alive, mf, Pf, mp, Pp, loglik, innov, innov_var, rep, cov_at, want_estep,
            terminal=None, fold_under=None, terms=False):
    """RTS smoother over the filtered dates of ``Y`` (T, N).  ``terminal = (ms, Ps, mp, Pp, alive)``
    gives the smoothed and predicted state at date T (after the last filtered one, from a faster
    path); the smoother then starts there, so the moments of ``w_T`` are included.
    ``fold_under = (Sigma, H)``: beyond :data:`panel.kalman.impute.MAX_GROUPS` component sets,
    the moments are collapsed as they form, imputed under ``Sigma`` (w) and ``H`` (eps)."""
    T, N = Y.shape
    scale = np.sqrt(s2)
    sm = np.full((T, N), np.nan)
    sv = np.full((T, N), np.nan)
    fsm = np.zeros((T, k))
    fsv = np.zeros((T, k))
    w_sum, e_sum = {}, {}
    covs = {}
    folds = {}                          # id of a sum dict -> [its Folding, number of live sums]
    if fold_under is not None:
        folds = {id(w_sum): [impute.Folding(fold_under[0]), 0],
                 id(e_sum): [impute.Folding(fold_under[1]), 0]}

    def add(sums, acc, *moment, score=None):
        """``acc.add(*moment, score=score)``; folds ``sums`` once too many of its sums are live."""
        fold = folds.get(id(sums))
        if fold is not None and not acc.rows:
            fold[1] += 1
            if fold[1] > impute.MAX_GROUPS and not fold[0].failed:
                live = [a for a in sums.values() if a.rows]
                if fold[0].fold([a.group() for a in live]):
                    for a in live:
                        a.reset()
                    fold[1] = 1
        acc.add(*moment, score=score)

    def groups(sums):
        fold = folds.get(id(sums))
        return [a.group() for a in sums.values() if a.rows] + (fold[0].done if fold else [])

    def moment_sum(sums, members):
        mask = np.zeros(N, bool)
        mask[members] = True
        key = mask.tobytes()
        if key not in sums:
            sums[key] = _MomentSum(mask)
        return sums[key]

    @_memo
    def w_step(a_prev, a_now):
        """Positions of the previous date's state in this date's (order (f, mu[alive])), and the
        moment sum of w over the previous date's assets."""
        pos = np.concatenate([np.arange(k), k + np.searchsorted(a_now, a_prev)])
        return _compact(pos), moment_sum(w_sum, a_prev)

    @_memo
    def e_step(a_now, observed):
        """Observed assets, their state positions and the moment sum of eps over them."""
        O = np.flatnonzero(observed)
        acc = moment_sum(e_sum, O) if O.size else None
        return O, _compact(k + np.searchsorted(a_now, O)), acc

    def record(t, m, P):
        a = alive[t]
        d = P.diagonal()
        sm[t, a] = m[k:]
        sv[t, a] = d[k:]
        fsm[t] = m[:k]
        fsv[t] = d[:k]
        if want_estep:
            O, po, acc = e_step(a, obs[t])
            if O.size:
                add(e_sum, acc, (Y[t, O] - m[po]) / scale[t], _sub(P, po) / s2[t])
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
        alive, mp, Pp = alive + [a_next], mp + [m_next], _Appended(Pp, P_next)
        last = T
    for t in range(last, 0, -1):
        pos, acc = w_step(alive[t - 1], alive[t])
        # J = Pf' Pp^-1; the transposed view of the C-ordered Pf is already in LAPACK's order
        J = _solve_right_pd(Pf[t - 1].T, Pp[t])
        ms_pos, Ps_pos = ms[pos], _sub(Ps, pos)
        ms_prev = mf[t - 1] + J @ (ms_pos - mp[t])
        # K = Cov(x_t, x_{t-1} | Y) = Ps_t J'; since Pp_t J' = Pf_{t-1}, the RTS update
        # Pf + J (Ps_t - Pp_t) J' is Pf + J (K - Pf): one product fewer
        K = Ps_pos @ J.T
        Ps_prev = _sym(Pf[t - 1] + J @ (K - Pf[t - 1]))
        if want_estep:                  # w_t = mu_t - mu_{t-1} over the previous date's assets
            add(w_sum, acc, ms_pos[k:] - ms_prev[k:], Ps_pos[k:, k:] + Ps_prev[k:, k:], K[k:, k:],
                score=_disturbance_terms(Pp[t], ms_pos - mp[t], Ps_pos) if terms and not k else None)
        ms, Ps = ms_prev, Ps_prev
        record(t - 1, ms, Ps)

    estep = None
    if want_estep:
        estep = EStep(loglik=loglik, w_groups=groups(w_sum), e_groups=groups(e_sum))
    return Smoothed(loglik=loglik, filtered_mean=rep["fm"], filtered_var=rep["fv"],
                    smoothed_mean=sm, smoothed_var=sv, predicted_mean=rep["pm"],
                    predicted_var=rep["pv"], innovation=innov, innovation_var=innov_var,
                    factor_filtered_mean=rep["ffm"], factor_filtered_var=rep["ffv"],
                    factor_smoothed_mean=fsm, factor_smoothed_var=fsv, estep=estep,
                    covariances=covs)
