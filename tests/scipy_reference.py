"""The outside optimiser: scipy.optimize (L-BFGS-B) on the exact log-likelihood (plus log prior)."""

from __future__ import annotations

from scipy import optimize

from panel.model import mstep as ms
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
