"""Rules of the model that hold by construction: common practice, a hand-computed example, the
settings' validation and the boundary reporting."""

import math

import numpy as np
import pandas as pd
import pytest

import panel
from panel.model.spec import SpecError


def one_asset(values, start="2020-01-31"):
    idx = pd.date_range(start, periods=len(values), freq="ME")
    return panel.Panel.from_frame(pd.DataFrame({"Gold Sleeve": values}, index=idx))


def test_flat_prior_first_posterior_equals_return_shock():
    # Common practice (no source): with a flat prior the first gain is 1, so the posterior variance
    # of the premium after the first return equals the return-shock variance: 20% annual return
    # volatility (sqrt(0.04/12) = 5.77% a month) gives a first posterior sd of 5.77% a month,
    # i.e. 20% once annualised by sqrt(12).
    data = one_asset([0.031, -0.012, 0.020, 0.004])
    spec = panel.ModelSpec(fixed={"premium_vol": 0.02, "return_vol": 0.20})
    res = panel.fit(data, spec)
    first = res.estimates.iloc[0]
    assert res.status == "fixed"
    assert first["filtered_mean"] == pytest.approx(0.031, abs=1e-15)        # gain 1
    assert first["filtered_std"] == pytest.approx(math.sqrt(0.04 / 12), rel=1e-12)
    assert first["filtered_std"] * math.sqrt(12) == pytest.approx(0.20, rel=1e-12)


def test_known_parameter_filter_two_steps_by_hand():
    # Hand computation of the textbook local level filter (Harvey 1989 §3.3.1 recursions) with an
    # informative prior: premium 6% +- 3% a year, premium vol 2% a year (the annualised premium moves
    # 2 points a year: q = 0.02^2 / 12^3, DESIGN.md section 5), return vol 20% (h = 0.2^2 / 12).
    h = 0.20 ** 2 / 12
    q = 0.02 ** 2 / 12 ** 3
    m0, p0 = 0.06 / 12, (0.03 / 12) ** 2
    y1, y2 = 0.02, -0.01
    f1 = p0 + h
    k1 = p0 / f1
    m1, p1 = m0 + k1 * (y1 - m0), p0 * (1 - k1)
    p2_pred = p1 + q
    f2 = p2_pred + h
    k2 = p2_pred / f2
    m2, p2 = m1 + k2 * (y2 - m1), p2_pred * (1 - k2)
    ll = -0.5 * (2 * math.log(2 * math.pi) + math.log(f1) + (y1 - m0) ** 2 / f1
                 + math.log(f2) + (y2 - m1) ** 2 / f2)
    spec = panel.ModelSpec(fixed={"premium_vol": 0.02, "return_vol": 0.20},
                           initial_premium=panel.InitialPremium(mean=0.06, vol=0.03))
    res = panel.fit(one_asset([y1, y2]), spec)
    est = res.estimates
    assert est["filtered_mean"].tolist() == pytest.approx([m1, m2], rel=1e-13)
    assert (est["filtered_std"] ** 2).tolist() == pytest.approx([p1, p2], rel=1e-13)
    assert est["predictive_mean"].iloc[1] == pytest.approx(m1, rel=1e-13)
    assert est["predictive_std"].iloc[1] ** 2 == pytest.approx(f2, rel=1e-13)
    assert res.loglik == pytest.approx(ll, rel=1e-13)


@pytest.mark.parametrize("kwargs,needle", [
    ({"premium_factors": 7}, "premium_factors must be 0..5"),
    ({"premium_factors": 2}, "not identified with 3 assets"),
    ({"return_shocks": "banded"}, "return_shocks must be one of"),
    ({"fixed": {"premium_drift": 0.1}}, "cannot fix 'premium_drift'"),
    ({"fixed": {"premium_vol:Copper": 0.1}}, "no asset 'Copper'"),
    ({"return_shocks": "full", "fixed": {"return_vol": 0.1}}, "return_vol can be fixed only"),
    ({"max_premium_vol": -1.0}, "max_premium_vol must be between"),
])
def test_bad_settings_give_one_line(kwargs, needle):
    idx = pd.date_range("2001-01-31", periods=30, freq="ME")
    frame = pd.DataFrame(np.random.default_rng(0).normal(0, 0.04, (30, 3)), index=idx,
                         columns=["Nordic Equity", "Gold Sleeve", "EM Local Bonds"])
    with pytest.raises(SpecError) as err:
        panel.fit(panel.Panel.from_frame(frame), panel.ModelSpec(**kwargs))
    assert needle in str(err.value) and "\n" not in str(err.value)


