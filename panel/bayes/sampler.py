"""The Gibbs sampler of the premium panel (DESIGN §2, §3a): one sweep and the chain loop.

One sweep at parameters ``theta = (Lambda, q, H)``:

1. premia ``mu | theta, Y`` by the simulation smoother (:class:`panel.kalman.simsmooth.PathSampler`);
2. factor innovations ``eta_t | w_t`` (exact: ``(eta_t, w_t)`` are jointly Gaussian and iid), so
   ``(mu, f)`` is one joint draw; ``f_0 = 0``;
3. return shocks: diagonal ``psi_i`` inverse gamma; factor ``g_t``, then ``B``, ``psi`` (Bayesian
   factor analysis); full: missing shocks imputed, ``H`` inverse Wishart;
4. premium parameters centred (``Lambda_i``, ``q_i`` from ``w`` on ``eta``), a scale move of
   (``f``, ``Lambda``) (and of (``g``, ``B``) in step 3), then non-centred
   (:func:`panel.bayes.conditionals.premium_noncentred`); with a full ``H`` the non-centred step
   goes asset by asset, each given the others' shocks;
5. with ``augment=True``, the panel's gaps (:func:`panel.kalman.gapfill.fillable`: returns
   missing inside an asset's history or not yet published at its last dates) are part of the
   chain's state, drawn from ``y_gap | mu, shocks, theta, Y`` (data augmentation, Tanner & Wong
   1987).  Steps 1-4 then see a panel without gaps, so step 1 takes the fast balanced (or
   stretch) path instead of the dense one; the posterior is the same.  For a factor ``H`` the
   draw is ``mu + s (g B' + sqrt(psi) e)`` given this sweep's ``g``; steps 1 and 3 together
   draw ``(mu, g)`` jointly, so the sweep is a valid blocked Gibbs sampler.  Panels without
   gaps consume the same random numbers either way.

Loadings are sampled unrestricted (their prior is rotation invariant) and recorded in the
identified rotation (``panel.model.params.canonical_loadings``).  Chains are seeded by
``numpy.random.SeedSequence(seed).spawn(chains)``: a run reproduces bit for bit.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from panel.bayes import conditionals as cd
from panel.bayes.priors import ResolvedPriors
from panel.kalman.gapfill import fillable
from panel.kalman.simsmooth import PathSampler
from panel.model import mstep
from panel.model.params import Params, canonical_loadings
from panel.model.spec import ResolvedSpec
from panel.model.start import starting_values

#: Per-chain dispersion of the starting values (log scale): variances, then loadings.
START_SPREAD = (1.0, 0.3)
#: Proposal variance of the signed root in the non-centred step with the invgamma family, as a
#: multiple of the prior's median own premium variance.
IG_PROPOSAL_WIDTH = 4.0


@dataclass
class ChainState:
    """The parameters a chain carries between sweeps (raw, unrotated loadings)."""

    Lambda: np.ndarray
    q: np.ndarray
    psi: np.ndarray | None
    B: np.ndarray | None
    H: np.ndarray | None
    fill: np.ndarray | None = None      # (m,) current values of the gap cells (augmentation)

    def params(self, structure: str) -> Params:
        if structure == "full":
            return Params.build(self.Lambda, self.q, "full", H=self.H)
        return Params.build(self.Lambda, self.q, structure, B=self.B, psi=self.psi)


class Gibbs:
    """One panel's sampler: the data prepared once, :meth:`sweep` per iteration.

    Y (T, N) decimal returns per period with NaN; s2 (T,) squared volatility scale; init the
    informative entry prior ``(m0, v0)`` or None; rs the resolved model (k, structure, r, fixed
    variances, cap); prior the :class:`ResolvedPriors`; method the E-step path; augment draws
    the gap cells as part of the state (step 5 above).  ``obs`` is the mask the sweep treats as
    observed (returns and gap cells), ``seen`` the returns alone.
    """

    def __init__(self, Y, s2, init, rs: ResolvedSpec, prior: ResolvedPriors, method="auto",
                 augment: bool = True):
        self.Y = np.asarray(Y, dtype=float)
        T, N = self.Y.shape
        self.s2 = np.asarray(s2, dtype=float)
        self.s = np.sqrt(self.s2)
        self.init = init
        self.rs, self.prior = rs, prior
        self.seen = ~np.isnan(self.Y)
        self.gaps = fillable(self.Y) if augment else np.zeros_like(self.seen)
        self.gap_at = np.nonzero(self.gaps)
        self.gap_dates = np.flatnonzero(self.gaps.any(axis=1))
        self.paths = PathSampler(np.where(self.gaps, 0.0, self.Y), self.s2, init, method)
        self.obs = self.paths.obs
        self.entry = self.paths.entry
        self.active = self.paths.active
        self.act = self.active[:-1]
        self.free_q = np.ones(N, bool) if rs.fixed_q is None else np.isnan(rs.fixed_q)
        self.free_psi = np.ones(N, bool) if rs.fixed_psi is None else np.isnan(rs.fixed_psi)
        self.q_ref = IG_PROPOSAL_WIDTH * prior.q_var

    # ------------------------------------------------------------------ start
    def start(self, rng: np.random.Generator, start: Params | None = None) -> ChainState:
        """Dispersed starting values: the ML fit's moment rule (or ``start``) with each variance
        scaled by ``exp(N(0, 1))`` and each loading by ``exp(N(0, 0.3^2))``; fixed values and
        the cap respected."""
        rs, N = self.rs, self.Y.shape[1]
        p = starting_values(self.Y, rs) if start is None else start
        v_spread, l_spread = START_SPREAD
        fixed_q = np.asarray(p.q if rs.fixed_q is None else rs.fixed_q, dtype=float)
        q = np.where(self.free_q, np.maximum(p.q, 1e-12 * np.diag(p.H)) *
                     np.exp(v_spread * rng.standard_normal(N)), fixed_q)
        lam = np.array(p.Lambda) * np.exp(l_spread * rng.standard_normal((N, 1)))
        if rs.max_sigma_diag is not None:
            lam, q = mstep.cap_premium(lam, q, rs.max_sigma_diag * (1 - 1e-9), self.free_q)
        if rs.structure == "full":
            d = np.exp(0.15 * rng.standard_normal(N))         # variances scaled by exp(N(0, 0.3^2))
            return ChainState(lam, q, None, None, np.array(p.H) * np.outer(d, d), self._first_fill())
        psi = np.where(self.free_psi, np.array(p.psi) * np.exp(0.3 * rng.standard_normal(N)),
                       np.array(p.psi))
        B = None if rs.structure == "diagonal" else (
            np.array(p.B) * np.exp(l_spread * rng.standard_normal((N, 1))))
        return ChainState(lam, q, psi, B, None, self._first_fill())

    def _first_fill(self) -> np.ndarray:
        """Gap cells start at their asset's mean return (any start is valid; warm-up forgets it)."""
        return np.nanmean(self.Y, axis=0)[self.gap_at[1]]

    def _panel(self, st: ChainState) -> np.ndarray:
        """The returns with the gap cells at the chain's current values."""
        if not self.gap_dates.size:
            return self.Y
        Y = self.Y.copy()
        Y[self.gap_at] = st.fill
        return Y

    def _draw_gaps(self, st: ChainState, mu, common, rng) -> np.ndarray:
        """(m,) gap cells drawn from ``y_gap | mu, theta, Y``: ``mu + s_t u`` with the scaled
        shock ``u`` drawn as ``common + N(0, psi_i)`` (``common = g B'`` (T, N), this sweep's return
        factors' part, for a factor H; None for a diagonal one), or, for a full H, from ``u_U | u_O``
        given that date's observed shocks."""
        t, i = self.gap_at
        if self.rs.structure == "full":
            d = self.gap_dates
            u = np.where(self.seen[d], (self.Y[d] - mu[d]) / self.s[d, None], 0.0)
            shocks = np.zeros_like(self.Y)
            shocks[d] = cd.impute_shocks(u, self.seen[d], st.H, rng, precision=True)
            shock = shocks[t, i]
        else:
            shock = np.sqrt(st.psi[i]) * rng.standard_normal(t.size)
            if common is not None:
                shock = shock + common[t, i]
        return mu[t, i] + self.s[t] * shock

    # ------------------------------------------------------------------ one sweep
    def sweep(self, st: ChainState, rng: np.random.Generator) -> np.ndarray:
        """Update ``st`` in place by one Gibbs sweep; returns the premium path (T, N) that goes
        with the new parameters (NaN before entry)."""
        rs, pr = self.rs, self.prior
        T, N = self.Y.shape
        k = rs.k
        Y = self._panel(st)
        if self.gap_dates.size:
            self.paths.refill(Y)
        p = st.params(rs.structure)
        h_parts = None if rs.structure == "full" else (
            np.zeros((N, 0)) if st.B is None else st.B, st.psi)
        mu = self.paths.draw(p.Sigma, p.H, rng, h_parts)
        w = np.nan_to_num(np.diff(mu, axis=0))
        eta = cd.factor_innovations(w, self.act, st.Lambda, st.q, rng) if k else np.zeros((T - 1, 0))
        f = np.vstack([np.zeros((1, k)), np.cumsum(eta, axis=0)])
        u = np.nan_to_num((Y - mu) / self.s[:, None])
        common = None

        if rs.structure == "diagonal":
            st.psi = np.where(self.free_psi, cd.idio_variances(u, self.obs, pr.psi_a, pr.psi_b, rng),
                              st.psi)
            target = Y
        elif rs.structure == "factor":
            g = cd.return_factors(u, self.obs, st.B, st.psi, rng)
            st.B = cd.return_loadings(u, self.obs, g, st.psi, pr.b_sd, rng)
            g, st.B, _ = cd.scale_move(g, st.B, pr.b_sd, rng)
            common = g @ st.B.T
            resid = u - common
            st.psi = np.where(self.free_psi,
                              cd.idio_variances(resid, self.obs, pr.psi_a, pr.psi_b, rng), st.psi)
            target = Y - self.s[:, None] * common
        else:
            u = cd.impute_shocks(u, self.obs, st.H, rng)
            st.H = cd.full_return_cov(u, pr.iw_dof, pr.iw_scale, rng)

        st.Lambda, st.q = cd.premium_centred(w, self.act, eta, st.Lambda, st.q, self.free_q, pr,
                                             rs.max_sigma_diag, rng)
        if k:
            eta_c, lam_c, _ = cd.scale_move(eta, st.Lambda, pr.loading_sd, rng)
            if rs.max_sigma_diag is None or np.all((lam_c ** 2).sum(axis=1) + st.q
                                                   <= rs.max_sigma_diag):
                st.Lambda, f = lam_c, np.vstack([np.zeros((1, k)), np.cumsum(eta_c, axis=0)])
        a = mu - f @ st.Lambda.T
        c = a[self.entry, np.arange(N)]
        s_now = np.sqrt(st.q)
        with np.errstate(invalid="ignore", divide="ignore"):
            X = np.where(s_now > 0, (a - c) / s_now, 0.0)
        X[~self.active] = 0.0
        if rs.structure != "full":
            weights = np.where(self.obs, 1.0 / (self.s2[:, None] * st.psi[None, :]), 0.0)
            c, st.Lambda, st.q, s_new = cd.premium_noncentred(
                target, weights, f, X, self.entry, c, st.Lambda, st.q, self.free_q, pr,
                rs.max_sigma_diag, self.init, rng, self.q_ref)
            mu = c + f @ st.Lambda.T + s_new * X
        else:
            mu = self._noncentred_full(st, Y, u, f, X, c, rng)
        if self.gap_dates.size:
            st.fill = self._draw_gaps(st, mu, common, rng)
        mu[~self.active] = np.nan
        return mu

    def _noncentred_full(self, st, Y, u, f, X, c, rng):
        """Non-centred step asset by asset with a full H: asset i's shock given the others'
        (complete, imputed) shocks has mean ``u_i - (u P)_i / P_ii`` and variance ``1 / P_ii``
        (``P = H^-1``)."""
        rs, pr = self.rs, self.prior
        N = self.Y.shape[1]
        P = np.linalg.inv(st.H)
        UP = u @ P
        lam, q = st.Lambda.copy(), st.q.copy()
        s_all = np.sqrt(q)
        for i in range(N):
            sl = slice(i, i + 1)
            cond_mean = u[:, i] - UP[:, i] / P[i, i]
            target = (Y[:, i] - self.s * cond_mean)[:, None]
            weights = np.where(self.obs[:, sl], P[i, i] / self.s2[:, None], 0.0)
            ci, lam[sl], q[sl], si = cd.premium_noncentred(
                target, weights, f, X[:, sl], self.entry[sl], c[sl], lam[sl], q[sl],
                self.free_q[sl], pr, rs.max_sigma_diag, self.init, rng, self.q_ref)
            c[i], s_all[i] = ci[0], si[0]
            mu_i = c[i] + f @ lam[i] + s_all[i] * X[:, i]
            new_u = np.where(self.obs[:, i], (Y[:, i] - mu_i) / self.s, u[:, i])
            UP += np.outer(new_u - u[:, i], P[i])
            u[:, i] = new_u
        st.Lambda, st.q = lam, q
        return c + f @ lam.T + s_all * X


