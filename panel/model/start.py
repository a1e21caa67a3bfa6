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