def test_upper_bound_on_premium_volatility_is_reported():
    # Invented single sleeve with a visible premium drift: the bound must bind and be reported.
    rng = np.random.default_rng(8)
    mu = np.cumsum(rng.normal(0, 0.01, 120))
    data = one_asset(mu + rng.normal(0, 0.02, 120), start="2010-01-31")
    res = panel.fit(data, panel.ModelSpec(max_premium_vol=0.01, std_errors="never"))
    assert math.sqrt(res.params.Sigma[0, 0] * 12 ** 3) <= 0.01 * (1 + 1e-9)
    assert res.status == "boundary" and not res.converged
    assert "upper bound" in res.message


def test_premium_volatility_cap_with_factors_is_accelerated_and_monotone():
    # k = 1 with a binding cap: no box, so SQUAREM's extrapolations are projected onto the cap.
    # Within the same E-step budget that must climb further than plain EM, never step down, and
    # respect the cap (invented panel simulated from the model).
    from panel.bench.fit import simulate

    frame, Sigma, _ = simulate(6, 240, "balanced")
    cap = float(np.median(np.sqrt(np.diag(Sigma) * 12 ** 3))) * 0.8   # premium vol, % a year
    runs = {acc: panel.fit(frame, panel.ModelSpec(max_premium_vol=cap, std_errors="never",
                                                  acceleration=acc, max_iter=300))
            for acc in ("squarem", "none")}
    fast, plain = runs["squarem"], runs["none"]
    assert (fast.trace["step"] == "squarem").any()
    assert fast.loglik > plain.loglik + 0.05   # measured 0.12 (both start inside the cap)
    obj = fast.trace["objective"].to_numpy()
    assert np.all(np.diff(obj) >= -1e-9 * abs(obj[-1]))
    assert np.sqrt(np.diag(fast.params.Sigma) * 12 ** 3).max() <= cap * (1 + 1e-9)


def test_zero_premium_volatility_is_a_reported_boundary():
    # Pure noise around a constant premium (invented): ML puts the premium innovation variance at 0.
    rng = np.random.default_rng(9)
    data = one_asset(0.005 + rng.normal(0, 0.04, 240), start="1990-01-31")
    res = panel.fit(data, panel.ModelSpec(std_errors="never"))
    assert res.status == "boundary" and not res.converged
    assert "at zero" in res.message


def test_unfinished_fit_at_a_boundary_keeps_its_stop_reason():
    # Stopped early (max_iter) with the variance already at zero: the status says why it stopped,
    # the message still names the boundary.
    rng = np.random.default_rng(9)
    data = one_asset(0.005 + rng.normal(0, 0.04, 240), start="1990-01-31")
    full = panel.fit(data, panel.ModelSpec(std_errors="never"))
    res = panel.fit(data, panel.ModelSpec(std_errors="never", max_iter=full.n_iter - 1))
    assert full.status == "boundary"
    assert res.status == "max_iter" and not res.converged and "at zero" in res.message


def test_inadmissible_quasi_newton_trial_point_is_backed_off(monkeypatch):
    # A trial point whose covariance is not numerically positive definite (LinAlgError in the
    # score) must make the line search back off, not crash the fit.
    import panel.model.mstep as ms

    rng = np.random.default_rng(9)
    data = one_asset(0.005 + rng.normal(0, 0.04, 240), start="1990-01-31")
    ref = panel.fit(data, panel.ModelSpec(std_errors="never"))
    real, calls = ms.expected_complete_loglik_grad, {"n": 0}

    def flaky(*args, **kwargs):
        calls["n"] += 1
        if calls["n"] == 3:
            raise np.linalg.LinAlgError("Matrix is not positive definite")
        return real(*args, **kwargs)

    monkeypatch.setattr(ms, "expected_complete_loglik_grad", flaky)
    res = panel.fit(data, panel.ModelSpec(std_errors="never"))
    assert calls["n"] > 3
    assert res.loglik == pytest.approx(ref.loglik, rel=1e-9)


