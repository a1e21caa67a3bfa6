"""Known-parameter checks of the simulation smoother: the premium draws reproduce the smoothed
mean and variance of the project's dense reference path and of statsmodels' state-space smoother
(exact diffuse initialisation) within Monte Carlo error.  Invented panels, fixed seeds."""

from __future__ import annotations

import numpy as np
import pytest

from panel.kalman.dense import dense_smoother
from panel.kalman.simsmooth import PathSampler

from tests.test_fast_paths import T, _model, _panel   # the same invented panels (N=5, T=30)

DRAWS = {"spectral": 3000, "precision": 2000, "mean-correction": 500}   # the last runs the dense smoother
Z_MAX = 4.5          # |z| bound over all cells (about 150 cells: a false alarm ~ 1e-3)


def _moments(sampler, Sigma, H, seed, n=None):
    rng = np.random.default_rng(seed)
    draws = np.array([sampler.draw(Sigma, H, rng) for _ in range(n or DRAWS[sampler.route])])
    return draws.mean(axis=0), draws.var(axis=0, ddof=1), len(draws)


def _check(mean, var, n, ref_mean, ref_var):
    """Mean within Z_MAX standard errors; variance within Z_MAX of its sampling sd
    (Gaussian draws: sd of the sample variance = var sqrt(2 / (n - 1)))."""
    assert np.array_equal(np.isnan(mean), np.isnan(ref_mean))
    ok = ~np.isnan(ref_mean)
    z_mean = (mean[ok] - ref_mean[ok]) / np.sqrt(ref_var[ok] / n)
    z_var = (var[ok] / ref_var[ok] - 1.0) / np.sqrt(2.0 / (n - 1))
    assert np.abs(z_mean).max() < Z_MAX, np.abs(z_mean).max()
    assert np.abs(z_var).max() < Z_MAX, np.abs(z_var).max()


@pytest.mark.parametrize("pattern,structure,scaled,informative,route", [
    ("balanced", "factor", False, False, "spectral"), ("balanced", "full", True, False, "spectral"),
    ("exits", "factor", False, False, "precision"), ("exits", "full", True, True, "precision"),
    ("balanced", "factor", False, True, "precision"),
    ("exits", "factor", True, False, "mean-correction"),
    ("balanced", "full", False, True, "mean-correction")])
def test_premium_draws_match_dense_smoother(pattern, structure, scaled, informative, route):
    rng = np.random.default_rng(11)
    _, Sigma, H = _model(rng, structure)
    Y = _panel(rng, pattern)
    s2 = np.exp(rng.normal(size=T) * 0.3) if scaled else None
    init = (0.1, 0.5) if informative else None
    forced = route if route == "mean-correction" else "auto"
    pattern = "gaps" if (pattern, route) == ("exits", "mean-correction") else pattern
    sampler = PathSampler(Y, s2, init, route=forced)
    assert sampler.route == route
    ref = dense_smoother(Y, Sigma, H, s2, init=init, want_estep=False)   # the project's oracle
    _check(*_moments(sampler, Sigma, H, 5), ref.smoothed_mean, ref.smoothed_var)


def test_singular_and_stiff_premium_covariances_keep_draws_exact():
    """Two zero own premium variances with one factor make Sigma singular (the precision route
    falls back to the mean correction); a premium variance 1e-8 of the return noise makes the
    precision matrix stiff.  Every route still agrees with the dense smoother."""
    rng = np.random.default_rng(3)
    lam, _, H = _model(rng, "factor")
    singular = lam @ lam.T + np.diag([0.02, 0.0, 0.0, 0.03, 0.01])
    stiff = lam @ lam.T * 1e-6 + np.diag([1e-8, 2e-8, 1e-8, 3e-8, 1e-8])
    for Sigma, n in ((singular, DRAWS["mean-correction"]), (stiff, None)):
        for pattern in ("balanced", "staircase"):
            Y = _panel(rng, pattern)
            ref = dense_smoother(Y, Sigma, H, want_estep=False)
            _check(*_moments(PathSampler(Y), Sigma, H, 8, n), ref.smoothed_mean, ref.smoothed_var)


def test_premium_draws_match_statsmodels_smoother():
    """Outside reference: statsmodels' MLEModel smoother (exact diffuse initialisation) on the
    identical model (tests/ssm_reference.py), ragged panel with a factor H."""
    from tests.ssm_reference import covariance_diagonals, statsmodels_smoother

    rng = np.random.default_rng(21)
    _, Sigma, H = _model(rng, "factor")
    Y = _panel(rng, "exits")
    sm = statsmodels_smoother(Y, Sigma, H)
    ref_mean = np.asarray(sm.smoothed_state).T
    ref_var = covariance_diagonals(np.asarray(sm.smoothed_state_cov))
    mean, var, n = _moments(PathSampler(Y), Sigma, H, 9)
    ok = ~np.isnan(mean)      # statsmodels carries every level from the start (flat before entry)
    _check(mean[ok], var[ok], n, ref_mean[ok], ref_var[ok])


def test_univariate_local_level_matches_unobserved_components():
    """Outside reference: statsmodels' UnobservedComponents('llevel') with exact diffuse
    initialisation, fixed variances (the classic single-series local level)."""
    import statsmodels.api as sm

    rng = np.random.default_rng(4)
    y = np.cumsum(rng.normal(size=40) * 0.3) + rng.normal(size=40)
    y[[7, 8, 20]] = np.nan
    mod = sm.tsa.UnobservedComponents(y, "llevel", use_exact_diffuse=True)
    res = mod.smooth([1.0, 0.09])                     # (sigma2.irregular, sigma2.level)
    ref_mean = np.asarray(res.smoothed_state)[0]
    ref_var = np.asarray(res.smoothed_state_cov)[0, 0]
    mean, var, n = _moments(PathSampler(y[:, None]), np.array([[0.09]]), np.array([[1.0]]), 12)
    _check(mean[:, 0], var[:, 0], n, ref_mean, ref_var)
