"""The outside optimiser: scipy.optimize (L-BFGS-B) on the exact log-likelihood (plus log prior)."""

from __future__ import annotations

import numpy as np
from scipy import optimize

from panel.model import mstep as ms
from panel.model.params import Params
from panel.model.problem import Problem
from panel.model.start import starting_values


def lbfgsb_objective(data, spec) -> float:
    """The objective L-BFGS-B reaches on ``data`` under ``spec`` from riskprem's starting values,
    with the Fisher-identity score as its gradient, run to its own 1e-10 gradient tolerance."""
    prob = Problem(data, spec)
    p0 = starting_values(prob.Y, prob.rs)

    def negll(th):
        p = prob.packer.unpack(th, p0)
        e = prob.estep(p)
        g = ms.expected_complete_loglik_grad(e, p, prob.rs, prob.packer, prob.sigma_prior, prob.h_prior)
        return -prob.objective(e, p), -g

    opt = optimize.minimize(negll, prob.packer.pack(p0), jac=True, method="L-BFGS-B",
                            options={"maxiter": 3000, "ftol": 1e-15, "gtol": 1e-10})
    return -float(opt.fun)


def capped_one_factor_objective(data, spec) -> float:
    """The objective L-BFGS-B reaches on ``data`` under ``spec`` (one premium factor, a factor H,
    ``max_premium_vol``) with its own finite-difference gradient, in coordinates written here
    for the purpose: per asset the share ``u`` in [0, 1] of the cap taken by ``Sigma_ii`` and
    the correlation-like ``rho`` in [-1, 1] (``Lambda_i = sqrt(u cap) rho``, ``q_i = u cap (1 -
    rho^2)``), then the return loadings and log idiosyncratic variances, unbounded."""
    prob = Problem(data, spec)
    cap, N = prob.rs.max_sigma_diag, prob.Y.shape[1]
    p0 = starting_values(prob.Y, prob.rs)

    def params(x):
        u, rho = x[:N], x[N:2 * N]
        return Params.build((np.sqrt(u * cap) * rho)[:, None], np.maximum(u * cap * (1 - rho ** 2), 1e-300),
                            "factor", B=x[2 * N:3 * N, None], psi=np.exp(x[3 * N:]))

    def negll(x):
        p = params(x)
        try:
            return -prob.objective(prob.estep(p), p)
        except np.linalg.LinAlgError:
            return 1e10

    u0 = np.clip(np.diag(p0.Sigma) / cap, 1e-6, 1.0)
    x0 = np.concatenate([u0, np.clip(p0.Lambda[:, 0] / np.sqrt(u0 * cap), -1, 1), p0.B[:, 0], np.log(p0.psi)])
    opt = optimize.minimize(negll, x0, method="L-BFGS-B", bounds=[(0, 1)] * N + [(-1, 1)] * N + [(None, None)] * (2 * N),
                            options={"maxiter": 5000, "maxfun": 100000, "ftol": 1e-15, "gtol": 1e-9})
    return -float(opt.fun)