@pytest.mark.parametrize("code,status", [(1, "max_iter"), (2, "stalled")])
def test_quasi_newton_stop_reason_maps_to_status(monkeypatch, code, status):
    # L-BFGS-B's own stop codes: 1 = out of evaluations (a budget stop), 2 = e.g. its line search
    # found no increase (scipy.optimize docs) — the latter is not a budget stop.
    from scipy import optimize

    real = optimize.minimize

    def stopped(fun, x0, **kwargs):
        res = real(fun, x0, **{**kwargs, "options": {**kwargs["options"], "maxfun": 3}})
        res.success, res.status, res.message = False, code, "ABNORMAL: " if code == 2 else "STOP"
        return res

    monkeypatch.setattr(optimize, "minimize", stopped)
    rng = np.random.default_rng(9)
    data = one_asset(0.005 + rng.normal(0, 0.04, 240), start="1990-01-31")
    res = panel.fit(data, panel.ModelSpec(std_errors="never"))
    assert res.status == status and not res.converged


def test_premium_prior_keeps_the_premium_volatility_off_zero():
    rng = np.random.default_rng(9)
    data = one_asset(0.005 + rng.normal(0, 0.04, 240), start="1990-01-31")
    res = panel.fit(data, panel.ModelSpec(premium_prior=panel.Prior(vol=0.01, weight=24),
                                          std_errors="never"))
    assert res.status == "converged"
    assert math.sqrt(res.params.q[0] * 12 ** 3) > 0.002   # premium vol above 0.2 points a year


def test_spec_round_trip_and_cross_section_probabilities():
    spec = panel.ModelSpec(premium_factors=1, fixed={"return_vol": 0.15},
                           premium_prior=panel.Prior(0.02, 12), vol_scale=panel.VolScale("ewma", 6.0))
    assert panel.ModelSpec.from_dict(spec.to_dict()) == spec
    cs = panel.CrossSection(date=pd.Timestamp("2020-01-31"), kind="smoothed", assets=("A", "B"),
                            mean=np.array([0.01, 0.0]), cov=np.array([[1e-4, 5e-5], [5e-5, 1e-4]]))
    # P(A > B) = Phi(0.01 / sqrt(1e-4 + 1e-4 - 1e-4)) = Phi(1) (normal distribution, any table).
    assert cs.prob_greater.loc["A", "B"] == pytest.approx(0.8413447460685429, rel=1e-12)
    assert cs.prob_positive[0] == pytest.approx(0.8413447460685429, rel=1e-12)


def test_ewma_volatility_scale_uses_only_past_data():
    from panel.model.start import volatility_scale

    rng = np.random.default_rng(3)
    Y = rng.normal(0, 0.04, (60, 3))
    base = volatility_scale(Y, panel.VolScale("ewma", 6.0))
    Y2 = Y.copy()
    Y2[40:] *= 5.0                                   # a change from date 40 on ...
    moved = volatility_scale(Y2, panel.VolScale("ewma", 6.0))
    np.testing.assert_array_equal(base[:41], moved[:41])  # ... leaves s_t for t <= 40 alone
    assert moved[45] > 2.0 * base[45]


def test_fit_cross_section_matches_kernel_covariance():
    # The fitted result's cross-section equals the dense smoother's joint covariance at that date.
    from panel.kalman.dense import dense_smoother

    rng = np.random.default_rng(12)
    idx = pd.date_range("2005-01-31", periods=90, freq="ME")
    frame = pd.DataFrame(0.004 + rng.normal(0, 0.04, (90, 4)), index=idx,
                         columns=["Nordic Equity", "Gold Sleeve", "EM Local Bonds", "Carry FX"])
    frame.iloc[:30, 3] = np.nan
    res = panel.fit(panel.Panel.from_frame(frame),
                    panel.ModelSpec(premium_factors=1, premium_prior=panel.Prior(0.02, 24),
                                    std_errors="never", max_iter=40))
    cs = res.cross_section("2007-03-31", kind="filtered")
    t = idx.get_loc(pd.Timestamp("2007-03-31"))
    ref = dense_smoother(frame.to_numpy(), res.params.Sigma, res.params.H, cov_at=(t,))
    assert cs.assets == ("Nordic Equity", "Gold Sleeve", "EM Local Bonds")
    np.testing.assert_allclose(cs.cov, ref.covariances[t]["filtered"][:3, :3], atol=1e-14)
    np.testing.assert_allclose(cs.mean, ref.filtered_mean[t, :3], atol=1e-14)
    table = cs.table()
    assert list(table["mean"]) == sorted(table["mean"], reverse=True)


