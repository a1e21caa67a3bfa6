"""Exact fast path: dense filter up to the panel's final stretch, decoupled chains on the stretch.

The final stretch ``a..T-1`` is the longest run of last dates with one observed set ``O`` in which
no asset enters (a balanced panel is one stretch, ``a = 0``).  Assets active but unobserved there
(``U``: exited, or gapped to the end) are "dormant".  On the stretch (DESIGN §4):

* ``Sigma_OO v = d H_OO v`` with ``V' H_OO V = I``, ``V' Sigma_OO V = diag(d)``; ``z_t = V' y_{O,t}``
  are n_O independent scalar local levels ``alpha = V' mu_O`` with observation variance ``s_t^2``
  (valid with the volatility scale since ``H_t = s_t^2 H``); ``mu_O = W alpha`` with ``W = H V``.
* Each chain is smoothed from a diffuse start (:mod:`panel.kalman.chain`).  The information before
  the stretch is the dense filter's predicted state ``x = (f_a, mu_{A,a})`` ~ N(m, P) (or the
  informative initial prior); since a diffuse chain's start is flat, the exact posterior is that
  prior times the chains' start marginals ``N(alpha_a; mean_0, diag(first_var))``: one Kalman
  update of ``x`` with the pseudo-observation ``Z x = V' mu_{O,a}``.  Given ``alpha_a`` each chain
  is ``alpha_t = mean_t + g_t (alpha_a - mean_0) + noise``, so every moment is a sum of outer
  products of per-chain coefficient vectors plus one coupling matrix ``Z P* Z' - diag(first_var)``.
* Dormant levels never meet data again: ``w_U = B w_O + u`` (``B = Sigma_UO Sigma_OO^-1``) with
  ``u ~ N(0, Sigma_{U|O})`` independent of everything observed; factor shocks likewise
  ``eta = beta w_O + e`` with ``beta = Lambda_O' Sigma_OO^-1``, ``Var e = I - beta Lambda_O``.
* Log-likelihood: diffuse balanced panel ``sum_i loglik_i(z) + (T - 1) log|det V|`` (the flat
  start in z has ``P_inf = I`` where the dense path's has ``V'V``); with a prior ``sum_i
  loglik_i + (n_O / 2) log 2 pi + log N(mean_0; Z m, Z P Z' + diag(first_var)) + L log|det V|``.
* The dense smoother then runs backwards over the head from the stretch's smoothed first state.

Cost per E-step: the head's dense steps, plus O(n^3 + L n^2) (O(L^2 n) basis transforms when the
scale varies; FFTs when it is constant) on the stretch.
"""

from __future__ import annotations

import warnings

import numpy as np
from scipy import linalg

from panel.kalman import dense, impute
from panel.kalman.checkpoints import checkpoint_interval
from panel.kalman.chain import basis_for, filter_chains, smooth_chains, spectral
from panel.kalman.dense import LOG2PI, MomentGroup, _sym
from panel.kalman.types import EStep, Smoothed


def final_stretch_start(Y: np.ndarray) -> int:
    """First date ``a`` of the final stretch (T when there is none to decouple)."""
    obs = ~np.isnan(Y)
    T = obs.shape[0]
    if not obs[-1].any():
        return T
    change = np.flatnonzero((obs[1:] != obs[:-1]).any(axis=1))
    a = 0 if change.size == 0 else int(change[-1]) + 1
    if a > 0:
        a = max(a, int(dense.first_observations(Y).max()) + 1)
    return a if a < T else T


class StretchData:
    """The parameter-free part of the final stretch ``a..T-1`` of ``Y`` (T, N), built once per fit:
    observed set ``O``, the chains' basis and the data's coordinates ``spectral(Y[a:, O])``."""

    def __init__(self, Y: np.ndarray, s2: np.ndarray, a: int):
        self.a = a
        self.O = np.flatnonzero(~np.isnan(Y[-1]))
        self.s2 = s2[a:]
        self.basis = basis_for(self.s2)
        self.y = Y[a:, self.O]
        self.ytil = spectral(self.basis, self.y)


