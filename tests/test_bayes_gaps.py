"""The sampler's data augmentation of gaps (returns missing inside an asset's history or not yet
published at its last dates; :mod:`panel.bayes.sampler`, step 5): the chain that draws the gap
cells must have the posterior of the chain that integrates them out.

Outside references: statsmodels' state-space smoother at known parameters (tests/ssm_reference.py)
and Gaussian conditioning in covariance form (the Schur complement, numpy).  The Nile check with
Durbin & Koopman's missing years against grid integration of statsmodels' likelihood is in
test_bayes_posterior.py.  Invented panels, fixed seeds.
"""

from __future__ import annotations

import numpy as np
import pytest

from panel.bayes import Priors, sample
from panel.bayes.conditionals import impute_shocks
from panel.bayes.sampler import Gibbs, resolved_model
from panel.model.spec import ModelSpec, SpecError

Z_MAX = 4.5        # |z| bound over all checked cells (a few hundred: a false alarm ~ 1e-3)


def _gap_panel(rng, T=60, N=3, entry=0, common=0.0):
    """Local levels plus noise with 8% isolated holes, asset 2's last two returns unpublished,
    and (``entry`` > 0) asset 1 entering late; returns (Y, q, psi).  ``common``: the sd of a
    return shock shared by all assets (one return factor), on top of the own noise.  Without an entry asset 1's
    premium is constant (q = 0: a singular Sigma), with one it moves (the banded precision route
    needs Sigma positive definite, else each draw falls back to the slow dense route)."""
    q = np.linspace(0.02, 0.04, N)
    q[1] = 0.0 if entry == 0 else 0.01
    psi = np.linspace(0.8, 1.3, N)
    Y = np.cumsum(rng.normal(size=(T, N)) * np.sqrt(q), axis=0) + rng.normal(size=(T, N)) * np.sqrt(psi)
    Y += common * rng.normal(size=(T, 1))
    holes = rng.random((T, N)) < 0.08
    holes[0] = False
    Y[holes] = np.nan
    Y[-2:, 2] = np.nan
    Y[:entry, 1] = np.nan
    Y[entry, 1] = 0.3
    return Y, q, psi


def _ess(draws):
    """ArviZ's bulk ESS per cell of ``draws`` (chains, draws, ...)."""
    import arviz as az

    return az.ess(az.convert_to_dataset(draws))["x"].values


@pytest.mark.parametrize("entry, route", [(0, "spectral"), (12, "precision")])
def test_augmented_chain_at_known_parameters_matches_statsmodels_smoother(entry, route):
    """Every variance fixed (one of them 0): the chain alternates premia given the filled panel
    and gap cells given the premia, so its premium draws must have the smoothed mean and variance
    of statsmodels' smoother on the panel with its gaps (exact diffuse initialisation).  Cells
    checked: every active date and asset, the gap dates included; Monte Carlo error from the
    chain's effective sample size per cell."""
    from tests.ssm_reference import covariance_diagonals, statsmodels_smoother

    rng = np.random.default_rng(31 + entry)
    Y, q, psi = _gap_panel(rng, entry=entry)
    T, N = Y.shape
    rs = resolved_model(0, "diagonal", 0, 12, fixed_q=q, fixed_psi=psi)
    gibbs = Gibbs(Y, np.ones(T), None, rs, Priors().resolve(Y, 12, "diagonal"))
    assert gibbs.paths.route == route and gibbs.gap_at[0].size == np.isnan(Y[:, [0, 2]]).sum() + \
        np.isnan(Y[entry + 1:, 1]).sum()
    chain = np.random.default_rng(5)
    st = gibbs.start(chain)
    paths = np.array([gibbs.sweep(st, chain) for _ in range(3200)])[200:]
    sm = statsmodels_smoother(Y, np.diag(q), np.diag(psi))
    ref_mean = np.asarray(sm.smoothed_state).T
    ref_var = covariance_diagonals(np.asarray(sm.smoothed_state_cov))
    ok = gibbs.active
    n = _ess(paths[None])[ok]
    assert n.min() > 200, n.min()
    z_mean = (paths.mean(axis=0)[ok] - ref_mean[ok]) / np.sqrt(ref_var[ok] / n)
    z_var = (paths.var(axis=0)[ok] / ref_var[ok] - 1.0) / np.sqrt(2.0 / n)
    assert np.abs(z_mean).max() < Z_MAX, np.abs(z_mean).max()
    assert np.abs(z_var).max() < Z_MAX, np.abs(z_var).max()


