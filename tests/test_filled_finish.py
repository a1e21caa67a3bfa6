"""The fit of a panel with gaps on its gap-filled copy (panel.model.surrogate): the same optimum as
outside references (statsmodels' exact diffuse local level on the Nile data with Durbin & Koopman's
missing years; scipy.optimize on the exact likelihood of Fama-French industries with holes), the
gap fill against statsmodels' smoother, and when the route is taken."""

import dataclasses

import numpy as np
import pandas as pd
import pytest

import panel
from panel.bench.fit import simulate
from panel.kalman.gapfill import LATE, fill_gaps, fillable, interior_gaps
from panel.model import surrogate
from panel.model.problem import Problem
from panel.model.spec import ModelSpec
from tests.scipy_reference import lbfgsb_objective
from tests.ssm_reference import ExactLocalLevel, statsmodels_smoother


def test_gaps_are_inside_each_history_or_late():
    nan = np.nan
    Y = np.array([[nan, 1.0, 1.0],
                  [1.0, nan, 1.0],
                  [nan, 1.0, nan],
                  [1.0, nan, nan]])
    expected = np.array([[0, 0, 0],
                         [0, 1, 0],
                         [1, 0, 0],
                         [0, 0, 0]], bool)     # before entry, after the last return: not gaps
    np.testing.assert_array_equal(interior_gaps(Y), expected)
    late = np.full((LATE + 3, 3), 1.0)
    late[-LATE:, 0] = np.nan            # its last LATE returns not yet published: fillable
    late[-LATE - 1:, 1] = np.nan        # one more: the asset has left, never filled
    late[0, 2] = np.nan                 # not entered yet: never filled
    want = np.zeros(late.shape, bool)
    want[-LATE:, 0] = True
    np.testing.assert_array_equal(fillable(late), want)


def test_fill_gaps_is_the_conditional_mean_from_statsmodels_smoother():
    # Source: statsmodels' Kalman smoother (exact diffuse) for the smoothed premia, and Gaussian
    # conditioning in covariance form, E[eps_U | eps_O] = H_UO H_OO^-1 eps_O, for the shocks.
    rng = np.random.default_rng(5)
    T, N = 40, 4
    A = rng.normal(size=(N, N)) * 0.02
    H = A @ A.T + np.diag(rng.uniform(1e-4, 4e-4, N))
    Sigma = np.diag(rng.uniform(1e-6, 4e-6, N)) + 1e-6
    Y = 0.005 + rng.normal(size=(T, N)) @ np.linalg.cholesky(H).T
    holes = rng.random((T, N)) < 0.1
    holes[0] = holes[-1] = False
    Y[holes] = np.nan
    sm = statsmodels_smoother(Y, Sigma, H)
    mu = sm.smoothed_state.T                                # (T, N)
    filled = fill_gaps(Y, mu, H)
    for t in np.flatnonzero(holes.any(axis=1)):
        U, O = holes[t], ~holes[t]
        shock = H[np.ix_(U, O)] @ np.linalg.solve(H[np.ix_(O, O)], Y[t, O] - mu[t, O])
        np.testing.assert_allclose(filled[t, U], mu[t, U] + shock, rtol=1e-10, atol=1e-13)
    np.testing.assert_array_equal(filled[~holes], Y[~holes])


@pytest.fixture(scope="module")
def nile_with_gaps():
    from statsmodels.datasets import nile as nile_data

    y = nile_data.load_pandas().data["volume"].to_numpy(dtype=float).copy()
    y[20:40] = np.nan           # Durbin & Koopman (2012, section 2.7): observations 21-40 and
    y[60:80] = np.nan           # 61-80 treated as missing
    frame = pd.DataFrame({"Nile": y}, index=pd.date_range("1871-12-31", periods=y.size, freq="YE"))
    return panel.Panel.from_frame(frame, frequency="A")


