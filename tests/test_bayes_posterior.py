"""The Bayesian sampler against outside references: a brute-force grid posterior of the Nile local
level (the exact likelihood from statsmodels), the Kalman smoother at fixed parameters, and
simulation-based calibration (Talts et al. 2018).  Fixed seeds throughout."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from panel.bayes import Priors, sample
from panel.bayes.priors import PriorError
from panel.bayes.sampler import Gibbs, resolved_model, run_chain
from panel.kalman.dense import dense_smoother
from panel.model.spec import SpecError


def _nile():
    import statsmodels.api as sm

    return sm.datasets.nile.load_pandas().data["volume"].to_numpy(dtype=float, copy=True)


def _ig_logpdf(x, a, b):
    return -(a + 1.0) * np.log(x) - b / x


@pytest.mark.parametrize("missing", [False, True])
def test_nile_posterior_matches_grid_integration(missing):
    """Conjugate single-series local level with inverse-gamma priors on both variances: the
    sampler's posterior means, sds and 5/95% quantiles of (q, h) against numerical integration
    of statsmodels' exact diffuse log-likelihood (UnobservedComponents 'llevel',
    use_exact_diffuse=True) times the prior on a 90 x 70 log grid.  ``missing``: the years
    21-40 and 61-80 removed, as in Durbin & Koopman's (2012, sec. 2.7) missing-observations
    example; the sampler draws them (data augmentation) and must still match the grid."""
    import statsmodels.api as sm

    y = _nile()
    if missing:
        y[20:40] = y[60:80] = np.nan
    # ppy = 1 (annual data): premium vol V = sqrt(q); prior medians near the ML values of
    # Durbin & Koopman (2012, ch. 2): q = 1469, h = 15099.
    priors = Priors(premium_vol_family="invgamma", premium_vol=np.sqrt(1500.0),
                    premium_vol_shape=2.0, return_vol=np.sqrt(15000.0), return_vol_shape=2.0)
    res = sample(y, ppy=1, k=0, structure="diagonal", priors=priors, draws=1500, chains=4,
                 warmup=300, seed=7, n_summary=5)
    pr = res.priors_resolved
    lq = np.linspace(np.log(20.0), np.log(4e4), 90)
    lh = np.linspace(np.log(4e3), np.log(3.5e4), 70)
    mod = sm.tsa.UnobservedComponents(y, "llevel", use_exact_diffuse=True)
    logpost = np.array([[mod.loglike(np.array([np.exp(b), np.exp(a)])) for b in lh] for a in lq])
    Q, Hh = np.meshgrid(np.exp(lq), np.exp(lh), indexing="ij")
    logpost += (_ig_logpdf(Q, pr["q_a"], pr["q_b"]) + _ig_logpdf(Hh, pr["psi_a"], pr["psi_b"][0])
                + np.log(Q) + np.log(Hh))                  # grid in logs: Jacobian q h
    w = np.exp(logpost - logpost.max())
    w /= w.sum()
    assert w[[0, -1], :].sum() + w[:, [0, -1]].sum() < 1e-3     # the grid holds the posterior
    for values, marginal, draws in ((np.exp(lq), w.sum(axis=1), res.draws["q"][..., 0]),
                                    (np.exp(lh), w.sum(axis=0), res.draws["psi"][..., 0])):
        mean = values @ marginal
        sd = np.sqrt((values - mean) ** 2 @ marginal)
        cdf = np.cumsum(marginal)
        flat = draws.ravel()
        from arviz import ess
        mcse = flat.std() / np.sqrt(ess(draws))
        assert abs(flat.mean() - mean) < 4.0 * mcse + 0.01 * sd, (flat.mean(), mean, mcse)
        assert abs(flat.std() / sd - 1.0) < 0.08, (flat.std(), sd)
        for p in (0.05, 0.95):
            grid_q = np.interp(p, cdf, values)          # grid steps are 8% (q) and 3% (h) apart
            assert abs(np.quantile(flat, p) / grid_q - 1.0) < 0.08, (p, np.quantile(flat, p), grid_q)
    assert res.settings["path_route"] == "spectral"       # the filled series is balanced
    assert res.settings["gap_cells"] == (40 if missing else 0)


def test_all_variances_fixed_reproduces_the_smoother():
    """Known parameters: every variance fixed, so only the premia are drawn.  The summaries equal
    the dense smoother's moments (each draw's report is the same Gaussian) and the premium draws
    at the last date match its mean and variance within Monte Carlo error.  Invented panel; a zero
    own premium variance (a constant premium) is allowed."""
    rng = np.random.default_rng(5)
    T, N = 80, 3
    Y = np.cumsum(rng.normal(size=(T, N)) * 0.05, axis=0) + rng.normal(size=(T, N))
    q, psi = np.array([0.002, 0.0, 0.004]), np.array([1.0, 0.8, 1.3])
    res = sample(Y, ppy=12, k=0, structure="diagonal", fixed_q=q, fixed_psi=psi, draws=400,
                 chains=2, warmup=10, seed=3, n_summary=4)
    ref = dense_smoother(Y, np.diag(q), np.diag(psi), want_estep=False)     # the project's oracle
    est = res.estimates
    t_idx = res.dates.get_indexer(est["date"])
    a_idx = np.array([res.assets.index(a) for a in est["asset"]])
    np.testing.assert_allclose(est["smoothed_mean"], ref.smoothed_mean[t_idx, a_idx], rtol=0, atol=1e-12)
    np.testing.assert_allclose(est["filtered_std"], np.sqrt(ref.filtered_var[t_idx, a_idx]), rtol=1e-10)
    z05 = stats.norm.ppf(0.05)                   # one Gaussian: quantiles are the normal ones
    np.testing.assert_allclose(est["smoothed_q05"], est["smoothed_mean"] + z05 * est["smoothed_std"],
                               rtol=0, atol=1e-8 * est["smoothed_std"].max())
    last = res.draws["premium_last"].reshape(-1, N)
    m, v = ref.smoothed_mean[-1], ref.smoothed_var[-1]
    assert np.all(np.abs(last.mean(axis=0) - m) < 4.5 * np.sqrt(v / last.shape[0]))
    assert np.all(np.abs(last.var(axis=0) / v - 1.0) < 4.5 * np.sqrt(2.0 / last.shape[0]))
    assert res.status == "mixed"        # premium_last mixes (independent exact draws)


def test_runs_are_bit_identical_and_constraints_hold(tmp_path):
    """Seeded chains (SeedSequence.spawn) reproduce bit for bit; the cap and the fixed values are
    respected in every draw; priors round-trip through a dict; draws export to NetCDF."""
    import arviz as az

    rng = np.random.default_rng(8)
    Y = rng.normal(size=(60, 4)) * 0.04 + 0.005
    cap = 2e-6
    kwargs = dict(ppy=12, k=1, structure="factor", draws=60, chains=2, warmup=20, seed=11,
                  n_summary=3, max_sigma_diag=cap, fixed_q=[np.nan, 1e-7, np.nan, np.nan])
    a, b = sample(Y, **kwargs), sample(Y, **kwargs)
    for key in a.draws:
        assert np.array_equal(a.draws[key], b.draws[key])
    assert a.estimates.equals(b.estimates)
    sigma_diag = a.draws["q"] + (a.draws["Lambda"] ** 2).sum(axis=-1)
    assert sigma_diag.max() <= cap
    assert np.all(a.draws["q"][..., 1] == 1e-7)
    assert np.all(a.draws["Lambda"][..., 0].sum(axis=-1) >= 0)   # k = 1: positive loading sum
    assert Priors.from_dict(Priors(premium_vol=0.01).to_dict()) == Priors(premium_vol=0.01)
    a.to_inference_data().to_netcdf(tmp_path / "draws.nc")
    back = az.from_netcdf(tmp_path / "draws.nc")
    assert np.array_equal(back.posterior["q"].values, a.draws["q"])
    c = sample(Y, **{**kwargs, "seed": 12})
    assert not np.array_equal(a.draws["q"], c.draws["q"])


def test_bad_settings_raise_one_line():
    Y = np.random.default_rng(0).normal(size=(30, 3))
    with pytest.raises(SpecError, match="fixed_psi needs structure"):
        sample(Y, ppy=12, structure="full", fixed_psi=0.1)
    with pytest.raises(SpecError, match="draws must be"):
        sample(Y, ppy=12, draws=0)
    with pytest.raises(SpecError, match="needs ppy"):
        sample(Y)
    with pytest.raises(PriorError, match="premium_vol_family"):
        Priors(premium_vol_family="flat")


# ---------------------------------------------------------------- simulation-based calibration
SBC_REPS, SBC_KEEP, SBC_THIN = 30, 19, 12


def test_simulation_based_calibration_ranks_are_uniform():
    """Talts et al. (2018): parameters from the prior, data from the model, the rank of each true
    value among thinned posterior draws is uniform on 0..L.  N = 2, T = 60, independent local
    levels with a proper entry prior; ranks of q_i, psi_i and the last premium, pooled over
    assets, in 5 bins; chi-square p > 0.001 (a lenient bound: few replications)."""
    N, T, ppy = 2, 60, 12
    priors = Priors(premium_vol=0.05, return_vol=0.15, return_vol_shape=3.0)
    init = (0.0, 0.02 ** 2)
    rng = np.random.default_rng(2018)
    rs = resolved_model(0, "diagonal", 0, ppy)
    # return_vol is given, so the resolved diagonal-H priors do not depend on the data
    pr = priors.resolve(rng.standard_normal((T, N)), ppy, "diagonal")
    ranks = {"q": [], "psi": [], "premium_last": []}
    for rep in range(SBC_REPS):
        q = rng.normal(0.0, np.sqrt(pr.q_var), N) ** 2
        psi = pr.psi_b / rng.gamma(pr.psi_a, size=N)
        steps = rng.standard_normal((T, N)) * np.sqrt(q)
        steps[0] = init[0] + np.sqrt(init[1]) * rng.standard_normal(N)      # the entry level
        mu = np.cumsum(steps, axis=0)
        Y = mu + rng.standard_normal((T, N)) * np.sqrt(psi)
        gibbs = Gibbs(Y, np.ones(T), init, rs, pr)
        out = run_chain(gibbs, np.random.SeedSequence([7, rep]), SBC_KEEP * SBC_THIN, 60).arrays
        for key, truth in (("q", q), ("psi", psi), ("premium_last", mu[-1])):
            kept = out[key][SBC_THIN - 1::SBC_THIN]
            ranks[key].extend((kept < truth).sum(axis=0))
    for key, values in ranks.items():
        counts = np.bincount(np.asarray(values) // 4, minlength=5)
        assert stats.chisquare(counts).pvalue > 1e-3, (key, counts)


# ---------------------------------------------------------------- coverage
#: Panels in the coverage test.  A panel's coverage varies a lot (its premium errors persist over
#: time: sd about 9 points across panels, measured), so the pooled rate of 24 panels has a standard
#: error near 2 points; the paired comparison with the true-parameter bands is much sharper.
COVER_REPS = 24


def test_ninety_percent_bands_cover_true_premia():
    """Simulated panels like those of the ML coverage study (N = 5, T = 200, monthly, one premium
    factor, one return factor, every own premium variance positive): the 90% smoothed and
    filtered bands cover 87.5-93.5% of the true premia (pooled over panels, assets and dates), and
    within 2.5 points of what the Kalman bands at the true parameters cover on the same panels
    (the project's dense smoother; parameter uncertainty should widen, not narrow, the bands)."""
    N, T, ppy = 5, 200, 12
    z90 = stats.norm.ppf(0.95)
    rng = np.random.default_rng(90)
    hits = {"filtered": [], "smoothed": []}
    known = {"filtered": [], "smoothed": []}
    for rep in range(COVER_REPS):
        lam = rng.uniform(0.01, 0.02, (N, 1)) / ppy ** 1.5          # premium vol 1-2% a year
        q = rng.uniform(0.008, 0.015, N) ** 2 / ppy ** 3
        B = rng.normal(0.04, 0.008, (N, 1))
        psi = rng.uniform(0.025, 0.04, N) ** 2
        f = np.cumsum(np.vstack([np.zeros((1, 1)), rng.standard_normal((T - 1, 1))]), axis=0)
        a = 0.004 + np.cumsum(rng.standard_normal((T, N)) * np.sqrt(q), axis=0)
        mu = a + f @ lam.T
        Y = mu + rng.standard_normal((T, 1)) @ B.T + rng.standard_normal((T, N)) * np.sqrt(psi)
        res = sample(Y, ppy=ppy, k=1, structure="factor", draws=150, chains=1, warmup=75,
                     seed=rep, n_summary=15)
        ref = dense_smoother(Y, lam @ lam.T + np.diag(q), B @ B.T + np.diag(psi), want_estep=False)
        est = res.estimates
        rows = res.dates.get_indexer(est["date"])
        cols = np.array([res.assets.index(x) for x in est["asset"]])
        truth = mu[rows, cols]
        for kind in hits:
            hits[kind].append(((est[f"{kind}_q05"] <= truth) & (truth <= est[f"{kind}_q95"])).mean())
            m, v = getattr(ref, f"{kind}_mean")[rows, cols], getattr(ref, f"{kind}_var")[rows, cols]
            known[kind].append(np.mean(np.abs(truth - m) <= z90 * np.sqrt(v)))
    for kind in hits:
        rate, base = np.mean(hits[kind]), np.mean(known[kind])
        assert 0.875 <= rate <= 0.935, (kind, rate, base)
        assert abs(rate - base) < 0.025, (kind, rate, base)
