"""The score from the disturbance smoother's terms (``ModelSpec.score_form="disturbance"``) against
statsmodels' complex-step derivative of its own exact diffuse log-likelihood, at optima where
variances sit at their floor: there the moments' formula ``C^{-1} (S - n C) C^{-1}`` cancels
digits, and the terms must not."""

from __future__ import annotations

import dataclasses
import warnings

import numpy as np
import pandas as pd
import pytest
from statsmodels.tsa.statespace.mlemodel import MLEModel

import panel
from panel.model import mstep as ms
from panel.model.problem import Problem
from panel.model.spec import ModelSpec, SpecError


def _industries(ragged: str | None) -> panel.Panel:
    """Excess returns of four Fama-French industry portfolios since 1990
    (linearmodels.datasets.french).  ``ragged="gaps"``: three returns missing; ``"entry"``: Durbl
    also enters three years late.  Either way the panel runs dense dates before its final
    stretch (and the stretch path's final stretch is coupled to them)."""
    from linearmodels.datasets import french

    d = french.load()
    d = d[d["dates"] >= "1990-01-01"]
    idx = pd.DatetimeIndex(d["dates"]) + pd.offsets.MonthEnd(0)
    cols = ["NoDur", "Durbl", "Manuf", "Enrgy"]
    frame = pd.DataFrame({c: (d[c] - d["RF"]).to_numpy() for c in cols}, index=idx)
    if ragged:
        frame.iloc[50, 2] = np.nan
        frame.iloc[51, 0] = np.nan
        frame.iloc[200 if ragged == "gaps" else 10, 1] = np.nan
    if ragged == "entry":
        frame.iloc[:36, 1] = np.nan
    return panel.Panel.from_frame(frame, frequency="M")


class _SameModel(MLEModel):
    """The default spec (one premium factor, one return factor) in statsmodels' state-space module,
    on the packed parameters: loadings, log own premium variances, return loadings, log psi."""

    def __init__(self, Y, s2, packer):
        N = Y.shape[1]
        super().__init__(Y, k_states=N)
        for name in ("design", "transition", "selection"):
            self.ssm[name] = np.eye(N)
        self.ssm.initialize_diffuse()
        self.s2, self.packer = s2, packer

    def update(self, params, **kwargs):
        params = super().update(params, **kwargs)
        N = self.k_states
        lam = np.zeros((N, 1), dtype=params.dtype)
        lam[self.packer.lam_free] = params[:N]
        B = np.zeros((N, 1), dtype=params.dtype)
        B[self.packer.b_free] = params[2 * N:3 * N]
        self.ssm["state_cov"] = lam @ lam.T + np.diag(np.exp(params[N:2 * N]))
        H = B @ B.T + np.diag(np.exp(params[3 * N:]))
        self.ssm["obs_cov"] = H[:, :, None] * self.s2[None, None, :]


def _scores(data, method):
    """(disturbance-form score, moments-form score, statsmodels' complex-step score, statsmodels'
    log-likelihood as a function of the packed parameters) at the optimum of a fit of ``data`` on
    E-step path ``method``, and that optimum."""
    spec = ModelSpec(std_errors="never", method=method)
    fit = panel.fit(data, spec)
    assert fit.status == "boundary"              # variances at their floor: the hard case
    p = fit.params
    prob = Problem(data, spec)
    e = prob.estep(p)
    args = (prob.packer, prob.sigma_prior, prob.h_prior)
    new = ms.expected_complete_loglik_grad(e, p, prob.rs, *args)
    old = ms.expected_complete_loglik_grad(e, p, dataclasses.replace(prob.rs, score_form="moments"),
                                           *args)
    ref = _SameModel(prob.Y, prob.plan.s2, prob.packer)
    theta = prob.packer.pack(p)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert ref.loglike(theta) == pytest.approx(e.loglik, rel=1e-12)
        exact = ref.score(theta, approx_complex_step=True)

    def loglike(th):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            return ref.loglike(th)
    return new, old, exact, loglike, theta


@pytest.mark.parametrize("ragged, method", [
    (None, "stretch"),          # every term from the chains
    (None, "dense"),            # the premium side from the RTS moments, the shocks' from the formula
    ("gaps", "stretch"),        # dense head + coupled final stretch
    ("gaps", "dense"),
    (None, "segments"),         # one stretch with a flat start
    ("gaps", "segments"),       # stretches joined through their ends, dense dates between
])
def test_disturbance_score_matches_statsmodels_complex_step(ragged, method):
    # Source: statsmodels MLEModel.score(approx_complex_step=True) — the complex-step derivative
    # of statsmodels' exact diffuse Kalman filter log-likelihood for the same model (accurate to
    # rounding).  At these optima all four own premium variances and one psi are at their floor.
    new, old, exact = _scores(_industries(ragged), method)[:3]
    assert np.max(np.abs(new - exact)) < 1e-7
    # the moments' formula misses by far more on these data (the reason for the terms)
    assert np.max(np.abs(old - exact)) > 10 * np.max(np.abs(new - exact))


