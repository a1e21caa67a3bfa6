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

The imputation itself (:func:`panel.kalman.impute.impute_sum`) lives with the kernels, which
may collapse an E-step's groups into one imputed total under the E-step's own parameters (the ones
every M-step and score here is given with it).  The score and the log prior use the factor
structure of ``Sigma`` and ``H`` (Woodbury, no N x N inverse): O(N^2 m) beyond the imputation.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import linalg

from panel.kalman.impute import impute_sum, score_sum, seen_diagonal
from panel.model.params import Params, canonical_loadings
from panel.model.spec import ResolvedSpec

FA_INNER_STEPS = 10
VAR_FLOOR = 1e-9        # lower bound of every variance, relative to the asset's starting return-
                        # shock variance: keeps covariances invertible and lets the optimiser stop
                        # at a boundary instead of crawling towards zero
BOUNDARY_RATIO = 1e-8   # premium innovation variance below this fraction of the return-shock
                        # variance: the premium is constant in practice (a boundary solution)
RATIO_EXACT = 1e2       # ||L_i||^2 / d_i above this: row i of L L' + diag(d) is eliminated exactly
                        # (Schur complement) instead of through d_i^{-1}, whose cancellation would
                        # cost about log10 of the ratio in digits


@dataclass(frozen=True)
class PriorTerms:
    """Per-period prior pseudo-observations: ``weight`` periods of variance ``v``."""

    weight: float = 0.0
    v: float = 0.0


def factor_analysis(S: np.ndarray, L: np.ndarray, psi: np.ndarray, free_psi: np.ndarray,
                    floor, steps: int = FA_INNER_STEPS) -> tuple[np.ndarray, np.ndarray]:
    """Rubin-Thayer EM steps for ``S`` (N, N) ~ ``L L' + diag(psi)``, L (N, m), psi (N,); entries
    with ``free_psi`` False stay put, free ones are bounded below by ``floor`` (scalar or (N,)).
    Returns the canonical loadings (N, m) and psi (N,).

    Each step needs ``beta = L' C^{-1}`` (m, N).  Plain Woodbury, ``(I + L' Psi^{-1} L)^{-1}
    L' Psi^{-1}``, loses about log10(||L_i||^2 / psi_i) digits when fewer than m psi_i sit at the
    floor (a Heywood case, ratio up to 1e9); :meth:`_FactorInverse.solve_loadings` then eliminates
    those rows exactly.
    """
    m = L.shape[1]
    for _ in range(steps):
        beta = _beta(L, psi)
        bS = beta @ S
        Egg = np.eye(m) - beta @ L + bS @ beta.T
        L = np.linalg.solve(Egg, bS).T
        new_psi = np.maximum(np.diag(S) - np.einsum("ij,ji->i", L, bS), floor)
        psi = np.where(free_psi, new_psi, psi)
    return canonical_loadings(L), psi


def _beta(L: np.ndarray, psi: np.ndarray) -> np.ndarray:
    """``beta = L' C^{-1}`` (m, N) for ``C = L L' + diag(psi)``.  Plain Woodbury where it is exact
    to rounding — one factor (the capacitance is a scalar: a tiny psi_i makes it large, nothing
    cancels) or no tiny psi — which is the common case and several times cheaper; otherwise
    :meth:`_FactorInverse.solve_loadings`."""
    if (psi > 0).all():
        Li = L / psi[:, None]
        if L.shape[1] == 1 or not (np.einsum("ij,ij->i", L, L) > RATIO_EXACT * psi).any():
            return np.linalg.solve(np.eye(L.shape[1]) + L.T @ Li, Li.T)
    return _FactorInverse(L, psi).solve_loadings().T


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
        lam, q = cap_premium(lam, q, rs.max_sigma_diag, free_q)
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


def cap_premium(lam, q, cap, free_q):
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


