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

* **precision** (any gap pattern, small panels): the posterior precision of the active premia,
  stacked date by date, is banded (bandwidth < 2N): data terms ``H_O^{-1} / s_t^2`` and random-walk
  terms ``Sigma_A^{-1}`` on the differences over the assets ``A`` active the date before; an
  entering level gets no prior term (the exact diffuse start) or ``1 / v0``.  One banded
  Cholesky factor ``Q = L L'`` gives the draw ``Q^{-1} b + L^{-T} xi`` (Rue 2001; Chan &
  Jeliazkov 2009).  It needs ``Sigma_A`` positive definite; a singular one (a zero own premium
  variance) falls back to the mean correction for that draw.

Only the premia are drawn; the common factors follow from them exactly (``eta_t | w_t`` is
Gaussian and independent across dates), see :mod:`panel.bayes.conditionals`.
"""

from __future__ import annotations

import numpy as np
from scipy import linalg
from scipy.linalg import lapack

from panel.kalman import paths
from panel.kalman.chain import ChainMoments, basis_for, spectral
from panel.kalman.dense import first_observations
from panel.kalman.stretch import final_stretch_start, simultaneous_diagonalisation


#: Largest ``n (bandwidth + 1)^2`` (flops of the banded Cholesky factor) for the precision route.
PRECISION_FLOPS = 2e8


def psd_root(S: np.ndarray) -> np.ndarray:
    """(n, n) ``R`` with ``R R' = S`` for a symmetric positive semidefinite ``S`` (eigenvalues
    clipped at 0: a fixed zero premium variance makes ``Sigma`` singular)."""
    d, Q = np.linalg.eigh(0.5 * (S + S.T))
    return Q * np.sqrt(np.maximum(d, 0.0))


def mask_groups(mask: np.ndarray):
    """Yield ``(rows, columns)`` for each distinct row pattern of a (T, N) bool ``mask``."""
    if mask.shape[0] == 0:
        return
    if (mask == mask[0]).all():
        yield np.arange(mask.shape[0]), np.flatnonzero(mask[0])
        return
    _, first, inverse = np.unique(np.packbits(mask, axis=1), axis=0, return_index=True,
                                  return_inverse=True)
    inverse = inverse.ravel()
    for g, row in enumerate(first):
        yield np.flatnonzero(inverse == g), np.flatnonzero(mask[row])


class PathSampler:
    """Draws of the premium paths of one panel at changing parameters (the data prepared once).

    ``Y`` (T, N) decimal returns with NaN; ``scale2`` (T,) squared volatility scale or None;
    ``init`` the informative entry prior ``(m0, v0)`` (per period) or None for the exact diffuse
    start; ``method`` the E-step path for the mean-correction route (``paths.METHODS``).
    ``route="auto"`` takes "spectral" for a balanced panel with the diffuse start, else
    "precision" while the banded factorisation is cheap (``PRECISION_FLOPS``), else
    "mean-correction"; naming a route forces it (all are exact).
    """

    ROUTES = ("auto", "spectral", "precision", "mean-correction")

    def __init__(self, Y, scale2=None, init=None, method: str = "auto", route: str = "auto"):
        self.Y = np.asarray(Y, dtype=float)
        T, N = self.Y.shape
        self.s2 = np.ones(T) if scale2 is None else np.asarray(scale2, dtype=float)
        self.init = init
        self.obs = ~np.isnan(self.Y)
        self.entry = first_observations(self.Y)
        self.active = np.arange(T)[:, None] >= self.entry[None, :]
        if route not in self.ROUTES:
            raise ValueError(f"route must be one of {', '.join(self.ROUTES)}, got {route!r}")
        balanced = init is None and final_stretch_start(self.Y) == 0
        if route == "spectral" and not balanced:
            raise ValueError("the spectral route needs a balanced panel and the diffuse start")
        if route in ("auto", "spectral") and balanced:
            self.route = "spectral"
            self.basis = basis_for(self.s2)
            self.ytil = spectral(self.basis, self.Y)
            return
        self.method = paths.choose(self.Y, method, scale2)
        self.band = _Band(self.obs, self.active)
        if route == "auto":
            cheap = self.band.n * (self.band.width + 1) ** 2 <= PRECISION_FLOPS
            route = "precision" if cheap else "mean-correction"
        self.route = route

    def refill(self, Y: np.ndarray) -> None:
        """New values for the same observed cells (the gap cells of a data-augmented sampler,
        :class:`panel.bayes.sampler.Gibbs`): the route and its data-free parts are kept."""
        Y = np.asarray(Y, dtype=float)
        if not np.array_equal(~np.isnan(Y), self.obs):
            raise ValueError("refill needs the same observed cells as the panel the sampler was built on")
        self.Y = Y
        if self.route == "spectral":
            self.ytil = spectral(self.basis, Y)

    def draw(self, Sigma, H, rng: np.random.Generator, h_parts=None) -> np.ndarray:
        """(T, N) premium path drawn from ``p(mu | Y)`` at ``(Sigma, H)``; NaN before entry.

        ``h_parts = (B, psi)`` when ``H = B B' + diag(psi)`` (the cheaper exact eigenproblem).
        """
        if self.route == "spectral":
            return self._spectral(Sigma, H, rng, h_parts)
        if self.route == "precision":
            try:
                return self._precision(Sigma, H, rng)
            except linalg.LinAlgError:      # singular Sigma_A or a breakdown: the exact fallback
                pass
        return self._mean_correction(Sigma, H, rng)

    def _precision(self, Sigma, H, rng):
        ab, b = self.band.assemble(self.Y, np.asarray(Sigma, float), np.asarray(H, float), self.s2,
                                   self.init)
        L = linalg.cholesky_banded(ab, lower=True, check_finite=False)
        mean = linalg.cho_solve_banded((L, True), b, check_finite=False)
        noise, info = lapack.dtbtrs(L, rng.standard_normal((b.size, 1)), uplo="L", trans="T")
        if info != 0:
            raise linalg.LinAlgError(f"banded triangular solve failed (info={info})")
        mu = np.full(self.Y.shape, np.nan)
        mu[self.active] = mean + noise[:, 0]
        return mu

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


class _Band:
    """Index plan of the banded posterior precision of the active premia (data only, built once):
    cells ``(t, i)`` with ``i`` active at ``t`` numbered date by date, in asset order."""

    def __init__(self, obs: np.ndarray, active: np.ndarray):
        T, N = active.shape
        self.pos = np.full(active.shape, -1)
        self.n = int(active.sum())
        self.pos[active] = np.arange(self.n)
        counts = active.sum(axis=1)
        ends = np.cumsum(counts)
        starts = ends - counts
        linked = (counts[1:] > 0) & (counts[:-1] > 0)          # a date and the one before
        self.width = int(max(counts.max() - 1, np.max(ends[1:] - 1 - starts[:-1], where=linked,
                                                      initial=0)))
        self.data_groups = [(rows, cols) for rows, cols in mask_groups(obs) if cols.size]
        self.step_groups = [(rows + 1, cols) for rows, cols in mask_groups(active[:-1]) if cols.size]
        self.entry_cells = self.pos[obs.argmax(axis=0), np.arange(N)]

    def assemble(self, Y, Sigma, H, s2, init):
        """(band, b): the lower band storage ``(width + 1, n)`` of the precision ``Q`` and the
        vector ``b`` with ``E[mu | Y] = Q^{-1} b``."""
        n = self.n
        parts = []
        b = np.zeros(n)

        def block(p_r, p_c, M):
            """Add ``M`` ((a, a) or (m, a, a)) at rows ``p_r`` and columns ``p_c`` ((m, a) cell
            positions, one row per date): the lower triangle's entries."""
            R = np.broadcast_to(p_r[:, :, None], p_r.shape + p_r.shape[1:])
            C = np.broadcast_to(p_c[:, None, :], R.shape)
            keep = R >= C
            parts.append((R[keep], C[keep], np.broadcast_to(M, R.shape)[keep]))

        for dates, O in self.data_groups:                      # return shocks: H_O^-1 / s_t^2
            Hi = _pd_inverse(H[np.ix_(O, O)])
            p = self.pos[np.ix_(dates, O)]
            w = 1.0 / s2[dates]
            block(p, p, w[:, None, None] * Hi)
            np.add.at(b, p, (Y[np.ix_(dates, O)] @ Hi) * w[:, None])
        for dates, A in self.step_groups:                      # random walk: Sigma_A^-1 on diffs
            P = _pd_inverse(Sigma[np.ix_(A, A)])
            now, before = self.pos[np.ix_(dates, A)], self.pos[np.ix_(dates - 1, A)]
            block(now, now, P)
            block(before, before, P)
            block(now, before, -P)
        if init is not None:                                   # informative entry prior
            e = self.entry_cells
            parts.append((e, e, np.full(e.size, 1.0 / init[1])))
            b[e] += init[0] / init[1]
        r, c, v = (np.concatenate(x) for x in zip(*parts))
        band = np.bincount((r - c) * n + c, weights=v, minlength=(self.width + 1) * n)
        return band.reshape(self.width + 1, n), b


def _pd_inverse(A: np.ndarray) -> np.ndarray:
    """Inverse of a symmetric positive definite matrix; ``LinAlgError`` if it is not."""
    c = linalg.cho_factor(A, lower=True, check_finite=False)
    return linalg.cho_solve(c, np.eye(A.shape[0]), check_finite=False)
