"""Full conditional draws of the Gibbs sampler (pure functions of arrays and a numpy Generator).

Notation of DESIGN §2 in per-period units.  ``u_t = eps_t / s_t`` are the scaled return shocks
(``u_t ~ N(0, H)``), ``w_t = mu_t - mu_{t-1}`` the premium innovations, ``eta_t = f_t - f_{t-1}``
the factor innovations (``f_0 = 0``).  ``obs`` (T, N) marks observed returns; ``act`` (T-1, N) the
assets active at ``t-1`` (whose ``w_t`` exists).

Constraints (a fixed variance, the cap ``Lambda_i Lambda_i' + q_i <= cap``) are honoured by
Metropolis-within-Gibbs: a value is proposed from the unconstrained conditional and accepted only
when it satisfies the constraint (the target is the conditional truncated to the constraint set,
so the acceptance probability is the indicator — an exact step; a rejection keeps the value).

The premium parameters are drawn twice per sweep (ancillarity-sufficiency interweaving, Yu & Meng
2011; for state-space variances Fruhwirth-Schnatter & Wagner 2010, Kastner & Fruhwirth-Schnatter
2014): once given the paths ("centred": regression of ``w`` on ``eta``) and once given the
standardised own paths ``X_i = (a_i - a_i,entry) / sqrt(q_i)`` ("non-centred": regression of the
returns on ``[1, f, X_i]`` with coefficients ``(entry level, Lambda_i, +-sqrt(q_i))``).  The
centred step alone mixes slowly when the premium barely moves against the return noise — the
usual case — because a path drawn at a small ``q`` says ``q`` is small.
"""

from __future__ import annotations

import numpy as np
from scipy import stats

from panel.kalman.simsmooth import mask_groups, psd_root