def test_filled_finish_matches_statsmodels_on_nile_with_missing_years(nile_with_gaps):
    # Source: statsmodels MLEModel (exact diffuse local level) fitted by its own optimiser on the
    # same series with the same years missing.  The route certifies its optimum in log-likelihood
    # units (less than loglik_tol = 1e-4 left to gain), so it is compared there; the Nile
    # likelihood is so flat in the level variance that 1e-4 of log-likelihood allows about 1% of it
    # (measured: 4e-5 and 0.7%, against a standard error of about 50%).
    res = panel.fit(nile_with_gaps, panel.ModelSpec(finish="filled", std_errors="never"))
    assert "finish on the filled panel" in res.message and res.converged   # not the fallback
    mod = ExactLocalLevel(nile_with_gaps.values["Nile"].to_numpy())
    ref = mod.fit(disp=False, method="bfgs", maxiter=500, gtol=1e-10)
    eps, eta = ref.params
    assert ref.llf - 1e-4 <= res.loglik <= ref.llf + 1e-9 * abs(ref.llf)
    assert res.params.H[0, 0] == pytest.approx(eps, rel=0.005)
    assert res.params.q[0] == pytest.approx(eta, rel=0.02)
    obj = res.trace["objective"].to_numpy()
    assert np.all(np.diff(obj) > 0)             # exact objectives only, each step an increase
    direct = panel.fit(nile_with_gaps, panel.ModelSpec(std_errors="never", finish="auto"))  # too small
    assert "gap-filled" not in direct.message
    assert direct.params.q[0] == pytest.approx(eta, rel=1e-4)


@pytest.fixture(scope="module")
def industries_with_holes():
    """Four Fama-French industry portfolios' excess returns (linearmodels.datasets.french) from
    2005, with 3% of the returns inside the sample removed at fixed random positions."""
    from linearmodels.datasets import french

    d = french.load()
    d = d[d["dates"] >= "2005-01-01"]
    idx = pd.DatetimeIndex(d["dates"]) + pd.offsets.MonthEnd(0)
    cols = ["NoDur", "Durbl", "Manuf", "Enrgy"]
    Y = np.column_stack([(d[c] - d["RF"]).to_numpy() for c in cols])
    holes = np.random.default_rng(11).random(Y.shape) < 0.03
    holes[0] = holes[-1] = False
    Y[holes] = np.nan
    return panel.Panel.from_frame(pd.DataFrame(Y, index=idx, columns=cols), frequency="M")


def test_filled_finish_reaches_the_exact_optimum_on_industries(industries_with_holes):
    # Source: scipy.optimize (L-BFGS-B) on the exact log-likelihood (plus the same weak premium
    # prior, which keeps the optimum off the zero-variance boundary) from the same starting values.
    data = industries_with_holes
    base = dict(premium_factors=1, return_shocks="full", std_errors="never",
                premium_prior=panel.Prior(vol=0.24, weight=24))
    filled = panel.fit(data, panel.ModelSpec(finish="filled", **base))
    direct = panel.fit(data, panel.ModelSpec(finish="direct", **base))
    assert "finish on the filled panel" in filled.message and "gap-filled" not in direct.message
    best = lbfgsb_objective(data, panel.ModelSpec(**base))
    assert filled.objective >= best - 1e-6 * abs(best)
    assert abs(filled.objective - direct.objective) < 1e-4         # both within loglik_tol
    np.testing.assert_allclose(filled.params.Sigma, direct.params.Sigma, rtol=0.02,
                               atol=1e-3 * np.abs(direct.params.Sigma).max())
    np.testing.assert_allclose(filled.params.H, direct.params.H, rtol=1e-3,
                               atol=1e-4 * np.abs(direct.params.H).max())


def _counts(message):
    """(exact passes on the panel, E-steps on the copy) from a filled route's message."""
    import re
    found = re.search(r"(\d+) exact passes on the panel, (\d+) on its gap-filled copy", message)
    return int(found.group(1)), int(found.group(2))


def test_warm_filled_route_reaches_the_optimum_on_fewer_e_steps(industries_with_holes, monkeypatch):
    # Source: scipy.optimize (L-BFGS-B) on the exact log-likelihood, as above.  The route started
    # from the copy's own smoother, its outer steps' finishes going on from the previous finish's
    # curvature, must reach the same optimum within loglik_tol on fewer exact passes and fewer
    # E-steps of the filled copy than the cold route (exact start, L-BFGS-B restarted each time).
    data = industries_with_holes
    base = dict(premium_factors=1, return_shocks="full", std_errors="never",
                premium_prior=panel.Prior(vol=0.24, weight=24))
    warm = panel.fit(data, panel.ModelSpec(finish="filled", **base))
    cold = panel.fit(data, panel.ModelSpec(finish="filled", filled_warm=False, **base))
    best = lbfgsb_objective(data, panel.ModelSpec(**base))
    assert warm.status == cold.status == "converged"
    assert abs(warm.objective - best) < 1e-4 and abs(cold.objective - best) < 1e-4
    assert _counts(warm.message)[1] < 0.7 * _counts(cold.message)[1], (warm.message, cold.message)
    assert _counts(warm.message)[0] < _counts(cold.message)[0]
    assert np.all(np.diff(warm.trace["objective"].to_numpy()) >= 0)
    # a warm finish that finds no increase hands over to the cold one from its best point
    from panel.model import warm as warm_module

    monkeypatch.setattr(warm_module, "HALVINGS", 0)
    fallback = panel.fit(data, panel.ModelSpec(finish="filled", **base))
    assert fallback.status == "converged" and abs(fallback.objective - best) < 1e-4
    assert _counts(fallback.message)[1] > _counts(warm.message)[1]


