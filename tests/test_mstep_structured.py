"""The structured M-step pieces equal their straightforward dense formulas.

* ``impute_sum`` (merged masks, nested chains through one Cholesky factor, partitioned-precision
  groups) against the per-group conditional-Gaussian formula, on nested, exit and scattered masks.
* The Fisher-identity score and the log prior, computed with Woodbury's identity (Golub & Van
  Loan, "Matrix Computations", 3rd ed. 1996, p. 51) and the matrix determinant lemma
  ``det(D + L L') = det D det(I + L' D^{-1} L)`` (the block determinant formula) plus an exact
  Schur-complement elimination of rows with tiny own variances, against the dense
  ``inv``/``slogdet`` formulas (written out here, the code's previous route), in exact rational
  arithmetic where Sigma is too ill conditioned for floats, and, independently, against central
  finite differences of the expected complete-data log-likelihood.
* Factor-analysis EM steps (Rubin & Thayer 1982) with psi at the variance floor (Heywood cases)
  against the same steps through the dense ``C^{-1}`` in exact rational arithmetic, and the EM
  property that no step lowers the factor-analysis log-likelihood.

Invented data, fixed seeds.
"""

from fractions import Fraction

import numpy as np
import pytest

from panel.kalman import impute
from panel.kalman.types import EStep, MomentGroup
from panel.model import mstep as ms
from panel.model.params import Packer, Params, canonical_loadings
from panel.model.spec import ResolvedSpec

N = 8
FLOOR = 1e-9            # the EM's variance floor, relative (VAR_FLOOR)


# --------------------------------------------------------------------------- references
def reference_impute(groups, C):
    """Per group: ``G = C_UA C_AA^{-1}``, full moment ``[[M, M G'], [G M, G M G' + n C_{U|A}]]``."""
    total = np.zeros(C.shape)
    n = 0
    for g in groups:
        A, U = g.mask, ~g.mask
        n += g.count
        block = np.zeros(C.shape)
        block[np.ix_(A, A)] = g.M
        if U.any():
            G = (C[np.ix_(U, A)] @ np.linalg.inv(C[np.ix_(A, A)]) if A.any()
                 else np.zeros((U.sum(), 0)))
            block[np.ix_(U, A)] = G @ g.M
            block[np.ix_(A, U)] = (G @ g.M).T
            block[np.ix_(U, U)] = G @ g.M @ G.T + g.count * (C[np.ix_(U, U)] - G @ C[np.ix_(A, U)])
        total += block
    return 0.5 * (total + total.T), n


def dense_dQ(groups, C, prior):
    """``dQ/dC = -0.5 (n C^{-1} - C^{-1} T C^{-1})`` with T the imputed sum plus the prior."""
    total, n = reference_impute(groups, C)
    Ci = np.linalg.inv(C)
    T = total + prior.weight * prior.v * np.eye(C.shape[0])
    return -0.5 * ((n + prior.weight) * Ci - Ci @ T @ Ci)


def dense_score(est, p, rs, packer, sp, hp):
    GS = dense_dQ(est.w_groups, p.Sigma, sp)
    GH = dense_dQ(est.e_groups, p.H, hp)
    parts = [(2 * GS @ p.Lambda)[packer.lam_free], (p.q * np.diag(GS))[packer.free_q]]
    if rs.structure == "full":
        Cf = np.linalg.cholesky(p.H)
        dC = 2 * GH @ Cf
        dC[np.diag_indices(N)] *= np.diag(Cf)
        parts.append(dC[packer.tril])
    else:
        if rs.structure == "factor":
            parts.append((2 * GH @ p.B)[packer.b_free])
        parts.append((p.psi * np.diag(GH))[packer.free_psi])
    return np.concatenate(parts)