def gaussian_batch(P: np.ndarray, b: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """(n, p) draws ``x_i ~ N(P_i^{-1} b_i, P_i^{-1})`` for (n, p, p) positive definite
    precisions ``P`` and (n, p) ``b``: ``x = L^{-T} (L^{-1} b + z)`` with ``P = L L'``."""
    L = np.linalg.cholesky(P)
    Lt = np.swapaxes(L, 1, 2)
    y = np.linalg.solve(L, b[..., None])[..., 0] + rng.standard_normal(b.shape)
    return np.linalg.solve(Lt, y[..., None])[..., 0]


def inverse_gamma(a, b, rng: np.random.Generator) -> np.ndarray:
    """Draws of ``IG(a, b)`` (density proportional to ``x^{-a-1} exp(-b / x)``)."""
    return np.asarray(b, float) / rng.gamma(np.asarray(a, float))


def latent_given_linear(x, L, d, rng):
    """Draws of ``z_t`` (n, m) given ``x_t = L z_t + e_t`` (rows of (n, p) ``x``), ``z_t ~ N(0,
    I_m)``, ``e_t ~ N(0, diag(d))``.  All ``d > 0``: precision form; a zero ``d`` (a fixed zero
    variance): covariance form with the pseudo-inverse of ``L L' + diag(d)``."""
    n, m = x.shape[0], L.shape[1]
    z = rng.standard_normal((n, m))
    if L.shape[0] == 0:
        return z
    if np.all(d > 0):
        P = np.eye(m) + L.T @ (L / d[:, None])
        Lc = np.linalg.cholesky(P)
        y = np.linalg.solve(Lc, ((x / d) @ L).T) + z.T           # (m, n)
        return np.linalg.solve(Lc.T, y).T
    S = L @ L.T + np.diag(d)
    beta = np.linalg.pinv(S, hermitian=True) @ L                  # (p, m): Cov(x, z) = L
    C = np.eye(m) - L.T @ beta
    return x @ beta + z @ psd_root(C).T


def factor_innovations(w, act, Lambda, q, rng) -> np.ndarray:
    """(T-1, k) draws of ``eta_t | w_t`` over the assets active at ``t-1`` (``w = Lambda eta +
    nu``, ``nu ~ N(0, diag(q))``); dates with no active asset draw from the prior."""
    eta = np.empty((w.shape[0], Lambda.shape[1]))
    for rows, cols in mask_groups(act):
        eta[rows] = latent_given_linear(w[np.ix_(rows, cols)], Lambda[cols], q[cols], rng)
    return eta


def return_factors(u, obs, B, psi, rng) -> np.ndarray:
    """(T, r) draws of the return factors ``g_t | u_{O_t}`` (``u = B g + e``, ``e ~ N(0,
    diag(psi))``), over the observed set of each date."""
    g = np.empty((u.shape[0], B.shape[1]))
    for rows, cols in mask_groups(obs):
        g[rows] = latent_given_linear(u[np.ix_(rows, cols)], B[cols], psi[cols], rng)
    return g


def regression_rows(x, weights, target, prior_precision, rng, own=None, extra=None) -> np.ndarray:
    """Per asset i a Gaussian regression draw: ``beta_i ~ N(P_i^{-1} b_i, P_i^{-1})`` with
    ``P_i = sum_t weights_ti z_ti z_ti' + diag(prior_precision_i)``, ``b_i = sum_t weights_ti z_ti
    target_ti`` and regressors ``z_ti = (x_t, own_ti)``: x (T, m) shared by all assets, ``own``
    (T, N) one more column per asset (or None); weights and target (T, N) (weight 0 where a cell
    does not count); prior_precision (N, p) (prior mean 0); ``extra = (P_add (N, p, p), b_add
    (N, p))`` further terms.  Built from BLAS products of the shared columns (no (T, N, p) array).
    """
    N, m = weights.shape[1], x.shape[1]
    p = m + (own is not None)
    wt = weights * target
    P = np.empty((N, p, p))
    b = np.empty((N, p))
    outer = (x[:, :, None] * x[:, None, :]).reshape(x.shape[0], m * m)
    P[:, :m, :m] = (weights.T @ outer).reshape(N, m, m)
    b[:, :m] = wt.T @ x
    if own is not None:
        wo = weights * own
        P[:, :m, m] = P[:, m, :m] = wo.T @ x
        P[:, m, m] = (wo * own).sum(axis=0)
        b[:, m] = (wt * own).sum(axis=0)
    if extra is not None:
        P += extra[0]
        b += extra[1]
    idx = np.arange(p)
    P[:, idx, idx] += prior_precision
    return gaussian_batch(P, b, rng)


def scale_move(latent, loadings, loading_sd, rng):
    """Rescale each factor column jointly: ``latent_j / c_j``, ``loadings_j c_j`` (the fit
    ``loadings latent'`` unchanged), ``c_j`` drawn from its conditional under the scale group
    (generalised Gibbs, Liu & Sabatti 2000).  With ``latent`` (n, m) standard normal a priori and
    loadings (p, m) ``N(0, loading_sd^2)``, ``gamma = c^2 ~ GIG((p - n) / 2, a = S_load /
    loading_sd^2, b = S_latent)``.  This moves the direction the two conditional draws can only
    creep along when many series pin the product down (a strong common return factor)."""
    s_lat, s_load = (latent ** 2).sum(axis=0), (loadings ** 2).sum(axis=0)
    ok = (s_lat > 0) & (s_load > 0)
    if not ok.any():
        return latent, loadings, np.ones(latent.shape[1])
    a, b = s_load[ok] / loading_sd ** 2, s_lat[ok]
    gamma = np.sqrt(b / a) * stats.geninvgauss.rvs(0.5 * (loadings.shape[0] - latent.shape[0]),
                                                   np.sqrt(a * b), random_state=rng)
    c = np.ones(latent.shape[1])
    c[ok] = np.sqrt(gamma)
    return latent / c, loadings * c, c


def return_loadings(u, obs, g, psi, b_sd, rng) -> np.ndarray:
    """(N, r) draws of the unrestricted return loadings ``B_i | g, u_i, psi_i`` (prior
    ``N(0, b_sd^2 I)``), over the asset's observed dates."""
    weights = np.where(obs, 1.0 / psi[None, :], 0.0)
    prior = np.full((u.shape[1], g.shape[1]), 1.0 / b_sd ** 2)
    return regression_rows(g, weights, np.where(obs, u, 0.0), prior, rng)


def idio_variances(resid, mask, a, b, rng) -> np.ndarray:
    """(N,) draws of ``IG(a + n_i / 2, b_i + SS_i / 2)`` from residuals (T, N) over ``mask``."""
    n = mask.sum(axis=0)
    ss = np.where(mask, resid, 0.0) ** 2
    return inverse_gamma(a + 0.5 * n, b + 0.5 * ss.sum(axis=0), rng)


def impute_shocks(u, obs, H, rng, precision: bool = False) -> np.ndarray:
    """(T, N) complete scaled shocks: observed cells kept, missing ones drawn from ``u_U | u_O``
    under ``H`` (data augmentation for the inverse-Wishart draw of a full ``H``, and for the gap
    cells of the sampler).

    ``precision=True`` conditions in precision form, ``u_U | u_O ~ N(-(P_UU)^-1 P_UO u_O,
    (P_UU)^-1)`` with ``P = H^-1`` inverted once: O(|U|^3 + |U| N) per date instead of O(N^3) per
    missing pattern, for few missing cells per date.  The covariance form (default) is kept because stored
    runs drew their shocks with it (another draw of the same distribution).
    """
    out = u.copy()
    N = H.shape[0]
    if precision:
        return _impute_precision(out, obs, H, rng)
    for rows, seen in mask_groups(obs):
        miss = np.setdiff1d(np.arange(N), seen)
        if miss.size == 0:
            continue
        if seen.size == 0:
            out[np.ix_(rows, miss)] = rng.standard_normal((rows.size, N)) @ psd_root(H).T
            continue
        Hoo = H[np.ix_(seen, seen)]
        G = np.linalg.solve(Hoo, H[np.ix_(seen, miss)]).T           # E[u_U | u_O] = G u_O
        cond = H[np.ix_(miss, miss)] - G @ H[np.ix_(seen, miss)]
        noise = rng.standard_normal((rows.size, miss.size)) @ psd_root(cond).T
        out[np.ix_(rows, miss)] = u[np.ix_(rows, seen)] @ G.T + noise
    return out


def _impute_precision(out, obs, H, rng) -> np.ndarray:
    """:func:`impute_shocks` in precision form, batched over the dates with the same number of
    missing cells (one stacked factorisation per count)."""
    P = np.linalg.inv(H)
    P = 0.5 * (P + P.T)
    n_miss = (~obs).sum(axis=1)
    for m in np.unique(n_miss[n_miss > 0]):
        rows = np.flatnonzero(n_miss == m)
        U = np.nonzero(~obs[rows])[1].reshape(rows.size, m)                 # missing columns
        PU = P[U]                                                            # (n, m, N)
        PUU = np.take_along_axis(PU, U[:, None, :], axis=2)                  # (n, m, m)
        rhs = np.einsum("rmj,rj->rm", PU, np.where(obs[rows], out[rows], 0.0))
        # PUU = L L': the draw is L^-T (xi - L^-1 rhs) (mean -PUU^-1 rhs, covariance PUU^-1)
        L = np.linalg.cholesky(PUU)
        z = rng.standard_normal((rows.size, m, 1)) - np.linalg.solve(L, rhs[..., None])
        out[rows[:, None], U] = np.linalg.solve(np.swapaxes(L, 1, 2), z)[..., 0]
    return out


def full_return_cov(u_complete, dof, scale, rng) -> np.ndarray:
    """(N, N) draw of a full ``H | u ~ IW(dof + T, scale + sum_t u_t u_t')``."""
    S = scale + u_complete.T @ u_complete
    H = stats.invwishart.rvs(df=dof + u_complete.shape[0], scale=S, random_state=rng)
    return np.atleast_2d(0.5 * (H + H.T))


def premium_variance_given_ss(ss, n, q_now, prior, rng) -> np.ndarray:
    """(N,) draws of own premium variances ``q_i`` given ``SS_i = sum nu^2`` over ``n_i`` innovations.

    invgamma prior: ``IG(q_a + n/2, q_b + SS/2)``.  halfnormal prior (``q ~ Gamma(1/2, rate 1/(2
    q_var))``): the conditional is generalised inverse Gaussian; an independence Metropolis step
    with the ``IG((n-1)/2, SS/2)`` proposal (the likelihood-and-Jacobian part) accepts with
    probability ``exp(-(q' - q) / (2 q_var))`` — nearly always, as ``q << q_var`` — and is much
    cheaper than a GIG draw; assets with fewer than two innovations use the GIG draw itself.
    """
    if prior.q_family == "invgamma":
        return inverse_gamma(prior.q_a + 0.5 * n, prior.q_b + 0.5 * ss, rng)
    out = q_now.copy()
    many = n >= 2
    prop = inverse_gamma(0.5 * (n[many] - 1), 0.5 * ss[many], rng)
    accept = np.log(rng.random(prop.size)) < -(prop - q_now[many]) / (2.0 * prior.q_var)
    out[np.flatnonzero(many)[accept]] = prop[accept]
    few = np.flatnonzero(~many)
    if few.size:            # GIG(p, a, b) ~ x^{p-1} exp(-(a x + b / x) / 2), p = (1 - n) / 2
        a, b = 1.0 / prior.q_var, np.maximum(ss[few], 1e-300)
        out[few] = np.sqrt(b / a) * stats.geninvgauss.rvs(0.5 * (1 - n[few]), np.sqrt(a * b),
                                                          random_state=rng)
    return out


def premium_centred(w, act, eta, Lambda, q, free_q, prior, cap, rng):
    """Centred draws of ``Lambda_i | q_i, w, eta`` then ``q_i | Lambda_i, w, eta`` (free ``q_i``).

    ``w`` (T-1, N) premium innovations (any value where ``act`` is False); returns new ``(Lambda,
    q)``.  A zero ``q_i`` makes ``Lambda_i`` a point mass given the paths: kept.
    """
    N, k = Lambda.shape
    wz = np.where(act, w, 0.0)
    Lambda, q = Lambda.copy(), q.copy()
    if k:
        live = q > 0
        weights = np.where(act, 1.0 / np.where(live, q, 1.0)[None, :], 0.0)
        prior_prec = np.full((N, k), 1.0 / prior.loading_sd ** 2)
        prop = regression_rows(eta, weights, wz, prior_prec, rng)
        ok = live & _within_cap((prop ** 2).sum(axis=1) + q, cap)
        Lambda[ok] = prop[ok]
    if free_q.any():
        resid = wz - eta @ Lambda.T
        n = act.sum(axis=0)
        ss = np.where(act, resid, 0.0) ** 2
        prop = premium_variance_given_ss(ss.sum(axis=0), n, q, prior, rng)
        ok = free_q & _within_cap((Lambda ** 2).sum(axis=1) + prop, cap)
        q[ok] = prop[ok]
    return Lambda, q


def premium_noncentred(target, weights, f, X, entry, c_now, Lambda, q, free_q, prior, cap, init,
                       rng, q_ref):
    """Non-centred draws of ``(c_i, Lambda_i, s_i)`` per asset: ``target_ti = c_i + f_t Lambda_i'
    + s_i X_ti + noise`` with ``Var(noise) = 1 / weights_ti`` (weights 0 where unobserved); ``c_i``
    flat (the diffuse entry level) or, with ``init = (m0, v0)``, the pseudo-observation ``c_i +
    f_entry Lambda_i' ~ N(m0, v0)``.  ``s_i = +-sqrt(q_i)`` has the ``N(0, q_var)`` prior (the
    halfnormal family; exact); for the invgamma family the same Gaussian with variance ``q_ref`` is
    a proposal corrected by a Metropolis step.  Fixed ``q_i``: ``s_i`` stays (its column is zeroed).
    ``c_now`` (N,) are the current entry levels, ``X`` (T, N) the standardised own paths (0 at and
    before entry), ``entry`` (N,) the first-observation dates.

    Returns ``(c, Lambda, q, s)``: ``s`` the new signed roots (the caller rebuilds ``mu = c + f
    Lambda' + s X``), unchanged rows where a step was rejected.
    """
    T, N = target.shape
    k = Lambda.shape[1]
    Xz = np.where(free_q[None, :], np.nan_to_num(X), 0.0)
    s_now = np.sqrt(q)
    tgt = np.where(weights > 0, target - np.where(free_q, 0.0, s_now)[None, :] * np.nan_to_num(X),
                   0.0)
    x = np.column_stack([np.ones(T), f])                 # shared columns: entry level, factors
    extra = None
    if init is not None:                      # one pseudo-row per asset at its entry date
        z = np.zeros((N, k + 2))
        z[:, 0] = 1.0
        z[:, 1:k + 1] = f[entry]
        extra = (z[:, :, None] * z[:, None, :] / init[1], z * (init[0] / init[1]))
    s_var = prior.q_var if prior.q_family == "halfnormal" else q_ref
    prior_prec = np.zeros((N, k + 2))
    prior_prec[:, 1:k + 1] = 1.0 / prior.loading_sd ** 2
    prior_prec[:, k + 1] = np.where(free_q, 1.0 / s_var, 1.0)
    beta = regression_rows(x, weights, tgt, prior_prec, rng, own=Xz, extra=extra)
    c, lam, s = beta[:, 0], beta[:, 1:k + 1], np.where(free_q, beta[:, k + 1], s_now)
    ok = _within_cap((lam ** 2).sum(axis=1) + s ** 2, cap)
    if prior.q_family == "invgamma":
        log_ratio = _ig_correction(s, prior, q_ref) - _ig_correction(s_now, prior, q_ref)
        ok &= ~free_q | (np.log(rng.random(N)) < log_ratio)
    new_c = np.where(ok, c, c_now)
    new_lam = np.where(ok[:, None], lam, Lambda)
    new_s = np.where(ok, s, s_now)
    return new_c, new_lam, np.where(free_q, new_s ** 2, q), new_s


def _ig_correction(s, prior, q_ref):
    """log of ``p_IG(s^2) |s| / N(s; 0, q_ref)`` (the invgamma prior in the signed root ``s``,
    relative to the Gaussian proposal's prior term)."""
    q = np.maximum(s ** 2, 1e-300)
    log_ig = -(prior.q_a + 1.0) * np.log(q) - prior.q_b / q
    return log_ig + np.log(np.abs(s) + 1e-300) + 0.5 * s ** 2 / q_ref


def _within_cap(total, cap):
    return np.ones(total.shape, bool) if cap is None else total <= cap