def test_filled_finish_under_a_premium_volatility_cap(industries_with_holes):
    # One premium factor, a factor H and a cap at the median uncapped premium volatility: the
    # filled route keeps the cap in its boxed finish and reaches the direct route's optimum (whose
    # boxed finish is checked against scipy.optimize in test_engine_estimation.py; scipy's
    # finite-difference run on this gap panel takes minutes) within loglik_tol.
    data = industries_with_holes
    free = panel.fit(data, panel.ModelSpec(premium_factors=1, std_errors="never"))
    cap = float(np.sqrt(np.median(np.diag(free.params.Sigma)) * 12 ** 3))
    spec = panel.ModelSpec(premium_factors=1, max_premium_vol=cap, std_errors="never", finish="filled")
    res = panel.fit(data, spec)
    direct = panel.fit(data, dataclasses.replace(spec, finish="direct"))
    assert "finish on the filled panel" in res.message, res.message
    assert direct.status in ("converged", "boundary") and abs(res.objective - direct.objective) < 1e-4
    sigma = np.diag(res.params.Sigma) * 12 ** 3
    assert sigma.max() <= cap ** 2 * (1 + 1e-9) and sigma.max() >= cap ** 2 * (1 - 1e-6)
    old = _problem("gaps_2", ModelSpec(premium_factors=1, max_premium_vol=0.02, cap_method="projection"))
    assert not surrogate.route(old, "filled")           # no boxed finish: the panel itself


def _problem(pattern, spec=None, N=60, T=300):
    frame, _, _ = simulate(N, T, pattern)
    return Problem(panel.Panel.from_frame(frame), spec or ModelSpec())


def test_route_is_taken_for_sparse_gaps_only():
    assert surrogate.route(_problem("gaps_2"), "auto")
    assert not surrogate.route(_problem("gaps_2"), "direct")
    assert not surrogate.route(_problem("exits"), "auto")        # exits are not gaps
    assert not surrogate.route(_problem("staircase"), "filled")  # nothing to fill
    assert not surrogate.route(_problem("balanced"), "filled")
    many = _problem("gaps_2")
    many.Y = many.Y.copy()
    many.Y[1:90:2, 0] = np.nan                                     # 15% of one asset's span
    assert not surrogate.route(many, "auto") and surrogate.route(many, "filled")
    dense = _problem("gaps_2", ModelSpec(method="dense"))          # the filled copy no cheaper
    assert not surrogate.route(dense, "auto")
    two = _problem("gaps_2", ModelSpec(premium_factors=2))          # several local optima
    assert not surrogate.route(two, "auto") and surrogate.route(two, "filled")
    small = _problem("gaps_2", N=10, T=120)                        # its exact E-step is quick
    assert not surrogate.route(small, "auto") and surrogate.route(small, "filled")


def test_a_direct_fit_that_the_filled_route_would_speed_up_says_so():
    frame, _, _ = simulate(60, 300, "gaps_2")
    data = panel.Panel.from_frame(frame)
    cells = int(fillable(frame.to_numpy()).sum())
    direct = panel.fit(data, ModelSpec(std_errors="never", max_iter=5))
    assert f"; {cells} gap cells fitted on the panel itself: finish='filled'" in direct.message
    cells, speedup = surrogate.missed_gaps(Problem(data, ModelSpec()))
    assert speedup >= surrogate.MIN_SPEEDUP and f"estimated {speedup:.0f}x cheaper" in direct.message
    filled = panel.fit(data, ModelSpec(std_errors="never", max_iter=5, finish="filled"))
    assert "fitted on the panel itself" not in filled.message
    exits = panel.fit(panel.Panel.from_frame(simulate(60, 300, "exits")[0]),
                      ModelSpec(std_errors="never", max_iter=5))
    assert "gap cells" not in exits.message                   # exits are not gaps
    small = panel.fit(panel.Panel.from_frame(simulate(10, 120, "gaps_2")[0]),
                      ModelSpec(std_errors="never", max_iter=5))
    assert "gap cells" not in small.message                   # its exact E-step is quick anyway