def test_parameters_at_a_bound_get_no_standard_error():
    # Common practice (the usual asymptotics fail at a boundary): a variance at zero gets no
    # standard error; the others are computed with it held fixed.
    rng = np.random.default_rng(9)
    data = one_asset(0.005 + rng.normal(0, 0.04, 240), start="1990-01-31")
    res = panel.fit(data, panel.ModelSpec(std_errors="always"))
    rows = res.parameters.set_index("name")
    assert res.status == "boundary"
    assert np.isnan(rows.loc["idio_premium_var", "std_error"])
    assert np.isfinite(rows.loc["return_idio_var", "std_error"]) and rows.loc["return_idio_var", "std_error"] > 0
    assert "no standard errors for parameters at a bound" in res.message


def test_a_progress_with_a_stage_hears_of_the_standard_errors_and_counts_their_e_steps():
    # the standard errors take one E-step per free parameter not at a bound; a progress object
    # with a stage() method is told so and then counts them, and the numbers do not change
    rng = np.random.default_rng(9)
    data = one_asset(0.005 + rng.normal(0, 0.04, 240), start="1990-01-31")
    spec = panel.ModelSpec(std_errors="always")

    class Recorder:
        def __init__(self):
            self.calls, self.stages = [], []

        def __call__(self, n, objective):
            self.calls.append((n, objective))

        def stage(self, name, expected):
            self.stages.append((name, expected, len(self.calls)))

    seen = Recorder()
    res = panel.fit(data, spec, progress=seen)
    plain = panel.fit(data, spec)
    pd.testing.assert_frame_equal(res.parameters, plain.parameters)
    [(name, expected, at)] = seen.stages
    assert name == "standard errors" and expected == 1     # the return variance; the premium one is at zero
    assert seen.calls[at:] == [(1, None)]
    assert all(objective is not None for _, objective in seen.calls[:at])


def test_multi_start_keeps_the_best_and_is_deterministic():
    from panel.bench.fit import simulate

    frame, _, _ = simulate(5, 120, "balanced")
    one = panel.fit(frame, panel.ModelSpec(std_errors="never"))
    three = panel.fit(frame, panel.ModelSpec(std_errors="never", starts=3))
    again = panel.fit(frame, panel.ModelSpec(std_errors="never", starts=3))
    assert three.objective >= one.objective - 1e-9
    assert three.objective == again.objective and np.array_equal(three.params.H, again.params.H)
    assert "best of 3 starts" in three.message and "reached it" in three.message
    with pytest.raises(panel.SpecError, match="starts"):
        panel.fit(frame, panel.ModelSpec(starts=0))


@pytest.mark.parametrize("settings, needle", [
    ({"max_premium_vol": 1e-300}, "max_premium_vol must be between"),
    ({"max_premium_vol": 1e308}, "max_premium_vol must be between"),
    ({"fixed": {"own_premium_vol": 1e-300}}, "must be 0 or between"),
    ({"fixed": {"return_vol": 0.0}}, "fixed return_vol must be between"),
    ({"fixed": {"return_vol": 1e308}}, "fixed return_vol must be between"),
    ({"premium_prior": panel.Prior(1e308, 10)}, "premium_prior vol"),
    ({"premium_prior": panel.Prior(0.01, 1e308)}, "premium_prior weight"),
    ({"initial_premium": panel.InitialPremium(0.05, 1e308)}, "initial_premium vol"),
    ({"time_budget": float("nan")}, "time_budget"),
    ({"time_budget": 0.0}, "time_budget"),
    ({"return_factors": 9}, "not identified with 5 assets"),
    ({"return_factors": 3}, "use at most 2"),
    ({"return_factors": -1}, "return_factors must be"),
])
def test_settings_that_would_break_the_estimator_are_refused_in_one_line(settings, needle):
    frame = pd.DataFrame(np.random.default_rng(0).normal(0.005, 0.04, (60, 5)),
                         index=pd.date_range("2000-01-31", periods=60, freq="ME"), columns=list("abcde"))
    with pytest.raises(panel.SpecError) as err:
        panel.fit(frame, panel.ModelSpec(**settings))
    assert needle in str(err.value) and "\n" not in str(err.value)