def exact_sigma_score(est, p, packer, prior):
    """The Sigma part of the score in exact rational arithmetic (inputs taken as exact): a
    reference where Sigma is so ill conditioned that the dense float formula is itself inexact."""
    total, n = reference_impute(est.w_groups, p.Sigma)
    T = total + prior.weight * prior.v * np.eye(N)
    C = [[Fraction(float(x)) for x in row] + [Fraction(int(i == j)) for j in range(N)]
         for i, row in enumerate(p.Sigma)]
    for j in range(N):                                    # Gauss-Jordan, exact
        piv = next(i for i in range(j, N) if C[i][j] != 0)
        C[j], C[piv] = C[piv], C[j]
        C[j] = [x / C[j][j] for x in C[j]]
        for i in range(N):
            if i != j and C[i][j] != 0:
                f = C[i][j]
                C[i] = [a - f * b for a, b in zip(C[i], C[j])]
    Ci = [row[N:] for row in C]
    Tf = [[Fraction(float(x)) for x in row] for row in T]
    CiT = [[sum(Ci[i][l] * Tf[l][j] for l in range(N)) for j in range(N)] for i in range(N)]
    nf = Fraction(n) + Fraction(prior.weight)
    G = [[-(nf * Ci[i][j] - sum(CiT[i][l] * Ci[l][j] for l in range(N))) / 2 for j in range(N)]
         for i in range(N)]
    lam = [[Fraction(float(x)) for x in row] for row in p.Lambda]
    GL = np.array([[float(2 * sum(G[i][l] * lam[l][c] for l in range(N)))
                    for c in range(p.Lambda.shape[1])] for i in range(N)])
    Gd = np.array([float(Fraction(float(p.q[i])) * G[i][i]) for i in range(N)])
    return np.concatenate([GL[packer.lam_free], Gd[packer.free_q]])


def dense_log_prior(p, sp, hp):
    out = 0.0
    for prior, C in ((sp, p.Sigma), (hp, p.H)):
        if prior.weight > 0:
            logdet, trace = np.linalg.slogdet(C)[1], np.trace(np.linalg.inv(C))
            out -= 0.5 * prior.weight * (logdet + prior.v * trace)
    return out


def rel_err(a, b):
    return float(np.max(np.abs(a - b)) / np.max(np.abs(b)))


# --------------------------------------------------------------------------- invented problems
def moments(rng, C, masks, counts):
    """Sample second moments from a perturbed C (so the score is far from zero)."""
    n = C.shape[0]
    A = rng.normal(size=(n, n)) * 0.3
    D = C + A @ A.T * np.sqrt(np.mean(np.diag(C)))
    Lc = np.linalg.cholesky(D)
    out = []
    for mask, c in zip(masks, counts):
        X = rng.normal(size=(c + 2, n)) @ Lc.T
        out.append(MomentGroup(mask, c, X[:, mask].T @ X[:, mask]))
    return out


def staircase(n, order=None):
    order = np.arange(n) if order is None else order
    masks = []
    for s in range(1, n + 1):
        m = np.zeros(n, bool)
        m[order[:s]] = True
        masks.append(m)
    return masks


def problem(seed, k, structure, floors=(), q_floors=(), fixed_q=None):
    """Params, spec, packer and an E-step-like set of groups (entries for w, entries and exits
    for the return shocks); ``floors``/``q_floors``: assets whose psi / q sit at the EM floor."""
    rng = np.random.default_rng(seed)
    r = 1 if structure == "factor" else 0
    lam = canonical_loadings(rng.normal(0.8, 0.4, size=(N, k)))     # the packed (identified) form
    q = rng.uniform(0.2, 0.5, N)
    B = rng.normal(1.0, 0.3, size=(N, r))
    psi = rng.uniform(0.5, 1.5, N)
    h = (B ** 2).sum(axis=1) + psi
    q[list(q_floors)] = FLOOR * h[list(q_floors)]
    psi[list(floors)] = FLOOR * h[list(floors)]
    if structure == "full":
        A = rng.normal(size=(N, N))
        p = Params.build(lam, q, "full", H=A @ A.T / N + np.diag(psi))
    else:
        p = Params.build(lam, q, structure, B=B if r else None, psi=psi)
    rs = ResolvedSpec(k=k, structure=structure, r=r, ppy=12, fixed_q=fixed_q, fixed_psi=None,
                      max_sigma_diag=None)
    order = rng.permutation(N)
    w_masks = staircase(N, order)[1:]
    e_masks = staircase(N, order) + [~staircase(N, order)[i] | (np.arange(N) == order[-1])
                                     for i in range(2)]
    est = EStep(0.0, moments(rng, p.Sigma, w_masks, [3] * (N - 2) + [40]),
                moments(rng, p.H, e_masks, [2] * (N - 1) + [40, 5, 4]))
    return p, rs, Packer(rs, N), est


PRIORS = (ms.PriorTerms(weight=6.0, v=0.3), ms.PriorTerms(weight=4.0, v=0.8))
STRUCTURES = [(k, s) for k in (0, 1, 2) for s in ("diagonal", "factor", "full")]


