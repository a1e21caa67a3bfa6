"""M-steps: update ``Sigma`` and ``H`` from the E-step's expected second moments.

Complete data are the premium innovations ``w_t`` (t = 2..T) and the scaled return shocks
``eps_t / s_t`` (t = 1..T) of *every* asset.  Components the E-step could not see (an asset not yet
active, a missing return) are filled in by their conditional distribution given the seen ones under
the current parameters (Banbura & Modugno 2014); this keeps the M-step in closed form for
correlated structures.  Diagonal structures use the seen components only (an equally valid complete
data set, and faster for late entrants).

Factor structures (``Sigma = Lambda Lambda' + diag(q)``, ``H = B B' + diag(psi)``) are fitted to the
expected second-moment matrix by factor-analysis EM steps (Rubin & Thayer 1982); each raises the
expected complete-data log-likelihood, so the whole iteration is a generalised EM (ECM).

MAP priors (:class:`panel.model.spec.Prior`) add ``weight`` pseudo-periods with covariance ``v I``:
the target becomes ``(S_sum + weight v I) / (n + weight)``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from panel.kalman.types import MomentGroup
from panel.model.params import Params, canonical_loadings
from panel.model.spec import ResolvedSpec

FA_INNER_STEPS = 10
VAR_FLOOR = 1e-9        # lower bound of every variance, relative to the asset's starting return-
                        # shock variance: keeps covariances invertible and lets the optimiser stop
                        # at a boundary instead of crawling towards zero
BOUNDARY_RATIO = 1e-8   # premium innovation variance below this fraction of the return-shock
                        # variance: the premium is constant in practice (a boundary solution)


@dataclass(frozen=True)
class PriorTerms:
    """Per-period prior pseudo-observations: ``weight`` periods of variance ``v``."""

    weight: float = 0.0
    v: float = 0.0


def impute_sum(groups: list[MomentGroup], C: np.ndarray) -> tuple[np.ndarray, int]:
    """Sum of full second moments over all groups, unseen components filled in under ``C`` (N, N).

    For seen set A and unseen U: ``E[x_U | x_A] = G x_A`` with ``G = C_UA C_AA^{-1}``, so a group's
    full moment is ``[[M, M G'], [G M, G M G' + n C_{U|A}]]``.
    """
    N = C.shape[0]
    total = np.zeros((N, N))
    n = 0
    for g in groups:
        A = g.mask
        U = ~A
        n += g.count
        if not U.any():
            total += g.M
            continue
        CAA = C[np.ix_(A, A)]
        CUA = C[np.ix_(U, A)]
        G = np.linalg.solve(CAA, CUA.T).T if A.any() else np.zeros((U.sum(), 0))
        GM = G @ g.M
        block = np.zeros((N, N))
        block[np.ix_(A, A)] = g.M
        block[np.ix_(U, A)] = GM
        block[np.ix_(A, U)] = GM.T
        block[np.ix_(U, U)] = GM @ G.T + g.count * (C[np.ix_(U, U)] - G @ CUA.T)
        total += block
    return 0.5 * (total + total.T), n


def seen_diagonal(groups: list[MomentGroup], N: int) -> tuple[np.ndarray, np.ndarray]:
    """Per-component sum of seen second moments and the number of dates each was seen."""
    sums = np.zeros(N)
    counts = np.zeros(N)
    for g in groups:
        sums[g.mask] += np.diag(g.M)
        counts[g.mask] += g.count
    return sums, counts


def factor_analysis(S: np.ndarray, L: np.ndarray, psi: np.ndarray, free_psi: np.ndarray,
                    floor: float, steps: int = FA_INNER_STEPS) -> tuple[np.ndarray, np.ndarray]:
    """Rubin-Thayer EM steps for ``S ~ L L' + diag(psi)``; fixed ``psi`` entries stay put."""
    m = L.shape[1]
    for _ in range(steps):
        Li = L / psi[:, None]                                    # Psi^{-1} L
        beta = np.linalg.solve(np.eye(m) + L.T @ Li, Li.T)      # L' Sigma^{-1} (Woodbury)
        bS = beta @ S
        Egg = np.eye(m) - beta @ L + bS @ beta.T
        L = np.linalg.solve(Egg, bS).T
        new_psi = np.maximum(np.diag(S) - np.einsum("ij,ji->i", L, bS), floor)
        psi = np.where(free_psi, new_psi, psi)
    return canonical_loadings(L), psi


def _target(total, n, prior: PriorTerms):
    N = total.shape[0]
    return (total + prior.weight * prior.v * np.eye(N)) / (n + prior.weight)