def test_a_panel_too_large_for_memory_is_refused_with_the_figure():
    # 20,000 assets x 30 dates: about 30 work arrays of 20,000 x 20,000 (3.2 GB each), more than any
    # machine this runs on has; refused before anything is allocated, with the figure.
    frame = pd.DataFrame(np.random.default_rng(0).normal(0.0, 0.04, (30, 20000)),
                         index=pd.date_range("2000-01-31", periods=30, freq="ME"))
    with pytest.raises(panel.SpecError, match=r"needs about 9\d\.\d GB of memory and \d+\.\d GB are available"):
        panel.fit(frame)


def test_settings_stored_without_loglik_tol_keep_the_legacy_finish():
    # Runs stored before loglik_tol existed must reproduce exactly: their settings read as None,
    # the legacy quasi-Newton finish (L-BFGS-B to its own tolerance, no active set).
    stored = panel.ModelSpec().to_dict()
    assert stored["loglik_tol"] == 1e-4
    del stored["loglik_tol"]
    assert panel.ModelSpec.from_dict(stored).loglik_tol is None


def test_settings_stored_without_stopping_keep_the_gradient_rule():
    # Runs stored before the gain-model rule must reproduce exactly: their settings read as
    # "gradient".  Simulation (invented panel): the gain-model rule stops sooner at the same
    # optimum (loglik_tol = 1e-4 apart at most).
    from panel.bench.fit import simulate

    stored = panel.ModelSpec().to_dict()
    assert stored["stopping"] == "gain-model"
    del stored["stopping"]
    legacy_spec = panel.ModelSpec.from_dict(stored)
    assert legacy_spec.stopping == "gradient"
    frame, _, _ = simulate(8, 240, "balanced")
    legacy = panel.fit(frame, legacy_spec)
    new = panel.fit(frame, panel.ModelSpec())
    assert new.n_iter < legacy.n_iter
    assert abs(new.loglik - legacy.loglik) < 1e-4
    with pytest.raises(panel.SpecError, match="stopping must be one of"):
        panel.fit(frame, panel.ModelSpec(stopping="sometimes"))


def test_settings_stored_without_cap_method_keep_the_projection():
    # Runs stored before the boxed finish under a premium-volatility cap read as "projection", so
    # they reproduce; a bad value is refused in one line.
    stored = panel.ModelSpec(max_premium_vol=0.02).to_dict()
    assert stored["cap_method"] == "box"
    del stored["cap_method"]
    assert panel.ModelSpec.from_dict(stored).cap_method == "projection"
    with pytest.raises(panel.SpecError, match="cap_method must be one of") as error:
        panel.ModelSpec(cap_method="clip").resolve(3, 12, 40, ("a", "b", "c"))
    assert "\n" not in str(error.value)


def test_variance_started_at_its_floor_is_released_by_its_score():
    # Simulation (invented panel from the model): a warm start with the largest own premium
    # variance pushed below its floor.  EM cannot lift a variance off zero and in the finish's
    # coordinates its gradient vanishes there; its positive score must release it, and the fit
    # must reach the optimum of the default start (measured: 1e-7 apart; pinned there, 0.058 lower).
    from panel.bench.fit import simulate
    from panel.model.params import Params

    frame, _, _ = simulate(5, 240, "balanced")
    ref = panel.fit(frame, panel.ModelSpec(std_errors="never"))
    p = ref.params
    i = int(np.argmax(p.q / np.diag(p.H)))
    q = p.q.copy()
    q[i] = 0.5e-9 * p.H[i, i]
    res = panel.fit(frame, panel.ModelSpec(std_errors="never"),
                    start=Params(Lambda=p.Lambda, q=q, H=p.H, B=p.B, psi=p.psi))
    assert (res.trace["step"] == "release").any()
    assert res.objective == pytest.approx(ref.objective, abs=1e-4)
    assert res.params.q[i] == pytest.approx(p.q[i], rel=1e-2)
