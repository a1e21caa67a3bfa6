"""Gaps inside an asset's history, and their conditional means.

A *gap* is a missing return of an asset after its first and before its last observation (an isolated
holiday, a data error).  Cells before an asset's first return (it has not entered) or after its last
(it has left, or its latest return is not yet published) are not gaps.  The *fillable* cells are
the gaps and the cells after an asset's last return when at most :data:`LATE` dates are missing
there (returns not yet published); an asset missing more has left, and is never filled.

:func:`fill_gaps` sets each gap to ``E[y_{t,i} | all observed returns]`` at given parameters: the
smoothed premium plus the conditional mean of the return shock given the shocks observed that date,

    E[eps_U | y] = -(P_UU)^{-1} P_UO (y_O - E[mu_O | y]),     P = H^{-1},

(U the assets unobserved at t, O the observed; the volatility scale ``s_t^2`` cancels).  The filled
panel is the surrogate on which :mod:`panel.model.surrogate` does most of a fit's work.
"""

from __future__ import annotations

import numpy as np


def interior_gaps(Y: np.ndarray) -> np.ndarray:
    """(T, N) bool: the missing cells of ``Y`` (T, N) between each asset's first and last observed
    date."""
    obs = ~np.isnan(np.asarray(Y, dtype=float))
    seen_before = np.logical_or.accumulate(obs, axis=0)
    seen_after = np.logical_or.accumulate(obs[::-1], axis=0)[::-1]
    return seen_before & seen_after & ~obs


#: Dates after an asset's last return up to which they count as late (fillable), not as an exit.
LATE = 3


def fillable(Y: np.ndarray) -> np.ndarray:
    """(T, N) bool: the gaps of ``Y`` (:func:`interior_gaps`) and the missing cells after each
    asset's last return when there are at most :data:`LATE` of them."""
    Y = np.asarray(Y, dtype=float)
    obs = ~np.isnan(Y)
    after_last = np.logical_or.accumulate(obs[::-1], axis=0)[::-1]
    late = ~after_last & np.logical_or.accumulate(obs, axis=0)
    return interior_gaps(Y) | (late & (late.sum(axis=0) <= LATE)[None, :])


def fill_gaps(Y: np.ndarray, smoothed_mean: np.ndarray, H: np.ndarray,
              gaps: np.ndarray | None = None) -> np.ndarray:
    """``Y`` (T, N) with its ``gaps`` ((T, N) bool, default :func:`fillable`) set to their
    conditional means given every observed return: ``smoothed_mean`` (T, N) the smoothed premia
    (finite at the gaps), ``H`` (N, N) the return-shock covariance.  Returns a new array."""
    Y = np.asarray(Y, dtype=float)
    gaps = fillable(Y) if gaps is None else np.asarray(gaps, bool)
    out = Y.copy()
    dates = np.flatnonzero(gaps.any(axis=1))
    if not dates.size:
        return out
    P = np.linalg.inv(np.asarray(H, dtype=float))
    P = 0.5 * (P + P.T)
    for t in dates:
        U = np.isnan(Y[t])
        O = ~U
        shock = -np.linalg.solve(P[np.ix_(U, U)], P[np.ix_(U, O)] @ (Y[t, O] - smoothed_mean[t, O]))
        out[t, U] = np.where(gaps[t, U], smoothed_mean[t, U] + shock, np.nan)
    return out
