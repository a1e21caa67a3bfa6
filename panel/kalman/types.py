"""Result containers shared by every E-step path (the dense reference and the fast exact paths)."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np


@dataclass
class MomentGroup:
    """A sum of second moments over dates sharing one set of components.

    ``mask`` (N,) bool marks the components present, ``count`` the number of dates summed, ``M``
    (n, n) the sum of ``E[x_t x_t' | Y]`` over those dates for the present components ``x_t``.
    ``seen`` is None, or for a group collapsed by :func:`panel.kalman.impute.collapse` (full mask,
    unseen parts imputed) the (N,) sums of the seen second moments and (N,) counts of dates seen.
    ``score`` is None, or the (n, n) sum over those dates of the disturbance smoother's score terms
    ``r_t r_t' - N_t`` (Koopman & Shephard 1992, Biometrika 79, 823-826) of the present components:
    ``C^{-1} (M - count C) C^{-1}`` for their covariance ``C``, formed by the path without inverting
    ``C``, so it stays exact where that difference cancels digits (a variance near its floor).  For
    a collapsed group it is the sum of its groups' terms, zero where a component was unseen (the
    imputed part adds nothing to the score).
    """

    mask: np.ndarray
    count: int
    M: np.ndarray
    seen: tuple | None = None
    score: np.ndarray | None = None


@dataclass
class EStep:
    """What the M-step needs from one E-step.

    loglik : exact (diffuse) log-likelihood at the parameters.
    w_groups : moments of the premium innovations ``w_t = mu_t - mu_{t-1}``, grouped by the set of
        assets already active at t-1 (t = 2..T).
    e_groups : moments of the scaled return shocks ``eps_t / s_t``, grouped by the observed set.
    """

    loglik: float
    w_groups: list[MomentGroup]
    e_groups: list[MomentGroup]


@dataclass
class Smoothed:
    """Per-date moments for reporting.  Arrays are (T, N) with NaN before an asset's first
    observation; ``*_var`` are marginal variances.  Factor arrays are (T, k) (empty when k = 0)."""

    loglik: float
    filtered_mean: np.ndarray
    filtered_var: np.ndarray
    smoothed_mean: np.ndarray
    smoothed_var: np.ndarray
    predicted_mean: np.ndarray
    predicted_var: np.ndarray        # of the premium; add s_t^2 H_ii for the return forecast
    innovation: np.ndarray           # y_t - predicted mean (NaN where missing or at entry)
    innovation_var: np.ndarray       # marginal variance of the innovation
    factor_filtered_mean: np.ndarray
    factor_filtered_var: np.ndarray
    factor_smoothed_mean: np.ndarray
    factor_smoothed_var: np.ndarray
    estep: EStep | None = None
    covariances: dict = field(default_factory=dict)  # t -> {"filtered": (N,N), "smoothed": (N,N)}