#: Smallest ``psi_i / H_ii`` for the O(n^2 r) reduction (below it, rounding grows like
#: ``(H_ii / psi_i)^(1/2)``; measured: 1e-6 still agrees with the Cholesky route to 2e-10).
WELL_SPREAD = 1e-4


def simultaneous_diagonalisation(S: np.ndarray, H: np.ndarray, h_parts=None):
    """``(d, V, W, log|det V|)`` with ``V' H V = I``, ``V' S V = diag(d)`` and ``W = H V``.

    ``h_parts = (B, psi)`` says ``H = B B' + diag(psi)`` (B (n, r), r >= 0): then ``H = R (I + b
    b') R`` with ``R = diag(psi)^{1/2}``, ``b = R^{-1} B``, and ``T = R^{-1} (I + b b')^{-1/2}``
    reduces the pencil in O(n^2 r) (``(I + b b')^{+-1/2}`` is the identity plus a rank-r term from
    the thin SVD of b); otherwise, or when some ``psi_i`` is tiny against ``H_ii`` (see
    ``WELL_SPREAD``), the Cholesky factor of H does it in O(n^3).  One symmetric eigenproblem.
    """
    if h_parts is not None and (np.min(h_parts[1]) <= 0 or (
            h_parts[0].shape[1] and np.min(h_parts[1] / np.diag(H)) < WELL_SPREAD)):
        h_parts = None              # a near-Heywood psi: R^{-1} b is huge and G cancels digits;
                                    # psi <= 0: let the Cholesky route say H is not definite
    if h_parts is None:
        Lc = linalg.cholesky(H, lower=True, check_finite=False)
        X = linalg.solve_triangular(Lc, S, lower=True, check_finite=False)
        C = linalg.solve_triangular(Lc, X.T, lower=True, check_finite=False)
        d, Q = linalg.eigh(_sym(C), driver="evd", check_finite=False)
        V = linalg.solve_triangular(Lc, Q, lower=True, trans="T", check_finite=False)
        return d, V, Lc @ Q, -np.log(np.diag(Lc)).sum()
    B, psi = h_parts
    r = np.sqrt(psi)
    X = S / np.outer(r, r)
    logdet_v = -np.log(r).sum()
    if B.shape[1] == 0:
        d, Q = linalg.eigh(_sym(X), driver="evd", check_finite=False)
        return d, Q / r[:, None], Q * r[:, None], logdet_v
    Qb, sb, _ = linalg.svd(B / r[:, None], full_matrices=False, check_finite=False)
    one = 1.0 + sb ** 2
    gm, gp = one ** -0.5 - 1.0, one ** 0.5 - 1.0              # (I + bb')^{-+1/2} = I + Qb g Qb'
    P = X @ Qb
    GX = X + (Qb * gm) @ P.T                                   # G X, G = (I + bb')^{-1/2}
    C = GX + ((P + (Qb * gm) @ (Qb.T @ P)) * gm) @ Qb.T        # G X G
    d, Q = linalg.eigh(_sym(C), driver="evd", check_finite=False)
    QbQ = Qb.T @ Q
    V = (Q + (Qb * gm) @ QbQ) / r[:, None]
    W = (Q + (Qb * gp) @ QbQ) * r[:, None]
    return d, V, W, logdet_v - 0.5 * np.log(one).sum()


def regression_on(SOO: np.ndarray, SOX: np.ndarray) -> np.ndarray:
    """``(SOO^{-1} SOX)'``: the regression of other components on the observed ones ``O`` (the
    dormant assets' premia, or the factors) under their covariance.  Raises ``LinAlgError`` when
    ``SOO`` is numerically singular (LAPACK's condition estimate below machine precision: the
    regression is then meaningless), so the caller falls back to the dense path, which never
    inverts it, instead of going on with a warning."""
    with warnings.catch_warnings():
        warnings.simplefilter("error", linalg.LinAlgWarning)
        try:
            return linalg.solve(SOO, SOX, assume_a="pos").T
        except linalg.LinAlgWarning as ill:
            raise linalg.LinAlgError(str(ill)) from None