def mstep(est, p: Params, rs: ResolvedSpec, floor: float, sigma_prior: PriorTerms,
          h_prior: PriorTerms) -> Params:
    """One generalised M-step from the E-step ``est`` (:class:`panel.kalman.types.EStep`);
    ``floor`` (N,) bounds every asset's variances from below."""
    N = p.n_assets
    free_q = np.ones(N, bool) if rs.fixed_q is None else np.isnan(rs.fixed_q)
    q_fixed = np.zeros(N) if rs.fixed_q is None else np.nan_to_num(np.asarray(rs.fixed_q))
    # --- premium innovations: Sigma = Lambda Lambda' + diag(q)
    if rs.k == 0:
        sums, counts = seen_diagonal(est.w_groups, N)
        with np.errstate(invalid="ignore", divide="ignore"):
            q_new = (sums + sigma_prior.weight * sigma_prior.v) / (counts + sigma_prior.weight)
        q_new = np.where(np.isfinite(q_new), q_new, p.q)        # an asset with no transition keeps q
        lam = p.Lambda
        q = np.where(free_q, np.maximum(q_new, floor), q_fixed)
    else:
        total, n = impute_sum(est.w_groups, p.Sigma)
        S = _target(total, n, sigma_prior)
        lam, q = factor_analysis(S, np.array(p.Lambda), np.where(free_q, p.q, q_fixed), free_q, floor)
    if rs.max_sigma_diag is not None:
        lam, q = _cap_premium(lam, q, rs.max_sigma_diag, free_q)
    # --- return shocks
    free_psi = np.ones(N, bool) if rs.fixed_psi is None else np.isnan(rs.fixed_psi)
    psi_fixed = np.zeros(N) if rs.fixed_psi is None else np.nan_to_num(np.asarray(rs.fixed_psi))
    if rs.structure == "diagonal":
        sums, counts = seen_diagonal(est.e_groups, N)
        psi_new = (sums + h_prior.weight * h_prior.v) / (counts + h_prior.weight)
        psi = np.where(free_psi, np.maximum(psi_new, floor), psi_fixed)
        return Params.build(lam, q, "diagonal", psi=psi)
    total, n = impute_sum(est.e_groups, p.H)
    S = _target(total, n, h_prior)
    if rs.structure == "full":
        return Params.build(lam, q, "full", H=S)
    B, psi = factor_analysis(S, np.array(p.B), np.where(free_psi, p.psi, psi_fixed), free_psi, floor)
    return Params.build(lam, q, "factor", B=B, psi=psi)


def _cap_premium(lam, q, cap, free_q):
    """Scale an asset's premium innovation down to the bound ``Sigma_ii <= cap``.

    Free own variances are scaled with the loadings; a fixed own variance stays and only the
    loadings shrink.  With k = 0 this is the exact constrained M-step (the scalar objective is
    unimodal); with factors it is a projection, and the EM loop accepts it only if the objective
    does not fall.
    """
    common = (lam ** 2).sum(axis=1)
    over = common + q > cap
    if not over.any():
        return lam, q
    c_free = cap / (common + q)
    with np.errstate(divide="ignore", invalid="ignore"):
        c_fixed = np.where(common > 0, np.maximum(cap - q, 0.0) / common, 1.0)
    c_lam = np.where(over, np.where(free_q, c_free, c_fixed), 1.0)
    q = np.where(over & free_q, q * c_free, q)
    return lam * np.sqrt(c_lam)[:, None], q


def log_prior(p: Params, sigma_prior: PriorTerms, h_prior: PriorTerms) -> float:
    """Log density (up to a constant) of the inverse-Wishart-type priors at ``p``."""
    out = 0.0
    for prior, C in ((sigma_prior, p.Sigma), (h_prior, p.H)):
        if prior.weight > 0:
            sign, logdet = np.linalg.slogdet(C)
            out -= 0.5 * prior.weight * (logdet + prior.v * np.trace(np.linalg.inv(C)))
    return out


def expected_complete_loglik_grad(est, p: Params, rs: ResolvedSpec, packer, sigma_prior: PriorTerms,
                                  h_prior: PriorTerms) -> np.ndarray:
    """Score of the log-posterior at ``p`` by Fisher's identity: the gradient of the expected
    complete-data log-likelihood (plus log prior) in the packed parameters, moments from ``est``
    taken at ``p`` itself (Louis 1982)."""
    grads = []
    for groups, C, prior in ((est.w_groups, p.Sigma, sigma_prior), (est.e_groups, p.H, h_prior)):
        total, n = impute_sum(groups, C)
        total = total + prior.weight * prior.v * np.eye(C.shape[0])
        n = n + prior.weight
        Ci = np.linalg.inv(C)
        grads.append(-0.5 * (n * Ci - Ci @ total @ Ci))       # dQ/dC, symmetric
    GS, GH = grads
    parts = [(2.0 * GS @ p.Lambda)[packer.lam_free], (p.q * np.diag(GS))[packer.free_q]]
    if rs.structure == "full":
        Cf = np.linalg.cholesky(p.H)
        dC = 2.0 * GH @ Cf
        dC[np.diag_indices_from(dC)] *= np.diag(Cf)          # log-diagonal parametrisation
        parts.append(dC[packer.tril])
    else:
        if rs.structure == "factor":
            parts.append((2.0 * GH @ p.B)[packer.b_free])
        parts.append((p.psi * np.diag(GH))[packer.free_psi])
    return np.concatenate(parts)
