"""The identical model in statsmodels' general state-space module — the outside reference.

State ``(f_t, mu_t)``: design ``[0, I]``, transition ``I``, state covariance
``[[I, Lambda'], [Lambda, Sigma]]``; the factors are known 0 at the first date (variance 0), the
premia exactly diffuse (statsmodels' exact diffuse initialisation, Durbin & Koopman 2012 ch. 5).
"""

from __future__ import annotations

import warnings

import numpy as np
from statsmodels.tsa.statespace.initialization import Initialization
from statsmodels.tsa.statespace.mlemodel import MLEModel


def statsmodels_smoother(Y, Sigma, H, scale2=None, Lambda=None, init=None):
    """Run statsmodels' Kalman smoother; returns its results object (states ordered f, mu)."""
    T, N = Y.shape
    k = 0 if Lambda is None else Lambda.shape[1]
    m = k + N
    mod = MLEModel(Y, k_states=m)
    design = np.zeros((N, m))
    design[:, k:] = np.eye(N)
    Q = np.zeros((m, m))
    Q[:k, :k] = np.eye(k)
    Q[k:, k:] = Sigma
    if k:
        Q[k:, :k] = Lambda
        Q[:k, k:] = Lambda.T
    mod.ssm["design"] = design
    mod.ssm["transition"] = np.eye(m)
    mod.ssm["selection"] = np.eye(m)
    mod.ssm["state_cov"] = Q
    s2 = np.ones(T) if scale2 is None else scale2
    mod.ssm["obs_cov"] = H[:, :, None] * s2[None, None, :]
    ini = Initialization(m)
    if k:
        ini.set((0, k), "known", constant=np.zeros(k), stationary_cov=np.zeros((k, k)))
    if init is None:
        ini.set((k, m), "diffuse")
    else:
        ini.set((k, m), "known", constant=np.full(N, init[0]), stationary_cov=init[1] * np.eye(N))
    mod.ssm.initialization = ini
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return mod.ssm.smooth()


def covariance_diagonals(cov):
    """(m, m, T) -> (T, m) diagonals."""
    return np.einsum("iit->ti", cov)


class ExactLocalLevel(MLEModel):
    """Univariate local level model in statsmodels with exact diffuse initialisation; parameters
    (sigma2_eps, sigma2_eta), fitted by statsmodels' own optimiser."""

    def __init__(self, y):
        super().__init__(y, k_states=1)
        self.ssm["design"] = np.ones((1, 1))
        self.ssm["transition"] = np.ones((1, 1))
        self.ssm["selection"] = np.ones((1, 1))
        self.ssm.initialize_diffuse()

    @property
    def start_params(self):
        v = np.nanvar(self.endog)
        return np.array([v / 2, v / 20])

    @property
    def param_names(self):
        return ["sigma2.eps", "sigma2.eta"]

    def transform_params(self, unconstrained):
        return unconstrained ** 2

    def untransform_params(self, constrained):
        return constrained ** 0.5

    def update(self, params, **kwargs):
        params = super().update(params, **kwargs)
        self.ssm["obs_cov", 0, 0] = params[0]
        self.ssm["state_cov", 0, 0] = params[1]