def test_precision_form_shock_draws_match_gaussian_conditioning():
    """``impute_shocks(..., precision=True)`` (batched precision form) against the covariance
    form of Gaussian conditioning: mean ``H_UO H_OO^-1 u_O`` and covariance ``H_UU - H_UO H_OO^-1
    H_OU`` per date, with one, two and all cells missing."""
    rng = np.random.default_rng(12)
    N = 5
    A = rng.normal(size=(N, N))
    H = A @ A.T + np.eye(N)
    u = rng.normal(size=(4, N))
    obs = np.ones((4, N), bool)
    obs[0, 1] = obs[1, 3] = False
    obs[2, [0, 3]] = False
    obs[3] = False
    n = 40000
    draws = impute_shocks(np.tile(u, (n, 1)), np.tile(obs, (n, 1)), H, rng,
                          precision=True).reshape(n, 4, N)
    for t in range(4):
        U, O = ~obs[t], obs[t]
        G = np.linalg.solve(H[np.ix_(O, O)], H[np.ix_(O, U)]).T if O.any() else np.zeros((U.sum(), 0))
        mean = G @ u[t, O]
        cov = H[np.ix_(U, U)] - G @ H[np.ix_(O, U)]
        sd = np.sqrt(np.diag(cov))
        got = draws[:, t][:, U]
        assert np.all(np.abs(got.mean(axis=0) - mean) < Z_MAX * sd / np.sqrt(n))
        np.testing.assert_allclose(np.cov(got.T), cov, atol=Z_MAX * np.sqrt(2.0 / n) * sd.max() ** 2)
        np.testing.assert_array_equal(draws[:, t][:, O], np.broadcast_to(u[t, O], (n, O.sum())))


@pytest.mark.parametrize("structure", ["factor", "full"])
def test_augmented_and_integrated_samplers_agree(structure):
    """The same posterior two ways (consistency of the blocked scheme with a factor H, where the
    gap draw conditions on this sweep's return factors, and with a full H): posterior means of
    the own premium and return variances and of the last premia agree within their combined
    Monte Carlo error (ESS-based)."""
    rng = np.random.default_rng(44)
    Y, _, _ = _gap_panel(rng, T=60, N=4, common=2.0)
    kw = dict(ppy=12, k=0, structure=structure, draws=1000, chains=2, warmup=200, n_summary=2)
    aug = sample(Y, **kw, seed=1)
    marg = sample(Y, **kw, seed=2, augment_gaps=False)
    assert aug.settings["gap_cells"] > 0 and marg.settings["gap_cells"] == 0
    assert aug.settings["path_route"] == "spectral" != marg.settings["path_route"]
    ret = "psi" if structure == "factor" else "H"
    for key in ("q", ret, "premium_last"):
        a, b = aug.draws[key], marg.draws[key]
        if key == "H":
            a, b = np.diagonal(a, axis1=-2, axis2=-1), np.diagonal(b, axis1=-2, axis2=-1)
        se2 = [x.var(axis=(0, 1)) / _ess(x) for x in (a, b)]
        z = (a.mean(axis=(0, 1)) - b.mean(axis=(0, 1))) / np.sqrt(se2[0] + se2[1])
        assert np.abs(z).max() < Z_MAX, (key, z)


def test_setting_is_recorded_and_old_runs_read_as_integrated():
    """New Bayesian specs augment; settings stored without the key (before it existed) read back
    as False, so those runs reproduce bit for bit; ML settings do not carry it."""
    spec = ModelSpec(estimation="bayes", draws=10)
    assert spec.augment_gaps and spec.to_dict()["augment_gaps"] is True
    old = {k: v for k, v in spec.to_dict().items() if k != "augment_gaps"}
    assert ModelSpec.from_dict(old).augment_gaps is False
    assert "augment_gaps" not in ModelSpec().to_dict()
    with pytest.raises(SpecError, match="Bayesian estimation only"):
        ModelSpec(augment_gaps=False).resolve(3, 12, 40, ("a", "b", "c"))
    with pytest.raises(SpecError, match="augment_gaps must be True or False"):
        ModelSpec(estimation="bayes", augment_gaps="yes").resolve(3, 12, 40, ("a", "b", "c"))
    from panel.model.params import Params
    from panel.report.content import setting_lines

    p = Params.build(np.zeros((3, 0)), np.full(3, 1e-6), "diagonal", psi=np.ones(3))
    words = {s: dict(setting_lines(s, {}, p, 12))["estimation"] for s in (spec, ModelSpec.from_dict(old))}
    assert words[spec].endswith("gaps drawn by the sampler")
    assert words[ModelSpec.from_dict(old)].endswith("gaps integrated out")


def test_panels_without_gaps_draw_the_same_numbers_either_way():
    """Exits are not gaps: nothing to augment, and the chain is bit-identical with the setting off."""
    rng = np.random.default_rng(3)
    Y = rng.normal(size=(40, 3)) * 0.04
    Y[30:, 1] = np.nan                                     # an exit (more than 3 dates)
    kw = dict(ppy=12, k=0, structure="diagonal", draws=20, chains=1, warmup=5, n_summary=2, seed=4)
    a, b = sample(Y, **kw), sample(Y, **kw, augment_gaps=False)
    assert a.settings["gap_cells"] == 0
    for key in a.draws:
        assert np.array_equal(a.draws[key], b.draws[key])