def test_score_with_a_late_entrant_agrees_across_paths_and_with_statsmodels_differences():
    # With an asset entering after the first date statsmodels' complex step is itself off (by up
    # to 3.4e-6 against fourth-order central differences of its own loglike, which side with the
    # score to 3e-9 where the curvature allows differences), so the reference here is those
    # differences on the return loadings of assets whose variances are off their floor, and the
    # two paths' independent terms (chains against RTS moments) must agree.
    data = _industries("entry")
    new_s, _, _, loglike, theta = _scores(data, "stretch")
    spec = ModelSpec(std_errors="never", method="dense")
    prob = Problem(data, spec)
    p = prob.packer.unpack(theta, panel.fit(data, spec).params)
    new_d = ms.expected_complete_loglik_grad(prob.estep(p), p, prob.rs, prob.packer,
                                             prob.sigma_prior, prob.h_prior)
    assert np.max(np.abs(new_s - new_d)) < 1e-8 * np.max(np.abs(new_s))
    N, h = 4, 1e-4
    for j in (2 * N + 0, 2 * N + 1, 2 * N + 3):        # return loadings of NoDur, Durbl, Enrgy
        step = h * np.eye(theta.size)[j]
        fd = (-loglike(theta + 2 * step) + 8 * loglike(theta + step) - 8 * loglike(theta - step)
              + loglike(theta - 2 * step)) / (12 * h)
        assert new_s[j] == pytest.approx(fd, abs=2e-8)


def test_score_form_setting_reads_back_and_refuses_unknown_values():
    assert ModelSpec().score_form == "disturbance"
    assert ModelSpec.from_dict(ModelSpec().to_dict()).score_form == "disturbance"
    stored = ModelSpec().to_dict()
    del stored["score_form"]                     # a run stored before the setting existed
    assert ModelSpec.from_dict(stored).score_form == "moments"
    with pytest.raises(SpecError, match="score_form must be one of"):
        ModelSpec(score_form="numerical").resolve(4, 12, 100, ("a", "b", "c", "d"))
    # the report's settings line names the older form of a stored run
    from panel.model.params import Params
    from panel.report.content import setting_lines

    p = Params.build(np.zeros((3, 0)), np.full(3, 1e-6), "diagonal", psi=np.ones(3))
    line = {form: dict(setting_lines(ModelSpec(score_form=form), {}, p, 12))["estimation"]
            for form in ("disturbance", "moments")}
    assert "score from the moments)" in line["moments"] and "moments" not in line["disturbance"]


@pytest.mark.parametrize("method", ["dense", "segments"])
def test_em_steps_skip_the_terms_and_the_fit_does_not_move(method, monkeypatch):
    # EM and SQUAREM steps never take the score, so their E-steps skip its terms; the finish's
    # E-steps (the hand-over point's redone) all carry them, and the fit is the same bit for bit
    # as with every E-step scored.
    data = _industries("gaps")
    spec = ModelSpec(std_errors="never", method=method)
    real_estep, real_grad = Problem.estep, ms.expected_complete_loglik_grad
    calls = {True: 0, False: 0}
    complete = []

    def estep(self, p, scored=True):
        calls[scored] += 1
        return real_estep(self, p, scored)

    def grad(e, *args, **kwargs):
        complete.append(all(g.score is not None for g in e.w_groups))
        return real_grad(e, *args, **kwargs)

    monkeypatch.setattr(Problem, "estep", estep)
    monkeypatch.setattr(ms, "expected_complete_loglik_grad", grad)
    fast = panel.fit(data, spec)
    assert calls[False] >= 10 and calls[True] >= 10
    assert complete and all(complete)
    monkeypatch.setattr(Problem, "em_estep", lambda self, p: real_estep(self, p, True))
    slow = panel.fit(data, spec)
    assert (fast.n_iter, fast.objective, fast.message) == (slow.n_iter, slow.objective, slow.message)
    for name in ("Sigma", "H"):
        np.testing.assert_array_equal(getattr(fast.params, name), getattr(slow.params, name))