@dataclass(frozen=True)
class ChainDraws:
    """Kept draws of one chain: dict name -> (draws, ...) arrays (identified rotation)."""

    arrays: dict


def run_chain(gibbs: Gibbs, seed_seq: np.random.SeedSequence, draws: int, warmup: int,
              start: Params | None = None, progress=None) -> ChainDraws:
    """Run one chain: ``warmup`` discarded sweeps, then ``draws`` recorded ones.

    Recorded: ``Lambda`` (draws, N, k) canonical, ``q`` (draws, N), ``psi`` and ``B`` (canonical)
    or ``H``, and ``premium_last`` (draws, N) — the premia at the last date (filtered = smoothed
    there).  ``progress(n_done)`` is called after every sweep when given.
    """
    rng = np.random.default_rng(seed_seq)
    rs = gibbs.rs
    st = gibbs.start(rng, start)
    N = gibbs.Y.shape[1]
    out = {"Lambda": np.empty((draws, N, rs.k)), "q": np.empty((draws, N)),
           "premium_last": np.empty((draws, N))}
    if rs.structure == "full":
        out["H"] = np.empty((draws, N, N))
    else:
        out["psi"] = np.empty((draws, N))
        if rs.structure == "factor":
            out["B"] = np.empty((draws, N, rs.r))
    for it in range(warmup + draws):
        mu = gibbs.sweep(st, rng)
        if progress is not None:
            progress(1)
        j = it - warmup
        if j < 0:
            continue
        out["Lambda"][j] = canonical_loadings(st.Lambda)
        out["q"][j] = st.q
        out["premium_last"][j] = mu[-1]
        if rs.structure == "full":
            out["H"][j] = st.H
        else:
            out["psi"][j] = st.psi
            if rs.structure == "factor":
                out["B"][j] = canonical_loadings(st.B)
    return ChainDraws(out)


def resolved_model(k: int, structure: str, r: int, ppy: int, fixed_q=None, fixed_psi=None,
                   cap=None) -> ResolvedSpec:
    """The :class:`ResolvedSpec` the sampler uses (per-period fixed variances, NaN = free)."""
    def as_tuple(v):
        return None if v is None else tuple(float(x) for x in np.asarray(v, float))
    return ResolvedSpec(k=k, structure=structure, r=r if structure == "factor" else 0, ppy=ppy,
                        fixed_q=as_tuple(fixed_q), fixed_psi=as_tuple(fixed_psi), max_sigma_diag=cap)
