"""Inference after the fit: observed information, parameter standard errors, Ljung-Box.

Standard errors: the observed information is minus the derivative of the score, where the score
comes for free from each E-step by Fisher's identity (Louis 1982); it is differentiated by central
differences (two E-steps per free parameter).  Standard errors of reported quantities (variances,
covariances) follow by the delta method through the packed parametrisation.
"""

from __future__ import annotations

import numpy as np
from scipy import stats

from panel.model.params import Packer, Params


def observed_information(theta: np.ndarray, score, rel_step: float = 1e-4) -> np.ndarray:
    """``-d score / d theta`` by central differences; ``score(theta) -> (p,)``."""
    p = theta.size
    info = np.empty((p, p))
    for j in range(p):
        h = rel_step * max(1.0, abs(theta[j]))
        up, dn = theta.copy(), theta.copy()
        up[j] += h
        dn[j] -= h
        info[:, j] = -(score(up) - score(dn)) / (2.0 * h)
    return 0.5 * (info + info.T)


def delta_std_errors(theta: np.ndarray, cov_theta: np.ndarray, reported, rel_step: float = 1e-6):
    """Standard errors of ``reported(theta) -> (m,)`` by the delta method (numerical Jacobian)."""
    base = reported(theta)
    J = np.empty((base.size, theta.size))
    for j in range(theta.size):
        h = rel_step * max(1.0, abs(theta[j]))
        up, dn = theta.copy(), theta.copy()
        up[j] += h
        dn[j] -= h
        J[:, j] = (reported(up) - reported(dn)) / (2.0 * h)
    var = np.einsum("ij,jk,ik->i", J, cov_theta, J)
    return np.sqrt(np.maximum(var, 0.0))


def parameter_vector(p: Params, structure: str) -> np.ndarray:
    """Reported parameters in the order of :func:`parameter_rows`."""
    parts = [p.Lambda.ravel(), p.q, p.Sigma[np.triu_indices(p.n_assets)],
             p.H[np.triu_indices(p.n_assets)]]
    if structure == "factor":
        parts.append(p.B.ravel())
    if structure != "full":
        parts.append(p.psi)
    return np.concatenate(parts)


def parameter_rows(assets, k: int, r: int, structure: str) -> list[tuple[str, str, str]]:
    """(name, row, col) labels of :func:`parameter_vector`."""
    N = len(assets)
    rows = [("loading", assets[i], f"f{j + 1}") for i in range(N) for j in range(k)]
    rows += [("idio_premium_var", a, "") for a in assets]
    iu = np.triu_indices(N)
    rows += [("premium_cov", assets[i], assets[j]) for i, j in zip(*iu)]
    rows += [("return_cov", assets[i], assets[j]) for i, j in zip(*iu)]
    if structure == "factor":
        rows += [("return_loading", assets[i], f"g{j + 1}") for i in range(N) for j in range(r)]
    if structure != "full":
        rows += [("return_idio_var", a, "") for a in assets]
    return rows


def standard_errors(p: Params, packer: Packer, score, structure: str):
    """(reported SEs or None, message).  ``score(theta)`` evaluates the Fisher-identity score."""
    theta = packer.pack(p)
    info = observed_information(theta, score)
    try:
        cov = np.linalg.inv(info)
    except np.linalg.LinAlgError:
        return None, "observed information is singular: no standard errors"
    if not np.all(np.diag(cov) > 0):
        return None, "observed information is not positive definite (boundary or flat direction): no standard errors"
    se = delta_std_errors(theta, cov, lambda th: parameter_vector(packer.unpack(th, p), structure))
    return se, ""


def ljung_box(z: np.ndarray, lags: int | None = None) -> tuple[float, int, float]:
    """Ljung & Box (1978) Q on a series (NaNs dropped; the remaining values taken as consecutive).

    Default lags: min(10, n // 5) — common practice.  Returns (Q, lags, p-value).
    """
    z = np.asarray(z, dtype=float)
    z = z[np.isfinite(z)]
    n = z.size
    h = min(10, n // 5) if lags is None else lags
    if h < 1 or n < 3:
        return float("nan"), int(h), float("nan")
    d = z - z.mean()
    denom = d @ d
    acf = np.array([d[j:] @ d[:-j] for j in range(1, h + 1)]) / denom
    q = n * (n + 2) * np.sum(acf ** 2 / (n - np.arange(1, h + 1)))
    return float(q), int(h), float(stats.chi2.sf(q, h))