class _Tail:
    """The final stretch solved at given parameters (see the module docstring).

    ``prior`` is None (diffuse balanced panel) or ``(m, P, A)``: the predicted state ``(f_a,
    mu_{A,a})`` (k factors first) at the stretch's first date ``a``.
    """

    def __init__(self, data: StretchData, Sigma, H, prior, Lambda, want_var, h_parts=None):
        N = Sigma.shape[0]
        self.data = data
        self.a, self.L, self.N = data.a, data.s2.size, N
        self.k = k = 0 if Lambda is None else Lambda.shape[1]
        self.O = O = data.O
        self.A = A = np.arange(N) if prior is None else prior[2]
        self.U = U = np.setdiff1d(A, O)
        nO = O.size
        SOO = Sigma[np.ix_(O, O)]
        parts = None if h_parts is None else (h_parts[0][O], h_parts[1][O])
        d, V, self.W, logdet_v = simultaneous_diagonalisation(SOO, H[np.ix_(O, O)], parts)
        self.d = np.maximum(d, 0.0)
        self.V = V                                          # mu_O = W alpha, W = V^{-T}
        self.s2 = data.s2
        self.basis = data.basis
        self.zeta = data.ytil @ V
        self.coupled = prior is not None
        ch = self.ch = smooth_chains(self.basis, self.zeta, self.d,
                                     want_g=prior is not None or want_var, want_var=want_var)
        if prior is None:
            # State x = alpha_a itself, posterior diag(first_var); f_a = 0 (the first date).
            self.loglik = ch.loglik.sum() + (self.L - 1) * logdet_v
            self.Z, self.EO = np.eye(nO), self.W
            self.EU, self.Ef = np.zeros((0, nO)), np.zeros((k, nO))
            self.m_star, self.P_star = ch.first_mean.copy(), np.diag(ch.first_var)
            self.delta = np.zeros(nO)
        else:
            m, P, _ = prior
            posO = k + np.searchsorted(A, O)
            self.Z = np.zeros((nO, m.size))
            self.Z[:, posO] = V.T
            self.EO = np.eye(m.size)[posO]
            self.EU = np.eye(m.size)[k + np.searchsorted(A, U)]
            self.Ef = np.eye(m.size)[:k]
            PZ = P @ self.Z.T
            cf = linalg.cho_factor(self.Z @ PZ + np.diag(ch.first_var), lower=True)
            resid = ch.first_mean - self.Z @ m
            Fr = linalg.cho_solve(cf, resid)
            self.m_star = m + PZ @ Fr
            self.P_star = _sym(P - PZ @ linalg.cho_solve(cf, PZ.T))
            self.loglik = (ch.loglik.sum() - np.log(np.diag(cf[0])).sum() - 0.5 * resid @ Fr
                           + self.L * logdet_v)
            self.delta = self.Z @ self.m_star - ch.first_mean
            self.coupling = _sym(self.Z @ self.P_star @ self.Z.T) - np.diag(ch.first_var)
        if U.size:
            self.B = regression_on(SOO, Sigma[np.ix_(O, U)])
            self.S_UgO = _sym(Sigma[np.ix_(U, U)] - self.B @ Sigma[np.ix_(O, U)])
        if k:
            self.beta = regression_on(SOO, Lambda[O])
            self.e_var = np.diag(np.eye(k) - self.beta @ Lambda[O])

    def _alpha_coords(self):
        """Coordinates of ``E[alpha_t | Y]``: the diffuse chains' plus ``g (alpha_a - mean_0)``."""
        ch = self.ch
        return ch.coef + ch.ghat * self.delta if self.coupled else ch.coef

    # ---------------------------------------------------------------- EM moments
    def groups(self, terms: bool = False):
        """(w groups, e groups) of the stretch: w over dates a+1..T-1, e over a..T-1; ``terms``:
        with their score terms (:meth:`premium_terms`; the shocks' are ``Me - L I``).

        Computed in the chains' basis (:class:`panel.kalman.chain.ChainMoments`): no transform
        back to dates.
        """
        ch, W, V, L = self.ch, self.W, self.V, self.L
        sl = np.sqrt(self.basis.lam)[:, None]
        A = self._alpha_coords()
        R = self.zeta - A
        Me = R.T @ R + np.diag(ch.sum_var_s2)
        if self.coupled:
            Me += (ch.ghat.T @ ch.ghat) * self.coupling
        RwO = ReO = None
        if terms:
            # Mw from its terms, D Rw D + (L - 1) D: the same sum, one Gram matrix as without
            Rw = self.premium_terms()
            Mw = self.d[:, None] * Rw * self.d[None, :]
            Mw[np.diag_indices_from(Mw)] += (L - 1) * self.d
            RwO, ReO = V @ Rw @ V.T, V @ (Me - L * np.eye(Me.shape[0])) @ V.T
        else:
            X = A * sl
            Mw = X.T @ X + np.diag(ch.sum_dvar)
            if self.coupled:
                G = ch.ghat * sl
                Mw += (G.T @ G) * self.coupling
        e_groups = [_group(self.O, self.N, L, W @ Me @ W.T, ReO)]
        if L < 2:
            return [], e_groups
        MwO = W @ Mw @ W.T
        if self.U.size:
            io, iu = np.searchsorted(self.A, self.O), np.searchsorted(self.A, self.U)
            M = np.zeros((self.A.size, self.A.size))
            BM = self.B @ MwO
            M[np.ix_(io, io)] = MwO
            M[np.ix_(iu, io)] = BM
            M[np.ix_(io, iu)] = BM.T
            M[np.ix_(iu, iu)] = BM @ self.B.T + (L - 1) * self.S_UgO
            MwO = M
            if terms:                       # the imputed U part adds nothing to the score
                R = np.zeros_like(M)
                R[np.ix_(io, io)] = RwO
                RwO = R
        return [_group(self.A, self.N, L - 1, MwO, RwO)], e_groups

    def premium_terms(self) -> np.ndarray:
        """The chains' premium-side score terms ``D^{-1} (Mw - (L-1) D) D^{-1}`` in the basis
        (``Mw`` the differences' moment, ``D = diag(d)``), formed without dividing by ``d``: with
        ``w_l = d / (d + lam_l)`` a smoothed coordinate over ``d`` is the data's over ``d + lam_l``
        (``lam_l > 0`` for l >= 1; the flat level l = 0 has no difference), and ``sum_l lam_l w_l -
        (L - 1) d = -d^2 sum_{l>=1} 1 / (d + lam_l)``.  Exact as ``d -> 0``, where the moment's own
        difference cancels every digit."""
        ch, lam = self.ch, self.basis.lam[1:, None]
        inv = 1.0 / (self.d[None, :] + lam)                   # (L-1, n)
        sl = np.sqrt(lam)
        z = self.zeta[1:]
        u0 = self.basis.u0[1:, None]
        if self.coupled:
            # alpha coordinates w (zeta + u0 c), c = s0 delta / first_var (ChainMoments.ghat)
            z = z + u0 * (self.basis.s[0] * self.delta / ch.first_var)[None, :]
        X = z * inv * sl
        Rw = X.T @ X - np.diag(inv.sum(axis=0))
        if self.coupled:
            G = u0 * inv * sl * (self.basis.s[0] / ch.first_var)[None, :]
            Rw += (G.T @ G) * self.coupling
        return Rw

    # ---------------------------------------------------------------- reporting
    def _moments(self, tau, alpha_t, g_t, r_t, m_x, P_x, ZPZ, cov=False):
        """Means and marginal variances of (mu_O, mu_U, f) at stretch date ``tau`` given
        ``alpha_t = alpha_mean + g_t (Z x - Z m_x) + noise(r_t)``, x ~ N(m_x, P_x), ``ZPZ = Z P_x Z'``
        (a 1-D diagonal when the chains are uncoupled)."""
        W = self.W
        Wg = W * g_t
        muO = W @ alpha_t
        if ZPZ.ndim == 1:
            varO = (W * W) @ (r_t + g_t ** 2 * ZPZ)
        else:
            varO = (W * W) @ r_t + np.einsum("ij,ij->i", Wg @ ZPZ, Wg)
        out = {"muO": muO, "varO": varO}
        rows = {}
        if self.U.size:
            BW = self.B @ W
            D = rows["U"] = self.EU - self.B @ self.EO + (BW * g_t) @ self.Z
            out["muU"] = self.EU @ m_x + self.B @ (muO - self.EO @ m_x)
            out["varU"] = (np.einsum("ij,jk,ik->i", D, P_x, D) + (BW * BW) @ r_t
                           + tau * np.diag(self.S_UgO))
        if self.k:
            bW = self.beta @ W
            D = self.Ef - self.beta @ self.EO + (bW * g_t) @ self.Z
            out["f"] = self.Ef @ m_x + self.beta @ (muO - self.EO @ m_x)
            out["fvar"] = np.einsum("ij,jk,ik->i", D, P_x, D) + (bW * bW) @ r_t + tau * self.e_var
        if cov:
            DO = Wg @ self.Z
            nOO = (W * r_t) @ W.T
            full = np.full((self.N, self.N), np.nan)
            full[np.ix_(self.O, self.O)] = DO @ P_x @ DO.T + nOO
            if self.U.size:
                DU = rows["U"]
                cUO = DU @ P_x @ DO.T + self.B @ nOO
                cUU = DU @ P_x @ DU.T + self.B @ nOO @ self.B.T + tau * self.S_UgO
                full[np.ix_(self.U, self.O)] = cUO
                full[np.ix_(self.O, self.U)] = cUO.T
                full[np.ix_(self.U, self.U)] = cUU
            out["cov"] = _sym(full)
        return out

    def report(self, Y, H, Sigma, prior, cov_at, only_cov=False):
        """Per-date arrays (L, N) and (L, k) on the stretch, plus full covariances at ``cov_at``;
        ``only_cov``: the dates of ``cov_at`` only (the others stay NaN; a cross-section needs one
        date, and every date costs O(N^2))."""
        L, N, k, a = self.L, self.N, self.k, self.a
        ch = self.ch
        arr = {key: np.full((L, N), np.nan) for key in ("fm", "fv", "sm", "sv", "pm", "pv", "iv", "inn")}
        for key in ("ffm", "ffv", "fsm", "fsv"):
            arr[key] = np.zeros((L, k))
        covs = {}
        g_path = ch.path(self.basis, ch.ghat)
        alpha = ch.path(self.basis, self._alpha_coords())
        r_s = ch.var - g_path ** 2 * ch.first_var
        fc = filter_chains(self.data.y @ self.V, self.s2, self.d)
        O, U = self.O, self.U
        if self.coupled:
            m, P, _ = prior
            PZ = P @ self.Z.T
            ZPZ = self.Z @ PZ
            ZPZ_s = self.coupling + np.diag(ch.first_var)          # Z P* Z'
        else:
            ZPZ_s = ch.first_var
        for tau in (sorted(t - a for t in cov_at if t >= a) if only_cov else range(L)):
            t = a + tau
            want_cov = t in cov_at
            sm = self._moments(tau, alpha[tau], g_path[tau], r_s[tau], self.m_star, self.P_star,
                               ZPZ_s, cov=want_cov)
            J, h, g = fc.J[tau], fc.h[tau], fc.g[tau]
            if self.coupled:
                cf = linalg.cho_factor(ZPZ + np.diag(1.0 / J), lower=True)
                FiZPZ = linalg.cho_solve(cf, ZPZ)
                m_x = m + PZ @ linalg.cho_solve(cf, h / J - self.Z @ m)
                P_x = _sym(P - PZ @ linalg.cho_solve(cf, PZ.T))
                ZPZ_f = _sym(ZPZ - ZPZ @ FiZPZ)
            else:
                m_x, P_x, ZPZ_f = h / J, np.diag(1.0 / J), 1.0 / J
            alpha_f = fc.c[tau] + g * (self.Z @ m_x)
            fm = self._moments(tau, alpha_f, g, fc.p[tau], m_x, P_x, ZPZ_f, cov=want_cov)
            for src, pre in ((fm, "f"), (sm, "s")):
                arr[pre + "m"][tau, O] = src["muO"]
                arr[pre + "v"][tau, O] = src["varO"]
                if U.size:
                    arr[pre + "m"][tau, U] = src["muU"]
                    arr[pre + "v"][tau, U] = src["varU"]
                if k:
                    arr["f" + pre + "m"][tau] = src["f"]
                    arr["f" + pre + "v"][tau] = src["fvar"]
            if want_cov:
                covs[t] = {"filtered": fm["cov"], "smoothed": sm["cov"]}
        A = self.A
        if self.coupled:
            arr["pm"][0, A] = m[k:]
            arr["pv"][0, A] = np.diag(P)[k:]
        arr["pm"][1:, A] = arr["fm"][:-1, A]
        arr["pv"][1:, A] = arr["fv"][:-1, A] + np.diag(Sigma)[A]
        arr["inn"][:, O] = Y[a:, O] - arr["pm"][:, O]
        arr["iv"][:, O] = arr["pv"][:, O] + self.s2[:, None] * np.diag(H)[O]
        if a == 0:                  # the dense path reports no prediction for the first date
            arr["pm"][0] = arr["pv"][0] = np.nan
        return arr, covs


