"""Moment-based starting values and the volatility scale — both use the data only, deterministically.

Starting rule (documented in README): ``H0`` is the pairwise-complete sample covariance of the
returns, shrunk 10% toward its diagonal so it is positive definite; ``Sigma0 = 0.01 H0`` (premium
innovations one hundredth of the return noise: premia move slowly), its k leading principal
components giving ``Lambda0`` and the rest of its diagonal (at least 10% of it) ``q0``; factor
``H`` starts from the r leading principal components of ``H0`` the same way.  Fixed parameters are
put in place.  Nothing is random, so no seed is needed.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from panel.model.params import Params, canonical_loadings
from panel.model.spec import ResolvedSpec, VolScale

SIGNAL_TO_NOISE = 0.01
SHRINK = 0.10


def _pc_split(C: np.ndarray, m: int) -> tuple[np.ndarray, np.ndarray]:
    """Loadings from the m leading eigenpairs of C and the remaining diagonal (>= 10% of it)."""
    N = C.shape[0]
    if m == 0:
        return np.zeros((N, 0)), np.diag(C).copy()
    vals, vecs = np.linalg.eigh(C)
    vals, vecs = vals[::-1][:m], vecs[:, ::-1][:, :m]
    L = vecs * np.sqrt(np.maximum(vals, 0.0) * 0.9)
    rest = np.maximum(np.diag(C) - (L ** 2).sum(axis=1), SHRINK * np.diag(C))
    return canonical_loadings(L), rest


def starting_values(Y: np.ndarray, rs: ResolvedSpec) -> Params:
    """Starting parameters from sample moments of ``Y`` (T, N) (see the module docstring)."""
    frame = pd.DataFrame(Y)
    C = frame.cov(min_periods=2).to_numpy()
    var = np.diag(C).copy()
    bad = ~np.isfinite(var) | (var <= 0)
    var[bad] = np.nanmedian(var[~bad]) if (~bad).any() else 1.0
    C = np.where(np.isfinite(C), C, 0.0)
    np.fill_diagonal(C, var)
    H0 = (1.0 - SHRINK) * C + SHRINK * np.diag(var)
    lam, q = _pc_split(SIGNAL_TO_NOISE * H0, rs.k)
    if rs.fixed_q is not None:
        q = np.where(np.isnan(rs.fixed_q), q, rs.fixed_q)
    if rs.structure == "full":
        return Params.build(lam, q, "full", H=H0)
    if rs.structure == "factor":
        B, psi = _pc_split(H0, rs.r)
    else:
        B, psi = None, var.copy()
    if rs.fixed_psi is not None:
        psi = np.where(np.isnan(rs.fixed_psi), psi, rs.fixed_psi)
    return Params.build(lam, q, rs.structure, B=B, psi=psi)


def perturbed_start(p: Params, rs: ResolvedSpec, j: int, cap: float | None = None) -> Params:
    """The ``j``-th (j >= 1) deterministic perturbation of the start ``p`` for a multi-start fit.

    Free own premium variances are scaled by ``10^u``, u uniform on [-1.5, 1.5] (the optimum's
    signal-to-noise is the least known quantity), loadings row-wise by ``exp(0.5 z)`` with z
    standard normal, free own return variances and return loadings by ``exp(0.3 z)``; a full H is
    kept.  Drawn from a generator seeded by ``j`` alone, so a fit is reproducible.  ``cap`` (a
    per-period bound on the total premium variance) keeps a perturbed start feasible.
    """
    rng = np.random.default_rng([20261203, j])
    N = p.n_assets
    free_q = np.ones(N, bool) if rs.fixed_q is None else np.isnan(rs.fixed_q)
    q = np.where(free_q, p.q * 10.0 ** rng.uniform(-1.5, 1.5, N), p.q)
    lam = p.Lambda * np.exp(0.5 * rng.standard_normal(N))[:, None]
    if cap is not None:
        total = (lam ** 2).sum(axis=1) + q
        shrink = np.minimum(1.0, 0.9 * cap / np.maximum(total, 1e-300))
        lam, q = lam * np.sqrt(shrink)[:, None], np.where(free_q, q * shrink, q)
    if rs.structure == "full":
        return Params.build(lam, q, "full", H=p.H)
    free_psi = np.ones(N, bool) if rs.fixed_psi is None else np.isnan(rs.fixed_psi)
    psi = np.where(free_psi, p.psi * np.exp(0.3 * rng.standard_normal(N)), p.psi)
    B = None if p.B is None else p.B * np.exp(0.3 * rng.standard_normal(N))[:, None]
    return Params.build(lam, q, rs.structure, B=B, psi=psi)


def volatility_scale(Y: np.ndarray, vs: VolScale | None) -> np.ndarray:
    """(T,) squared scale ``s_t^2`` (ones without a scale).

    EWMA: ``m_t`` is the cross-sectional mean squared return at t; ``s_t^2`` is the EWMA of
    ``m_{<t}`` (half-life in periods) over the expanding mean of ``m_{<t}``; 1 until two past
    dates exist.  Only data before t is used, so a vintage's scale never sees its future.
    """
    T = Y.shape[0]
    if vs is None:
        return np.ones(T)
    if vs.kind == "series":
        return np.asarray(vs.values, dtype=float) ** 2
    counts = (~np.isnan(Y)).sum(axis=1)
    seen = counts > 0
    m = np.where(seen, np.nansum(Y ** 2, axis=1) / np.maximum(counts, 1), 0.0)
    decay = 0.5 ** (1.0 / vs.half_life)
    out = np.ones(T)
    ew_num = ew_den = ex_num = 0.0
    ex_den = 0
    for t in range(T):
        if ex_den >= 2 and ew_den > 0 and ex_num > 0:
            out[t] = (ew_num / ew_den) / (ex_num / ex_den)
        if seen[t]:
            ew_num = decay * ew_num + m[t]
            ew_den = decay * ew_den + 1.0
            ex_num += m[t]
            ex_den += 1
    return out