# --------------------------------------------------------------------------- impute_sum
def _pattern(name, rng, n):
    if name == "nested":
        return staircase(n)[:-1]
    if name == "nested shuffled, blocks":
        order = rng.permutation(n)
        return [m for i, m in enumerate(staircase(n, order)[:-1]) if i % 3 != 1]
    if name == "exits":
        stair = staircase(n)
        return stair + [~m for m in stair[: n // 2]]
    if name == "scattered":
        out = []
        for _ in range(3 * n):
            m = np.ones(n, bool)
            m[rng.choice(n, rng.integers(1, 4), replace=False)] = False
            out.append(m)
        return out
    # mixed: duplicates, an empty and a full mask, a few unrelated sets
    stair = staircase(n)
    return stair[:4] + stair[:2] + [np.zeros(n, bool), np.ones(n, bool)] + \
        [rng.random(n) < 0.5 for _ in range(4)]


KINDS = ["factor", "full", "floor", "diagonal"]
PATTERNS = ["nested", "nested shuffled, blocks", "exits", "scattered", "mixed"]


@pytest.mark.parametrize("kind", KINDS)
@pytest.mark.parametrize("pattern", PATTERNS)
def test_impute_sum_equals_per_group_formula(pattern, kind, monkeypatch):
    rng = np.random.default_rng(10 * PATTERNS.index(pattern) + KINDS.index(kind))
    n = 14
    lam = rng.normal(size=(n, 2))
    q = rng.uniform(0.1, 0.4, n)
    if kind == "floor":
        q[[2, 5]] = FLOOR
    if kind == "full":
        A = rng.normal(size=(n, n))
        C = A @ A.T / n + 0.2 * np.eye(n)
    elif kind == "diagonal":
        C = np.diag(q)
    else:
        C = lam @ lam.T + np.diag(q)
    masks = _pattern(pattern, rng, n)
    if pattern != "mixed":                        # "mixed" keeps its empty mask on purpose
        masks = [m for m in masks if m.any()]
    groups = moments(rng, C, masks, rng.integers(1, 6, len(masks)).tolist())
    calls = {"nested": 0, "precision": 0}
    nested, add_group = impute._nested_sum, impute._add_group

    def count_nested(chain, C):
        calls["nested"] += 1
        return nested(chain, C)

    def count_group(total, mask, count, M, C, precision):
        calls["precision"] += precision is not None
        return add_group(total, mask, count, M, C, precision)

    monkeypatch.setattr(impute, "_nested_sum", count_nested)
    monkeypatch.setattr(impute, "_add_group", count_group)
    got, n_got = ms.impute_sum(groups, C)
    ref, n_ref = reference_impute(groups, C)
    assert n_got == n_ref
    # both sides round like eps * cond(C) (two floored variances make C ill conditioned)
    assert rel_err(got, ref) < max(1e-12, np.finfo(float).eps * np.linalg.cond(C))
    if kind != "diagonal":                         # the fast routes really ran
        if pattern in ("nested", "nested shuffled, blocks", "exits"):
            assert calls["nested"] >= (2 if pattern == "exits" else 1)
        if pattern == "scattered":
            assert calls["precision"] > 0


def test_nested_route_falls_back_when_covariance_is_singular():
    # Two assets with zero own variance and one factor: C is singular (Cholesky fails), yet each
    # seen block below holds at most one of them, so the per-group formula is well defined.
    rng = np.random.default_rng(3)
    n = 10
    lam = rng.normal(size=(n, 1))
    q = rng.uniform(0.1, 0.4, n)
    q[[0, 1]] = 0.0
    C = lam @ lam.T + np.diag(q)
    order = np.r_[0, 2:n, 1]
    masks = staircase(n, order)[:-2]
    groups = moments(rng, C + 0.05 * np.eye(n), masks, [3] * len(masks))
    with pytest.raises(np.linalg.LinAlgError):
        np.linalg.cholesky(C)
    got, _ = ms.impute_sum(groups, C)
    assert rel_err(got, reference_impute(groups, C)[0]) < 1e-12


def test_nested_sum_alone_equals_per_group_formula():
    # the one-Cholesky route on its own, groups listed smallest first, entry order shuffled
    rng = np.random.default_rng(8)
    n = 12
    A = rng.normal(size=(n, n))
    C = A @ A.T / n + 0.1 * np.eye(n)
    masks = staircase(n, rng.permutation(n))[1:-1:2]
    groups = moments(rng, C, masks, [2, 3, 4, 5, 6])
    chain = [(g.mask, g.count, g.M) for g in groups]
    assert rel_err(impute._nested_sum(chain, C), reference_impute(groups, C)[0]) < 1e-12


# --------------------------------------------------------------------------- score, log prior
# floor: one psi and up to k q's at the floor (Sigma, H stay well conditioned: D^{-1} is huge,
# C^{-1} is not); all q at the floor with k >= 1: Sigma ~ rank k plus 1e-9, condition ~1e10
FLOOR_CASES = {"none": ((), ()), "floor": ((3,), (2, 6)), "all q at floor": ((), tuple(range(N)))}


def floor_rows(floor_case, k, structure):
    floors, q_floors = FLOOR_CASES[floor_case]
    if floor_case == "floor" and k:
        q_floors = q_floors[:k]
    return (() if structure == "full" else floors), q_floors


@pytest.mark.parametrize("floor_case", list(FLOOR_CASES))
@pytest.mark.parametrize("k,structure", STRUCTURES)
def test_score_equals_dense_formula(k, structure, floor_case):
    floors, q_floors = floor_rows(floor_case, k, structure)
    p, rs, packer, est = problem(STRUCTURES.index((k, structure)), k, structure, floors, q_floors)
    got = ms.expected_complete_loglik_grad(est, p, rs, packer, *PRIORS)
    ref = dense_score(est, p, rs, packer, *PRIORS)
    n_sigma = int(packer.lam_free.sum() + packer.free_q.sum())
    assert rel_err(got[n_sigma:], ref[n_sigma:]) < 1e-10
    if floor_case == "all q at floor" and k:
        # Sigma ~ rank k plus 1e-9 (condition number ~1e10): the score itself is only defined to
        # ~1e-6 in floats; against the exact value the structured one is as good as the dense one
        exact = exact_sigma_score(est, p, packer, PRIORS[0])
        assert rel_err(got[:n_sigma], exact) < max(10 * rel_err(ref[:n_sigma], exact), 1e-12)
        assert rel_err(got[:n_sigma], exact) < 1e-4
    else:
        assert rel_err(got[:n_sigma], ref[:n_sigma]) < 1e-10


@pytest.mark.parametrize("k,structure", STRUCTURES)
def test_score_equals_finite_difference_of_expected_loglik(k, structure):
    # Independent check (Fisher's identity): the score is the gradient of
    # Q(theta) = sum_C -0.5 (n log det C(theta) + tr(C(theta)^{-1} T)) + log prior, T imputed at p.
    fixed_q = (np.nan,) * (N - 1) + (0.3,) if k == 1 else None
    seed = 40 + STRUCTURES.index((k, structure))
    p, rs, packer, est = problem(seed, k, structure, fixed_q=fixed_q)
    if fixed_q is not None:
        p = Params.build(p.Lambda, np.r_[p.q[:-1], 0.3], structure, B=p.B, psi=p.psi, H=p.H)
    sums = [reference_impute(est.w_groups, p.Sigma), reference_impute(est.e_groups, p.H)]

    def Q(theta):
        pt = packer.unpack(theta, p)
        out = ms.log_prior(pt, *PRIORS)
        for (total, n), C in zip(sums, (pt.Sigma, pt.H)):
            out -= 0.5 * (n * np.linalg.slogdet(C)[1] + np.trace(np.linalg.solve(C, total)))
        return out

    theta = packer.pack(p)
    h = 1e-5
    num = np.array([(Q(theta + e) - Q(theta - e)) / (2 * h) for e in np.eye(theta.size) * h])
    got = ms.expected_complete_loglik_grad(est, p, rs, packer, *PRIORS)
    assert np.max(np.abs(got)) > 1.0                     # far from a stationary point
    np.testing.assert_allclose(got, num, rtol=1e-6, atol=1e-6 * np.max(np.abs(num)))


@pytest.mark.parametrize("floor_case", list(FLOOR_CASES))
@pytest.mark.parametrize("k,structure", STRUCTURES)
def test_log_prior_equals_dense_formula(k, structure, floor_case):
    floors, q_floors = floor_rows(floor_case, k, structure)
    p, _, _, _ = problem(70 + STRUCTURES.index((k, structure)), k, structure, floors, q_floors)
    got = ms.log_prior(p, *PRIORS)
    # the trace of Sigma^{-1} is ~1e9 with every q at the floor; the dense inverse is good to ~1e-7
    rel = 1e-6 if floor_case == "all q at floor" and k else 1e-12
    assert got == pytest.approx(dense_log_prior(p, *PRIORS), rel=rel)
    assert ms.log_prior(p, ms.PriorTerms(), ms.PriorTerms()) == 0.0


@pytest.mark.parametrize("m", [0, 1, 2, 3])
def test_factor_inverse_with_tiny_and_zero_own_variances(m):
    # C = L L' + diag(d) with up to m own variances tiny or zero (D^{-1} huge, C well conditioned):
    # the structured inverse matches the dense one entry by entry, with log det and trace.
    rng = np.random.default_rng(100 + m)
    n = 9
    L = rng.normal(size=(n, m))
    d = rng.uniform(0.5, 1.5, n)
    d[[1, 4, 6][:m]] = [FLOOR, 0.0, 1e-14][:m]    # at most m tiny rows: C well conditioned
    C = L @ L.T + np.diag(d)
    inv = ms._FactorInverse(L, d)
    dense = np.linalg.inv(C)
    X = rng.normal(size=(n, 3))
    tol = max(1e-13, 20 * np.finfo(float).eps * np.linalg.cond(C))   # both sides' rounding
    assert rel_err(inv.apply(np.eye(n)), dense) < tol
    assert rel_err(inv.apply(X), dense @ X) < tol
    assert rel_err(inv.diagonal(), np.diag(dense)) < tol
    assert inv.trace() == pytest.approx(np.trace(dense), rel=tol)
    assert inv.logdet == pytest.approx(np.linalg.slogdet(C)[1], rel=1e-12, abs=1e-12)
    assert (inv.E.shape[1] > m) == (m > 0)       # the tiny rows went to the exact elimination


# --------------------------------------------------------------------------- factor analysis
# Rubin & Thayer (1982) EM steps for S ~ L L' + diag(psi) (Psychometrika 47, 69-76), with
# beta = L' C^{-1}, Egg = I - beta L + beta S beta', L_new = (beta S)' Egg^{-1},
# psi_new = diag(S) - rowsum(L_new o (beta S)'), floored.  References use the dense C^{-1} in exact
# rational arithmetic (numpy's longdouble has only 3 more digits and no linalg).
def _exact_inverse(A):
    """Gauss-Jordan on a list of lists of Fractions; returns (inverse, determinant)."""
    n = len(A)
    M = [row[:] + [Fraction(int(i == j)) for j in range(n)] for i, row in enumerate(A)]
    det = Fraction(1)
    for j in range(n):
        piv = next(i for i in range(j, n) if M[i][j] != 0)
        if piv != j:
            M[j], M[piv] = M[piv], M[j]
            det = -det
        det *= M[j][j]
        M[j] = [x / M[j][j] for x in M[j]]
        for i in range(n):
            if i != j and M[i][j] != 0:
                f = M[i][j]
                M[i] = [a - f * b for a, b in zip(M[i], M[j])]
    return [row[n:] for row in M], det


def _frac(A):
    return [[Fraction(float(x)) for x in row] for row in np.atleast_2d(A)]


def _mul(A, B):
    return [[sum(a * b for a, b in zip(row, col)) for col in zip(*B)] for row in A]


def _exact_cov(L, psi):
    C = _mul(_frac(L), _frac(L.T))
    for i, v in enumerate(psi):
        C[i][i] += Fraction(float(v))
    return C


def exact_fa_step(S, L, psi, free, floor):
    """One step, the inputs taken as exact and the result rounded to floats."""
    N, m = L.shape
    Ci, _ = _exact_inverse(_exact_cov(L, psi))
    beta = _mul(_frac(L.T), Ci)
    bS = _mul(beta, _frac(S))
    bL, bSb = _mul(beta, _frac(L)), _mul(bS, [list(c) for c in zip(*beta)])
    Egg = [[int(i == j) - bL[i][j] + bSb[i][j] for j in range(m)] for i in range(m)]
    Lnew = _mul(_exact_inverse(Egg)[0], bS)                      # (m, N): L_new'
    psi_new = [Fraction(float(S[i, i])) - sum(Lnew[c][i] * bS[c][i] for c in range(m))
               for i in range(N)]
    L_out = np.array([[float(Lnew[c][i]) for c in range(m)] for i in range(N)])
    return L_out, np.where(free, np.maximum(np.array([float(v) for v in psi_new]), floor), psi)


def exact_fa_loglik(S, L, psi, n):
    """``-0.5 n (log det C + tr(C^{-1} S))``, C = L L' + diag(psi), exact up to the final log."""
    Ci, det = _exact_inverse(_exact_cov(L, psi))
    Sf = _frac(S)
    tr = sum(Ci[i][j] * Sf[j][i] for i in range(len(Sf)) for j in range(len(Sf)))
    return -0.5 * n * (np.log(float(det)) + float(tr))


FA_N, FA_OBS = 6, 60
HEYWOOD = {"none": (), "one psi at floor": (2,), "two psi at floor": (2, 4)}


def fa_problem(seed, k, heywood):
    """A sample covariance S (60 draws of a k-factor model), a start near the truth with the
    ``heywood`` psi at 1e-9 of their asset's variance (the EM floor), and that floor."""
    rng = np.random.default_rng(seed)
    L0 = rng.normal(0.5, 1.0, (FA_N, k))           # not all alike: tiny-psi rows not collinear
    psi0 = rng.uniform(0.3, 1.0, FA_N)
    X = rng.normal(size=(FA_OBS, FA_N)) @ np.linalg.cholesky(L0 @ L0.T + np.diag(psi0)).T
    S = X.T @ X / FA_OBS
    floor = FLOOR * np.diag(S)
    psi = psi0.copy()
    psi[list(HEYWOOD[heywood])] = floor[list(HEYWOOD[heywood])]
    return S, canonical_loadings(L0 * rng.uniform(0.9, 1.1, L0.shape)), psi, floor


@pytest.mark.parametrize("steps", [1, 4])
@pytest.mark.parametrize("heywood", list(HEYWOOD))
@pytest.mark.parametrize("k", [1, 2])
def test_factor_analysis_equals_exact_arithmetic(k, heywood, steps):
    # plain Woodbury through Psi^{-1} lost ~8 digits here with k = 2 and one psi at the floor
    free = np.ones(FA_N, bool)
    free[5] = False                                   # a fixed psi stays put
    for seed in range(3):
        S, L, psi, floor = fa_problem(10 * k + seed, k, heywood)
        Lr, pr = L, psi
        for _ in range(steps):
            Lr, pr = exact_fa_step(S, Lr, pr, free, floor)
        L_got, psi_got = ms.factor_analysis(S, L.copy(), psi.copy(), free, floor, steps=steps)
        assert rel_err(L_got, canonical_loadings(Lr)) < 1e-13
        # psi_new is a difference of numbers ~S_ii: good to eps * S_ii, not relatively at the floor
        assert np.max(np.abs(psi_got - pr) / np.diag(S)) < 1e-13
        assert psi_got[5] == psi[5]


@pytest.mark.parametrize("heywood", list(HEYWOOD))
@pytest.mark.parametrize("k", [1, 2])
def test_factor_analysis_steps_raise_loglik(k, heywood):
    # EM property (Rubin & Thayer 1982; Dempster, Laird & Rubin 1977): no step lowers the
    # factor-analysis log-likelihood; the floor only restricts the psi maximisation
    S, L, psi, floor = fa_problem(50 + k, k, heywood)
    L = 0.5 * L                                       # start well away from the optimum
    free = np.ones(FA_N, bool)
    ll = [exact_fa_loglik(S, L, psi, FA_OBS)]
    for _ in range(6):
        L, psi = ms.factor_analysis(S, L, psi, free, floor, steps=1)
        ll.append(exact_fa_loglik(S, L, psi, FA_OBS))
    assert ll[-1] - ll[0] > 1.0
    assert np.all(np.diff(ll) >= -1e-10 * abs(ll[0]))


@pytest.mark.parametrize("k,tiny", [(1, 1), (1, 2), (2, 1), (2, 2), (3, 1), (3, 2)])
def test_solve_loadings_equals_exact_inverse(k, tiny):
    # C^{-1} L with fewer, as many and more tiny own variances than factors (both routes run)
    rng = np.random.default_rng(200 + 10 * k + tiny)
    L = rng.normal(0.5, 1.0, (FA_N, k))
    d = rng.uniform(0.3, 1.0, FA_N)
    d[[1, 3][:tiny]] = FLOOR
    Ci, _ = _exact_inverse(_exact_cov(L, d))
    ref = np.array([[float(x) for x in row] for row in _mul(Ci, _frac(L))])
    assert rel_err(ms._FactorInverse(L, d).solve_loadings(), ref) < 1e-13