class _FactorInverse:
    """``C^{-1}`` for ``C = L L' + diag(d)`` (L (N, m), d (N,) >= 0) without an N x N inverse.

    Woodbury (Golub & Van Loan, Matrix Computations, 3rd ed. 1996, p. 51) through the Cholesky
    factor of the m x m capacitance ``I + L' D^{-1} L`` is exact but divides by ``d_i``: for a row
    with ``d_i`` far below ``||L_i||^2`` (a variance at its floor, a Heywood case) ``C^{-1}_ii`` is
    a difference of two numbers ~``1/d_i`` and loses digits even when ``C`` is well conditioned.
    Such rows (set S, the rest R) are eliminated exactly instead: with
    ``F = (I + L_R' D_R^{-1} L_R)^{-1}``, the Schur complement of ``C_RR`` is
    ``Z = D_S + L_S F L_S'`` (as ``C_SR = L_S L_R'``) and the partitioned inverse gives

        C^{-1} = diag(dp) - U U' + V V',   dp = 1/d on R (0 on S),  U = [D_R^{-1} L_R R_K^{-1}; 0],
        V = [-C_RR^{-1} L_R L_S'; I] R_Z^{-1},   C_RR^{-1} L_R = D_R^{-1} L_R F,

    with ``R_K``, ``R_Z`` the upper Cholesky factors of the capacitance and of ``Z``.  Stored as
    ``dp`` (N,), ``E = [U, V]`` (N, m + s) and signs ``sg`` (m + s,); ``logdet`` is
    ``log det C = sum log d_R + log det(capacitance) + log det Z``: the matrix determinant lemma
    ``det(D + L L') = det D det(I + L' D^{-1} L)`` and ``det C = det C_RR det Z``, both the block
    (Schur complement) determinant formula.
    Cost O(N m^2 + N s (m + s) + s^3); with every row in S this is the dense Cholesky inverse.
    """

    def __init__(self, L: np.ndarray, d: np.ndarray):
        N, m = L.shape
        d = np.asarray(d, float)
        rowsq = np.einsum("ij,ij->i", L, L)
        S = (d <= 0) | (rowsq > RATIO_EXACT * d)
        R = ~S
        dR = d[R]
        LR = L[R]
        Lk = np.linalg.cholesky(np.eye(m) + (LR / dR[:, None]).T @ LR)   # capacitance = Lk Lk'
        UR = linalg.solve_triangular(Lk, (LR / dR[:, None]).T, lower=True).T    # D^-1 L_R Lk^-T
        self._YR = linalg.solve_triangular(Lk, UR.T, lower=True, trans="T").T  # C_RR^-1 L_R
        self._L, self._d, self._S, self._Lk, self._Lz = L, d, S, Lk, None
        self.dp = np.zeros(N)
        self.dp[R] = 1.0 / dR
        U = np.zeros((N, m))
        U[R] = UR
        s = int(S.sum())
        V = np.zeros((N, s))
        logdet_z = 0.0
        if s:
            LS = L[S]
            P = linalg.solve_triangular(Lk, LS.T, lower=True).T            # L_S Lk^-T
            self._Lz = Lz = np.linalg.cholesky(np.diag(d[S]) + P @ P.T)
            V[S] = linalg.solve_triangular(Lz, np.eye(s), lower=True).T       # Lz^-T
            V[R] = -linalg.solve_triangular(Lz, LS @ self._YR.T, lower=True).T
            logdet_z = 2.0 * np.log(np.diag(Lz)).sum()
        self.E = np.hstack([U, V])
        self.sg = np.concatenate([-np.ones(m), np.ones(s)])
        self.logdet = np.log(dR).sum() + 2.0 * np.log(np.diag(Lk)).sum() + logdet_z

    def apply(self, X: np.ndarray) -> np.ndarray:
        """``C^{-1} X`` for X (N, p): O(N p (m + s))."""
        return self.dp[:, None] * X + self.E @ (self.sg[:, None] * (self.E.T @ X))

    def solve_loadings(self) -> np.ndarray:
        """``C^{-1} L`` (N, m) by whichever exact route is better conditioned here.

        Both lose digits like eps times a condition number: plain Woodbury ``D^{-1} L K^{-1}``
        (K = the full capacitance ``I + L' D^{-1} L``) that of K, which is ~``||L_i||^2 / d_i`` when
        fewer than m rows are tiny (they blow K up in some directions only); the elimination that
        of ``Z``, which has an eigenvalue ~``d_i`` when more than m rows are (tiny rows with
        nearly collinear loadings spoil both; a row-sorted QR would be needed).  Elimination, from the blocks of the partitioned inverse (not through
        :meth:`apply`, whose ``D^{-1} L - D^{-1} L (I - F)`` cancels when F is small):
        ``(C^{-1} L)_S = Z^{-1} L_S F`` and ``(C^{-1} L)_R = C_RR^{-1} L_R (I - L_S' (C^{-1} L)_S)``,
        as ``L_R' C_RR^{-1} L_R = I - F``.  O(N m^2 + s^3)."""
        L, S, d = self._L, self._S, self._d
        out = np.empty(L.shape)
        if self._Lz is None:                       # nothing eliminated: this is plain Woodbury
            out[:] = self._YR
            return out
        if (d > 0).all():
            Li = L / d[:, None]
            K = np.eye(L.shape[1]) + L.T @ Li
            if np.linalg.cond(K) <= np.linalg.cond(self._Lz) ** 2:
                return linalg.cho_solve((np.linalg.cholesky(K), True), Li.T).T
        LS = L[S]
        LSF = linalg.cho_solve((self._Lk, True), LS.T).T                      # L_S F
        out[S] = W = linalg.cho_solve((self._Lz, True), LSF)
        out[~S] = self._YR - self._YR @ (LS.T @ W)
        return out

    def diagonal(self) -> np.ndarray:
        return self.dp + (self.E ** 2) @ self.sg

    def trace(self) -> float:
        return float(self.dp.sum() + (self.E ** 2).sum(axis=0) @ self.sg)


