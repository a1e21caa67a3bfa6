"""The fit's final report in bounded memory (covariances recomputed in blocks, panel.kalman.checkpoints)
gives the same per-date moments, factor paths and covariances as the report that keeps every date's
covariance (bit for bit in practice; asserted to 1e-12 relative).  Invented data, fixed seeds."""

import numpy as np
import pytest

from panel.kalman import paths
from panel.kalman.checkpoints import checkpoint_interval
from panel.kalman.dense import dense_smoother
from panel.kalman.stretch import final_stretch_start
from tests.ssm_reference import covariance_diagonals, statsmodels_smoother
from tests.test_fast_paths import N, REPORT_FIELDS, T, _isolated_gaps, _model, _panel

PATTERNS = ("isolated gaps", "exits", "staircase")


def _case(pattern, seed=21):
    rng = np.random.default_rng(seed)
    Y = _isolated_gaps(rng, 0.1) if pattern == "isolated gaps" else _panel(rng, pattern)
    lam, Sigma, H = _model(rng, "factor")
    return Y, lam, Sigma, H, rng.uniform(0.5, 2.0, T)


def _same(got, ref, rel=1e-12):
    """Same NaN layout and values to ``rel`` (relative to the largest magnitude)."""
    assert np.array_equal(np.isnan(got), np.isnan(ref))
    if ref.size and not np.isnan(ref).all():
        assert np.nanmax(np.abs(got - ref)) <= rel * max(np.nanmax(np.abs(ref)), 1e-300)


def _same_report(got, ref):
    assert got.loglik == pytest.approx(ref.loglik, rel=1e-12)
    for name in REPORT_FIELDS:
        _same(getattr(got, name), getattr(ref, name))
    assert sorted(got.covariances) == sorted(ref.covariances)
    for t, kinds in ref.covariances.items():
        for kind, cov in kinds.items():
            _same(got.covariances[t][kind], cov)


@pytest.mark.parametrize("pattern", PATTERNS)
@pytest.mark.parametrize("method", ["dense", "stretch"])
@pytest.mark.parametrize("factors,scaled,informative", [(False, False, False), (True, True, True),
                                                        (True, False, False)])
def test_bounded_report_equals_the_report_that_keeps_every_date(pattern, method, factors, scaled,
                                                                 informative):
    """Plan.report(bounded=True) == Plan.report(bounded=False): means, variances, predictions,
    innovations, factor paths and the full covariances at cov_at dates (in blocks and at their
    edges), with and without loadings, volatility scale and informative start."""
    Y, lam, Sigma, H, s2 = _case(pattern)
    dense_dates = T if method == "dense" else final_stretch_start(Y)
    assert checkpoint_interval(dense_dates) < dense_dates // 2     # several blocks recomputed
    plan = paths.Plan(Y, s2 if scaled else None, (0.02, 0.3) if informative else None, method)
    cov_at = (0, 4, dense_dates - 1, T - 1)
    kw = {"Lambda": lam if factors else None, "cov_at": cov_at}
    _same_report(plan.report(Sigma, H, bounded=True, **kw), plan.report(Sigma, H, bounded=False, **kw))


@pytest.mark.parametrize("pattern", PATTERNS)
def test_bounded_cross_section_equals_unbounded(pattern):
    """The one-date report of a cross-section (covariance_at's only_cov) is the same bounded."""
    Y, _, Sigma, H, _ = _case(pattern, seed=22)
    plan = paths.Plan(Y)
    for t in (3, T - 1):
        got = plan.report(Sigma, H, cov_at=(t,), only_cov=True, bounded=True)
        ref = plan.report(Sigma, H, cov_at=(t,), only_cov=True, bounded=False)
        for kind in ("filtered", "smoothed"):
            _same(got.covariances[t][kind], ref.covariances[t][kind])
        _same(got.smoothed_mean[t], ref.smoothed_mean[t])


def test_memory_estimate_follows_the_bounded_passes():
    """Beyond KEEP_ALL_BYTES the fit's dense passes (E-steps and report alike) hold about
    4 sqrt(T) covariances, not 2 T: the estimate that refuses panels too large says so."""
    rng = np.random.default_rng(23)
    Y = rng.normal(size=(1200, 200))
    Y[1:][rng.random((1199, 200)) < 0.02] = np.nan              # 2% isolated gaps to the end
    plan = paths.Plan(Y, method="dense")
    assert plan._bounded(1200) and not plan._bounded(40)
    need = paths.memory_estimate(Y, "dense")
    kept_all = paths.keeps_all_bytes(1200, 200)
    assert paths.dense_kept_bytes(1200, 200) < kept_all / 10 < need < kept_all
    assert paths.dense_kept_bytes(40, 200) == paths.keeps_all_bytes(40, 200)


def test_bounded_report_matches_statsmodels_smoother():
    """Outside reference: statsmodels' MLEModel Kalman filter and smoother (design I, transition I,
    state_cov Sigma, obs_cov H, exact diffuse initialisation; tests/ssm_reference.py) on a small
    panel with isolated gaps, our report forced onto the bounded (recomputing) dense path: the
    filtered and smoothed standard deviations of the premia agree."""
    Y, _, Sigma, H, _ = _case("isolated gaps", seed=24)
    ours = paths.Plan(Y, method="dense").report(Sigma, H, bounded=True)
    ref = statsmodels_smoother(Y, Sigma, H)
    seen = ~np.isnan(ours.filtered_var)
    for mine, theirs in ((ours.filtered_var, ref.filtered_state_cov),
                         (ours.smoothed_var, ref.smoothed_state_cov)):
        np.testing.assert_allclose(np.sqrt(mine[seen]), np.sqrt(covariance_diagonals(theirs)[seen]),
                                   rtol=1e-8)
    np.testing.assert_allclose(ours.smoothed_mean[seen], ref.smoothed_state.T[seen], rtol=0, atol=1e-8)


def test_bounded_dense_smoother_keeps_its_e_step():
    """dense_smoother(bounded=True) with report and EM moments together: the log-likelihood and the
    report arrays of the unbounded pass (the E-step's moments are checked in test_fast_paths)."""
    Y, lam, Sigma, H, s2 = _case("staircase", seed=25)
    got = dense_smoother(Y, Sigma, H, s2, Lambda=lam, bounded=True)
    ref = dense_smoother(Y, Sigma, H, s2, Lambda=lam)
    assert got.estep.loglik == ref.estep.loglik
    for name in REPORT_FIELDS:
        _same(getattr(got, name), getattr(ref, name))
