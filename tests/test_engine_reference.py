"""Dense filter/smoother against statsmodels' general state-space model (the outside reference):
log-likelihood to 1e-8 relative, filtered and smoothed states and variances to 1e-8 absolute."""

import numpy as np
import pytest

from panel.kalman.dense import dense_smoother
from panel.model.params import Params
from tests.ssm_reference import covariance_diagonals, statsmodels_smoother

PATTERNS = ("balanced", "late_entry", "exits", "gaps")


def make_case(N, k, structure, pattern, seed=0, T=48):
    """Random parameters (invented) and a panel with the requested missing pattern."""
    rng = np.random.default_rng(seed)
    Lam = rng.normal(scale=0.004, size=(N, k))
    q = rng.uniform(2e-6, 2e-5, N)
    if structure == "diagonal":
        H = np.diag(rng.uniform(0.001, 0.004, N))
    elif structure == "factor":
        B = rng.normal(scale=0.03, size=(N, 1))
        H = B @ B.T + np.diag(rng.uniform(0.0005, 0.002, N))
    else:
        A = rng.normal(size=(N, N))
        H = 0.001 * (A @ A.T) / N + np.diag(rng.uniform(0.0005, 0.002, N))
    Y = 0.005 + rng.multivariate_normal(np.zeros(N), H, size=T)
    if pattern in ("late_entry", "exits", "gaps") and N > 1:
        for i in range(1, N):
            Y[: (i * 7) % (T // 2), i] = np.nan          # staircase of entries
    if pattern == "exits" and N > 1:
        Y[T - 10:, 0] = np.nan
        Y[T - 3:, N - 1] = np.nan
    if pattern == "gaps":
        Y[rng.random(Y.shape) < 0.08] = np.nan
        Y[T // 3, :] = np.nan                             # an all-missing date
        Y[0, 0] = 0.01                                    # keep one asset from the start
    return Y, Lam, q, H


CASES = [(1, 0, "diagonal", p) for p in ("balanced", "gaps")]
CASES += [(3, k, s, p) for k in (0, 1) for s in ("diagonal", "factor", "full") for p in PATTERNS]
CASES += [(12, k, s, p) for k in (1, 2) for s in ("diagonal", "factor", "full") for p in ("balanced", "gaps")]
CASES += [(12, 0, "full", "late_entry"), (12, 2, "factor", "exits")]


def _compare(Y, Lam, q, H, scale2=None, init=None):
    k = Lam.shape[1]
    Sigma = Lam @ Lam.T + np.diag(q)
    ours = dense_smoother(Y, Sigma, H, scale2, Lambda=Lam if k else None, init=init)
    ref = statsmodels_smoother(Y, Sigma, H, scale2, Lambda=Lam if k else None, init=init)
    assert ours.loglik == pytest.approx(ref.llf, rel=1e-8)
    seen = ~np.isnan(ours.filtered_mean)
    fv = covariance_diagonals(ref.filtered_state_cov)
    sv = covariance_diagonals(ref.smoothed_state_cov)
    np.testing.assert_allclose(ours.filtered_mean[seen], ref.filtered_state.T[:, k:][seen], atol=1e-8, rtol=0)
    np.testing.assert_allclose(ours.smoothed_mean[seen], ref.smoothed_state.T[:, k:][seen], atol=1e-8, rtol=0)
    np.testing.assert_allclose(ours.filtered_var[seen], fv[:, k:][seen], atol=1e-8, rtol=0)
    np.testing.assert_allclose(ours.smoothed_var[seen], sv[:, k:][seen], atol=1e-8, rtol=0)
    if k:
        np.testing.assert_allclose(ours.factor_smoothed_mean, ref.smoothed_state.T[:, :k], atol=1e-8)
        np.testing.assert_allclose(ours.factor_smoothed_var, sv[:, :k], atol=1e-8)
        np.testing.assert_allclose(ours.factor_filtered_mean, ref.filtered_state.T[:, :k], atol=1e-8)
        np.testing.assert_allclose(ours.factor_filtered_var, fv[:, :k], atol=1e-8)
    return ours, ref


@pytest.mark.parametrize("N,k,structure,pattern", CASES)
def test_dense_matches_statsmodels(N, k, structure, pattern):
    # Source: statsmodels.tsa.statespace (MLEModel, exact diffuse initialisation) on the same model.
    Y, Lam, q, H = make_case(N, k, structure, pattern, seed=N * 10 + k)
    _compare(Y, Lam, q, H)


@pytest.mark.parametrize("pattern", ["balanced", "gaps"])
def test_dense_matches_statsmodels_with_volatility_scale(pattern):
    # Source: statsmodels with a time-varying observation covariance s_t^2 H.
    Y, Lam, q, H = make_case(5, 1, "factor", pattern, seed=3)
    s2 = np.exp(np.random.default_rng(1).normal(scale=0.4, size=Y.shape[0]))
    _compare(Y, Lam, q, H, scale2=s2)


def test_dense_matches_statsmodels_with_informative_prior():
    # Source: statsmodels with a known (proper) initial state, all assets present from the start.
    Y, Lam, q, H = make_case(4, 0, "full", "balanced", seed=5)
    Y[10, 2] = np.nan
    _compare(Y, Lam, q, H, init=(0.004, 1e-4))


def test_cross_section_covariance_matches_statsmodels():
    # Source: statsmodels' smoothed and filtered state covariance at one date.
    Y, Lam, q, H = make_case(6, 1, "factor", "late_entry", seed=7)
    Sigma = Lam @ Lam.T + np.diag(q)
    t = 30
    ours = dense_smoother(Y, Sigma, H, cov_at=(t,))
    ref = statsmodels_smoother(Y, Sigma, H)
    np.testing.assert_allclose(ours.covariances[t]["smoothed"], ref.smoothed_state_cov[:, :, t], atol=1e-10)
    np.testing.assert_allclose(ours.covariances[t]["filtered"], ref.filtered_state_cov[:, :, t], atol=1e-10)


def _stacked_posterior(Y, Sigma, H):
    """Joint posterior of the whole premium path by one direct GLS solve (flat prior on mu_1)."""
    T, N = Y.shape
    Hi, Si = np.linalg.inv(H), np.linalg.inv(Sigma)
    prec = np.zeros((T * N, T * N))
    rhs = np.zeros(T * N)
    for t in range(T):
        s = slice(t * N, (t + 1) * N)
        prec[s, s] += Hi
        rhs[s] = Hi @ Y[t]
    for t in range(1, T):
        i, j = slice(t * N, (t + 1) * N), slice((t - 1) * N, t * N)
        prec[i, i] += Si
        prec[j, j] += Si
        prec[i, j] -= Si
        prec[j, i] -= Si
    cov = np.linalg.inv(prec)
    return cov @ rhs, cov


def test_estep_moments_match_direct_posterior_and_statsmodels_lag_covariance():
    # Sources: the stacked Gaussian posterior solved directly (an independent computation), and
    # statsmodels' smoothed_state_autocov (Cov(x_t, x_{t-1}|Y) at index t-1) past the diffuse date.
    Y, Lam, q, H = make_case(3, 0, "full", "balanced", seed=11, T=30)
    T, N = Y.shape
    Sigma = np.diag(q)
    ours = dense_smoother(Y, Sigma, H)
    m, C = _stacked_posterior(Y, Sigma, H)
    w = np.zeros((N, N))
    e = np.zeros((N, N))
    for t in range(T):
        i = slice(t * N, (t + 1) * N)
        r = Y[t] - m[i]
        e += np.outer(r, r) + C[i, i]
        if t:
            j = slice((t - 1) * N, t * N)
            d = m[i] - m[j]
            w += np.outer(d, d) + C[i, i] + C[j, j] - C[i, j] - C[j, i]
    (group,) = ours.estep.w_groups
    (egroup,) = ours.estep.e_groups
    assert group.count == T - 1 and egroup.count == T
    np.testing.assert_allclose(group.M, w, atol=1e-12)
    np.testing.assert_allclose(egroup.M, e, atol=1e-12)
    lag = np.moveaxis(statsmodels_smoother(Y, Sigma, H).smoothed_state_autocov, 2, 0)
    for t in range(2, T):
        np.testing.assert_allclose(C[t * N:(t + 1) * N, (t - 1) * N:t * N], lag[t - 1], atol=1e-12)


def test_params_round_trip():
    p = Params.build(np.ones((3, 1)), np.ones(3), "factor", B=np.ones((3, 1)), psi=np.ones(3))
    back = Params.from_dict(p.to_dict())
    np.testing.assert_array_equal(back.H, p.H)
    np.testing.assert_array_equal(back.Lambda, p.Lambda)