def _score_blocks(total: np.ndarray, n: float, L: np.ndarray, d: np.ndarray):
    """``G L`` (N, m) and ``diag(G)`` (N,) of ``G = dQ/dC = -0.5 (n C^{-1} - C^{-1} T C^{-1})`` for
    ``C = L L' + diag(d)`` and T = ``total`` (N, N): O(N^2 (m + s)), no N x N inverse.

    ``X = C^{-1} T`` is formed by the structured inverse; then ``C^{-1} T C^{-1} L = X (C^{-1} L)``
    and ``diag(C^{-1} T C^{-1})_i = X_ii dp_i + sum_c sg_c E_ic (X E)_ic``.

    With no factors C is diagonal: ``diag(G)_i = -0.5 (n / d_i - T_ii / d_i^2)``, and a row with
    ``d_i = 0`` (a variance fixed at zero: a constant premium) has no score."""
    if L.shape[1] == 0:
        inv = np.divide(1.0, d, out=np.zeros(d.size), where=d > 0)
        return np.zeros((d.size, 0)), -0.5 * (n * inv - np.diag(total) * inv ** 2)
    inv = _FactorInverse(L, d)
    CiL = inv.apply(L)
    X = inv.apply(total)
    XE = X @ inv.E
    quad = np.diag(X) * inv.dp + (inv.E * XE) @ inv.sg
    return -0.5 * (n * CiL - X @ CiL), -0.5 * (n * inv.diagonal() - quad)


def _h_parts(p: Params):
    """``(B, psi)`` of a diagonal (B with no columns) or factor ``H``; None when H is full."""
    if p.psi is None:
        return None
    return (np.zeros((p.n_assets, 0)) if p.B is None else p.B), p.psi


def log_prior(p: Params, sigma_prior: PriorTerms, h_prior: PriorTerms) -> float:
    """Log density (up to a constant) of the inverse-Wishart-type priors at ``p``:
    ``-0.5 weight (log det C + v tr C^{-1})`` for C = Sigma and C = H (structured when possible)."""
    out = 0.0
    for prior, C, parts in ((sigma_prior, p.Sigma, (p.Lambda, p.q)), (h_prior, p.H, _h_parts(p))):
        if prior.weight > 0:
            if parts is None:
                sign, logdet = np.linalg.slogdet(C)
                trace = np.trace(np.linalg.inv(C))
            else:
                inv = _FactorInverse(*parts)
                logdet, trace = inv.logdet, inv.trace()
            out -= 0.5 * prior.weight * (logdet + prior.v * trace)
    return out


def expected_complete_loglik_grad(est, p: Params, rs: ResolvedSpec, packer, sigma_prior: PriorTerms,
                                  h_prior: PriorTerms) -> np.ndarray:
    """Score of the log-posterior at ``p`` by Fisher's identity: the gradient of the expected
    complete-data log-likelihood (plus log prior) in the packed parameters, moments from ``est``
    taken at ``p`` itself (Louis 1982).

    With ``G = dQ/dC`` the loadings need ``2 G L`` and the log variances ``d * diag(G)``: for the
    factor structures these come from :func:`_score_blocks` in O(N^2 m); a full H needs all of G.
    """
    N = p.n_assets
    B, psi = _h_parts(p) if rs.structure != "full" else (None, None)
    blocks = []
    for groups, C, L, d, prior in ((est.w_groups, p.Sigma, p.Lambda, p.q, sigma_prior),
                                   (est.e_groups, p.H, B, psi, h_prior)):
        # dQ/dC is linear in the groups: those with the path's exact terms add them, the rest
        # (the shocks of dense dates and of segment stretches) go through the formula, as the
        # prior does
        exact = [g for g in groups if g.score is not None] if rs.score_form == "disturbance" else []
        terms = score_sum(exact, N) if exact else np.zeros((N, N))
        total, n = impute_sum([g for g in groups if g.score is None] if exact else groups, C)
        total[np.diag_indices_from(total)] += prior.weight * prior.v
        n += prior.weight
        if L is None:                                        # full H: all of dQ/dH
            G = 0.5 * terms
            if n:
                Ci = np.linalg.inv(C)
                G = G - 0.5 * (n * Ci - Ci @ total @ Ci)
            blocks.append(G)
            continue
        GL, Gdiag = 0.5 * (terms @ L), 0.5 * np.diag(terms)
        if n:                           # nothing left to the formula: it would add zeros
            FL, Fdiag = _score_blocks(total, n, L, d)
            GL, Gdiag = GL + FL, Gdiag + Fdiag
        blocks.append((GL, Gdiag))
    (GS_L, GS_diag), GH = blocks
    parts = [(2.0 * GS_L)[packer.lam_free], (p.q * GS_diag)[packer.free_q]]
    if rs.structure == "full":
        Cf = np.linalg.cholesky(p.H)
        dC = 2.0 * GH @ Cf
        dC[np.diag_indices_from(dC)] *= np.diag(Cf)          # log-diagonal parametrisation
        parts.append(dC[packer.tril])
    else:
        GH_L, GH_diag = GH
        if rs.structure == "factor":
            parts.append((2.0 * GH_L)[packer.b_free])
        parts.append((psi * GH_diag)[packer.free_psi])
    return np.concatenate(parts)
