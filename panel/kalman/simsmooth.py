"""Simulation smoother: draws of the premium paths from their exact posterior at given parameters.

Two exact routes, both for the model of :mod:`panel.kalman.dense` (``y_t = mu_t + eps_t``,
``eps_t ~ N(0, s_t^2 H)``, ``mu_t = mu_{t-1} + w_t``, ``w_t ~ N(0, Sigma)``, each level diffuse
until the asset's first observation, or with the informative prior ``init = (m0, v0)``):

* **spectral** (a fully balanced panel with the diffuse start): in ``z_t = V' y_t``
  (``V' H V = I``, ``V' Sigma V = diag(d)``) the panel is n independent scalar local levels, and
  each chain's posterior covariance is ``S^{1/2} U diag(w) U' S^{1/2}`` with ``w_j = d / (d +
  lam_j)`` (:mod:`panel.kalman.chain`).  A draw is the posterior mean plus
  ``S^{1/2} U (sqrt(w) * xi)``: one transform back per draw, ``mu = W alpha`` (``W = H V``).
* **mean correction** (any gap pattern; Durbin & Koopman 2002): simulate ``(mu+, y+)`` from the
  model with the data's missing cells, smooth ``y - y+`` on the E-step's path
  (:class:`panel.kalman.paths.Plan`) and return ``mu+ + E[mu | y - y+]``.  The smoothed mean is
  linear in the data; with the exact diffuse start it is also equivariant to a shift of an
  asset's returns (the entry level is flat), so the simulated entry levels may be 0 and the draw
  is exact.  With an informative prior the entry levels are drawn from it and ``y - y+`` is
  smoothed with prior mean 0 (the linear part of the affine smoother).

Only the premia are drawn; the common factors follow from them exactly (``eta_t | w_t`` is
Gaussian and independent across dates), see :mod:`panel.bayes.conditionals`.
"""

from __future__ import annotations

import numpy as np

from panel.kalman import paths
from panel.kalman.chain import ChainMoments, basis_for, spectral
from panel.kalman.dense import first_observations
from panel.kalman.stretch import final_stretch_start, simultaneous_diagonalisation


def psd_root(S: np.ndarray) -> np.ndarray:
    """(n, n) ``R`` with ``R R' = S`` for a symmetric positive semidefinite ``S`` (eigenvalues
    clipped at 0: a fixed zero premium variance makes ``Sigma`` singular)."""
    d, Q = np.linalg.eigh(0.5 * (S + S.T))
    return Q * np.sqrt(np.maximum(d, 0.0))


class PathSampler:
    """Draws of the premium paths of one panel at changing parameters (the data prepared once).

    ``Y`` (T, N) decimal returns with NaN; ``scale2`` (T,) squared volatility scale or None;
    ``init`` the informative entry prior ``(m0, v0)`` (per period) or None for the exact diffuse
    start; ``method`` the E-step path for the mean-correction route (``paths.METHODS``).
    ``route`` is "spectral" for a balanced panel with the diffuse start, else "mean-correction".
    """

    def __init__(self, Y, scale2=None, init=None, method: str = "auto"):
        self.Y = np.asarray(Y, dtype=float)
        T, N = self.Y.shape
        self.s2 = np.ones(T) if scale2 is None else np.asarray(scale2, dtype=float)
        self.init = init
        self.obs = ~np.isnan(self.Y)
        self.entry = first_observations(self.Y)
        self.active = np.arange(T)[:, None] >= self.entry[None, :]
        if init is None and final_stretch_start(self.Y) == 0:
            self.route = "spectral"
            self.basis = basis_for(self.s2)
            self.ytil = spectral(self.basis, self.Y)
        else:
            self.route = "mean-correction"
            self.method = paths.choose(self.Y, method, scale2)

    def draw(self, Sigma, H, rng: np.random.Generator, h_parts=None) -> np.ndarray:
        """(T, N) premium path drawn from ``p(mu | Y)`` at ``(Sigma, H)``; NaN before entry.

        ``h_parts = (B, psi)`` when ``H = B B' + diag(psi)`` (the cheaper exact eigenproblem).
        """
        if self.route == "spectral":
            return self._spectral(Sigma, H, rng, h_parts)
        return self._mean_correction(Sigma, H, rng)

    def _spectral(self, Sigma, H, rng, h_parts):
        d, V, W, _ = simultaneous_diagonalisation(np.asarray(Sigma, float), np.asarray(H, float),
                                                  h_parts)
        d = np.maximum(d, 0.0)
        lam = self.basis.lam
        with np.errstate(invalid="ignore", divide="ignore"):
            w = d[None, :] / (d[None, :] + lam[:, None])
        w[0] = 1.0                                             # the flat level: no shrinkage
        coords = w * (self.ytil @ V) + np.sqrt(w) * rng.standard_normal(w.shape)
        return ChainMoments.path(self.basis, coords) @ W.T

    def simulate(self, Sigma, H, rng: np.random.Generator):
        """``(mu+, y+)`` (T, N) from the model with the data's missing cells; entry levels 0 (or
        drawn from the informative prior)."""
        T, N = self.Y.shape
        w = rng.standard_normal((T, N)) @ psd_root(np.asarray(Sigma, float)).T
        w[~self.active] = 0.0
        w[self.entry, np.arange(N)] = 0.0 if self.init is None else (
            self.init[0] + np.sqrt(self.init[1]) * rng.standard_normal(N))
        mu = np.cumsum(w, axis=0)
        eps = (rng.standard_normal((T, N)) @ psd_root(np.asarray(H, float)).T
               * np.sqrt(self.s2)[:, None])
        mu[~self.active] = np.nan
        return mu, np.where(self.obs, mu + eps, np.nan)

    def _mean_correction(self, Sigma, H, rng):
        mu_plus, y_plus = self.simulate(Sigma, H, rng)
        init = None if self.init is None else (0.0, self.init[1])
        plan = paths.Plan(self.Y - y_plus, self.s2, init, self.method)
        return mu_plus + plan.report(Sigma, H).smoothed_mean