def test_the_hint_names_a_smaller_speedup_on_a_panel_still_ragged_when_filled():
    # single late entrants keep the filled copy on the segment path: its E-step is a few times
    # cheaper, not tens (simulated; the factor is the paths' own cost estimate)
    frame, _, _ = simulate(60, 300, "balanced")
    Y = frame.to_numpy().copy()
    for i in range(0, 60, 10):
        Y[: 10 + (i * 300) // 120, i] = np.nan
    Y[np.random.default_rng(5).random(Y.shape) < 0.002] = np.nan
    data = panel.Panel.from_frame(frame.__class__(Y, index=frame.index, columns=frame.columns))
    prob = Problem(data, ModelSpec())
    cells, speedup = surrogate.missed_gaps(prob)
    assert cells == int(fillable(Y).sum()) > 0
    assert surrogate.HINT_SPEEDUP <= speedup < surrogate.MIN_SPEEDUP
    assert not surrogate.route(prob, "auto")                   # "auto" keeps its 10x rule
    direct = panel.fit(data, ModelSpec(std_errors="never", max_iter=2))
    assert direct.message.endswith(f"; {cells} gap cells fitted on the panel itself: finish='filled' "
                                   f"(--gaps filled) fits on a gap-filled copy whose E-step is "
                                   f"estimated {speedup:.1f}x cheaper")


def test_settings_stored_without_finish_fit_on_the_panel_itself():
    spec = ModelSpec.from_dict({k: v for k, v in ModelSpec().to_dict().items()
                                if k not in ("finish", "filled_warm")})
    assert spec.finish == "direct" and spec.filled_warm is False
    assert ModelSpec().finish == "direct" and ModelSpec().filled_warm is True
    with pytest.raises(panel.SpecError, match="finish must be one of"):
        _problem("gaps_2", ModelSpec(finish="sometimes"))
    with pytest.raises(panel.SpecError, match="filled_warm must be True or False"):
        _problem("gaps_2", ModelSpec(filled_warm="yes"))
    from panel.model.params import Params
    from panel.report.content import setting_lines

    p = Params.build(np.zeros((3, 0)), np.full(3, 1e-6), "diagonal", psi=np.ones(3))
    line = {w: dict(setting_lines(ModelSpec(finish="filled", filled_warm=w), {}, p, 12))["estimation"]
            for w in (True, False)}
    assert "on a filled copy)" in line[True] and "each correction restarted)" in line[False]


def test_filled_finish_budget_and_fallback(industries_with_holes, monkeypatch):
    base = dict(premium_factors=1, std_errors="never")
    short = panel.fit(industries_with_holes, panel.ModelSpec(finish="filled", max_iter=30, **base))
    assert short.status == "max_iter" and "gap-filled copy" in short.message
    assert short.n_iter <= 31
    # with no outer steps allowed, the direct finish takes over from the filled copy's optimum
    monkeypatch.setattr(surrogate, "MAX_OUTER", 0)
    res = panel.fit(industries_with_holes, panel.ModelSpec(finish="filled", **base))
    direct = panel.fit(industries_with_holes, panel.ModelSpec(finish="direct", **base))
    assert "finish on the panel itself" in res.message
    assert abs(res.loglik - direct.loglik) < 1e-4
    obj = res.trace["objective"].to_numpy()
    assert np.all(np.diff(obj) >= 0)


def test_cli_gaps_option_fits_on_the_filled_copy(cli_store):
    import json

    from tests.cli_helpers import CLI_FIT_OPTIONS

    done = cli_store.invoke("fit", "--data", "trees", *CLI_FIT_OPTIONS, "--gaps", "filled", "--json")
    assert done.exit_code == 0, done.output
    assert "gap-filled copy" in json.loads(done.stdout)["message"]
    before = cli_store.digest()
    refused = cli_store.invoke("fit", "--data", "trees", "--bayes", "--gaps", "filled")
    assert refused.exit_code == 1 and "applies to ML estimation only" in refused.output
    assert len(refused.output.strip().splitlines()) == 1
    assert cli_store.invoke("fit", "--data", "trees", "--gaps", "sometimes").exit_code == 2
    assert cli_store.digest() == before                           # nothing written