def _group(members, N, count, M, score=None):
    mask = np.zeros(N, bool)
    mask[members] = True
    return MomentGroup(mask, count, _sym(M), score=None if score is None else _sym(score))


def _merge(*lists):
    """Sum moment groups with the same mask."""
    out = {}
    for groups in lists:
        for g in groups:
            key = g.mask.tobytes()
            if key in out:
                out[key] = impute.add_groups(out[key], g)
            else:
                out[key] = g
    return list(out.values())


def _prior(Y, Sigma, H, s2, init, Lambda, a, keep_every=None):
    """(dense head filter or None, prior at the stretch start or None)."""
    N = Y.shape[1]
    k = 0 if Lambda is None else Lambda.shape[1]
    if a > 0:
        flt = dense.dense_filter(Y, Sigma, H, s2, init=init, Lambda=Lambda, stop=a,
                                 keep_every=keep_every)
        return flt, flt.predict()
    if init is None:
        return None, None
    m0, v0 = init
    m = np.concatenate([np.zeros(k), np.full(N, float(m0))])
    P = linalg.block_diag(np.zeros((k, k)), v0 * np.eye(N))
    return None, (m, P, np.arange(N))


def stretch_smoother(Y, Sigma, H, scale2=None, *, init=None, Lambda=None, cov_at=(),
                     want_estep=True, want_report=True, data: StretchData | None = None,
                     h_parts=None, only_cov=False, bounded=False, terms=False,
                     head_terms: bool | None = None) -> Smoothed:
    """Same contract and result as :func:`panel.kalman.dense.dense_smoother` (to rounding).

    ``data`` : the final stretch's :class:`StretchData` (built here when None; a fit builds it
    once); ``h_parts = (B, psi)`` when ``H = B B' + diag(psi)`` (cheaper eigenproblem, see
    :func:`simultaneous_diagonalisation`); ``want_report=False`` skips the per-date arrays of the
    stretch (E-step only); ``only_cov=True`` fills the stretch's per-date arrays at ``cov_at`` only.
    ``bounded=True``: the dense dates before the stretch run like
    :func:`panel.kalman.dense.dense_smoother`'s ``bounded`` (O(sqrt(a) (k+N)^2) memory for them).
    ``terms``: the moment groups also carry the disturbance smoother's score terms (the stretch's
    from the chains, :meth:`_Tail.premium_terms`; the dense dates' as in ``dense_smoother``);
    ``head_terms`` (default ``terms``) for the dense dates alone.  The stretch's moments are built
    from its terms when it has them, the dense dates' never: ``terms=True, head_terms=False`` gives
    the same moments bit for bit, for less (an E-step whose score is not taken).
    """
    head_terms = terms if head_terms is None else head_terms
    Y = np.asarray(Y, dtype=float)
    Sigma = np.asarray(Sigma, dtype=float)
    H = np.asarray(H, dtype=float)
    T, N = Y.shape
    s2 = np.ones(T) if scale2 is None else np.asarray(scale2, dtype=float)
    a = final_stretch_start(Y) if data is None else data.a
    if a >= T:
        return dense.dense_smoother(Y, Sigma, H, s2, init=init, Lambda=Lambda, cov_at=cov_at,
                                    want_estep=want_estep, bounded=bounded, terms=head_terms)
    data = StretchData(Y, s2, a) if data is None else data
    cov_at = set(cov_at)
    keep = checkpoint_interval(a) if bounded else None
    flt, prior = _prior(Y, Sigma, H, s2, init, Lambda, a, keep_every=keep)
    try:
        tail = _Tail(data, Sigma, H, prior, Lambda, want_var=want_report, h_parts=h_parts)
    except linalg.LinAlgError:      # singular Sigma_OO with dormant assets or factors: dense copes
        return dense.dense_smoother(Y, Sigma, H, s2, init=init, Lambda=Lambda, cov_at=cov_at,
                                    want_estep=want_estep, bounded=bounded, terms=head_terms)
    k = tail.k
    loglik = tail.loglik
    w_groups, e_groups = tail.groups(terms) if want_estep else ([], [])
    head = None
    if flt is not None:
        loglik += flt.loglik
        rep = (flt.report_arrays(N) if want_report
               else dict.fromkeys(("fm", "fv", "pm", "pv", "ffm", "ffv")))
        head = dense._smooth(Y[:a], ~np.isnan(Y[:a]), s2[:a], k, flt.alive, flt.mf, flt.Pf,
                             flt.mp, flt.Pp, flt.loglik, flt.innov[:a], flt.innov_var[:a], rep,
                             cov_at={t for t in cov_at if t < a}, want_estep=want_estep,
                             terminal=(tail.m_star, tail.P_star, prior[0], prior[1], prior[2]),
                             fold_under=(Sigma, H) if bounded and want_estep else None,
                             terms=head_terms)
        if want_estep:
            w_groups = _merge(head.estep.w_groups, w_groups)
            e_groups = _merge(head.estep.e_groups, e_groups)
    estep = EStep(loglik, w_groups, e_groups) if want_estep else None
    if not want_report:
        nan_t = np.full((T, N), np.nan)
        return Smoothed(loglik, nan_t, nan_t, nan_t, nan_t, nan_t, nan_t, nan_t, nan_t,
                        *(np.zeros((T, k)),) * 4, estep=estep)
    arr, covs = tail.report(Y, H, Sigma, prior, cov_at, only_cov=only_cov)
    if head is not None:
        pairs = (("fm", head.filtered_mean), ("fv", head.filtered_var), ("sm", head.smoothed_mean),
                 ("sv", head.smoothed_var), ("pm", head.predicted_mean), ("pv", head.predicted_var),
                 ("inn", head.innovation), ("iv", head.innovation_var),
                 ("ffm", head.factor_filtered_mean), ("ffv", head.factor_filtered_var),
                 ("fsm", head.factor_smoothed_mean), ("fsv", head.factor_smoothed_var))
        arr = {key: np.concatenate([h_arr, arr[key]]) for key, h_arr in pairs}
        covs.update(head.covariances)
    return Smoothed(loglik=loglik, filtered_mean=arr["fm"], filtered_var=arr["fv"],
                    smoothed_mean=arr["sm"], smoothed_var=arr["sv"], predicted_mean=arr["pm"],
                    predicted_var=arr["pv"], innovation=arr["inn"], innovation_var=arr["iv"],
                    factor_filtered_mean=arr["ffm"], factor_filtered_var=arr["ffv"],
                    factor_smoothed_mean=arr["fsm"], factor_smoothed_var=arr["fsv"],
                    estep=estep, covariances=covs)
