"""Exact fast E-step for ragged panels: every long stretch decoupled, dense steps elsewhere.

The dates are cut into *segments* (:class:`SegmentPlan`): a **stretch** is a run of at least three
dates with one observed set ``O`` and no diffuse entry after its first date; every other date is
a **dense** date (the reference filter step of :mod:`panel.kalman.dense`).  A forward filter and
a backward RTS smoother run over the segments; a stretch ``a..e`` is one step of both:

* State at its ends: ``x_a``, ``x_e`` = premia of the active assets ``A`` (``U = A \\ O`` are
  dormant: exited, or in a gap).  Marginally ``x_e = x_a + omega``, ``omega ~ N(0, (L-1) Sigma_AA)``.
* Its data enter only through the chains' ends ``nu = (V' mu_{O,a}, V' mu_{O,e})`` (pencil
  ``Sigma_OO v = d H_OO v``, :func:`panel.kalman.stretch.simultaneous_diagonalisation`): the
  factor :func:`panel.kalman.bridge.end_factor`, a 2x2 Gaussian per chain, is a pseudo-observation
  of ``nu`` — one Kalman update of the joint ``(x_a, x_e)`` prior, a dense 2n x 2n solve.  A stretch
  at the first date with a flat start uses the chains' diffuse ends instead
  (:func:`panel.kalman.bridge.diffuse_ends`).
* Backward, the smoothed ``x_e`` gives the smoothed joint ``(x_a, x_e)`` (the joint filter's
  conditional of ``x_a`` on ``x_e``); the chains' EM sums given the ends are quadratic forms in
  them (:func:`panel.kalman.bridge.stretch_moments`).  Dormant assets: ``w_U = B w_O + u_t``
  (``B = Sigma_UO Sigma_OO^{-1}``) with the ``u_t`` iid ``N(0, Sigma_{U|O})`` given only through
  their sum ``xi = delta_U - B delta_O`` (``delta = x_e - x_a``): ``E[u_t | xi] = xi / (L-1)``.

Cost per E-step: O(n^3 + L n^2) per stretch, the dense step's O(n^3) per dense date; memory
O(N^2) per segment (no per-date covariances inside a stretch).  Moments are grouped exactly as on
the dense path (w by the assets active at t-1, e by the observed set).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import linalg

from panel.kalman import bridge, dense, impute
from panel.kalman.checkpoints import BlockView, Recomputed, checkpoint_interval
from panel.kalman.dense import LOG2PI, _disturbance_terms, _FilterStep, _memo, _solve_right_pd, _sym
from panel.kalman.stretch import regression_on, simultaneous_diagonalisation
from panel.kalman.types import EStep, MomentGroup

#: Shortest run of dates decoupled as a stretch (the bridge needs an interior date).
MIN_STRETCH = 3


@dataclass
class _Stretch:
    """Parameter-free data of one stretch ``a..e``: observed ``O``, active ``A`` (sorted assets),
    positions of ``O`` and of the dormant ``U`` in ``A``, interior basis and data coordinates."""

    a: int
    e: int
    O: np.ndarray
    A: np.ndarray
    o_pos: np.ndarray
    u_pos: np.ndarray
    basis: bridge.EndBasis
    y0: np.ndarray
    ye: np.ndarray
    yint: np.ndarray                 # basis.coords(Y[a+1:e, O]), (m, n_O)

    @property
    def L(self) -> int:
        return self.e - self.a + 1


def _runs(obs: np.ndarray):
    """(start, stop) of the maximal runs of dates with the same observed set."""
    T = obs.shape[0]
    change = np.flatnonzero((obs[1:] != obs[:-1]).any(axis=1)) + 1
    bounds = np.concatenate([[0], change, [T]])
    return list(zip(bounds[:-1].tolist(), bounds[1:].tolist()))


def stretch_cost(n: int, L: int) -> float:
    """Estimated cost of one stretch of ``L`` dates with ``n`` active assets (flops-equivalents,
    the units of :mod:`panel.kalman.paths`): the pencil, the 2n x 2n joint update and smoothing,
    the bridge sums, and Python overhead."""
    return 1.2e6 + 60.0 * n ** 3 + 16.0 * L * n * n


def dense_cost(n: int) -> float:
    """Estimated cost of one dense filter-and-smoother date with ``n`` active assets."""
    return 2e5 + 10.0 * n ** 3


def layout(Y, init=None, by_cost: bool = True):
    """Segments of ``Y`` (T, N): a list of ``("dense", t)`` and ``("stretch", a, e, O, A)`` in date
    order.  A run of dates with one observed set becomes a stretch when it is long enough
    (:data:`MIN_STRETCH`) and (``by_cost``) cheaper than its dense dates by
    :func:`stretch_cost`; diffuse entrants after the first date take one dense step first."""
    obs = ~np.isnan(np.asarray(Y, dtype=float))
    entry = dense.first_observations(Y)
    out: list = []
    for start, stop in _runs(obs):
        first = start
        if init is None and start > 0 and (entry == start).any():
            out.append(("dense", start))
            first = start + 1
        A = np.flatnonzero(entry <= first)
        L = stop - first
        O = np.flatnonzero(obs[first]) if L > 0 else A[:0]
        if L >= MIN_STRETCH and O.size and (not by_cost
                                            or stretch_cost(A.size, L) < L * dense_cost(A.size)):
            out.append(("stretch", first, stop - 1, O, A))
        else:
            out.extend(("dense", t) for t in range(first, stop))
    return out


def dense_equivalent(segs) -> int:
    """Dense dates whose filtered and predicted covariances weigh what the forward records of the
    segments ``segs`` (:func:`layout` or :attr:`SegmentPlan.segments`) hold: two N x N matrices
    per dense date, about ten per stretch (its joint 2n x 2n end covariance, the predicted state,
    the dormant assets' blocks)."""
    n_stretch = sum(seg[0] == "stretch" for seg in segs)
    return len(segs) + 4 * n_stretch


def layout_cost(segs, n_active) -> float:
    """Estimated cost of one E-step over the segments ``segs`` (:func:`layout`); ``n_active``
    (T,) the number of active assets per date."""
    total = 0.0
    for seg in segs:
        if seg[0] == "stretch":
            total += stretch_cost(seg[4].size, seg[2] - seg[1] + 1)
        else:
            total += dense_cost(int(n_active[seg[1]]))
    return total


class SegmentPlan:
    """The parameter-free part of the segment path for ``Y`` (T, N) with squared scales ``s2``
    (T,) and the initial prior ``init`` (None = exact diffuse), built once per fit: the
    :func:`layout` (``by_cost=False``: every run long enough is a stretch) and each stretch's
    interior basis and data coordinates."""

    def __init__(self, Y, s2, init=None, by_cost: bool = True):
        self.Y = Y = np.asarray(Y, dtype=float)
        self.s2 = np.asarray(s2, dtype=float)
        self.init = init
        self.obs = ~np.isnan(Y)
        segs = layout(Y, init, by_cost)
        self.segments = [seg if seg[0] == "dense" else ("stretch", self._stretch(*seg[1:]))
                         for seg in segs]

    def _stretch(self, a, e, O, A) -> _Stretch:
        eb = bridge.end_basis_for(self.s2[a:e + 1])
        return _Stretch(a, e, O, A, np.searchsorted(A, O), np.searchsorted(A, np.setdiff1d(A, O)),
                        eb, self.Y[a, O], self.Y[e, O], eb.coords(self.Y[a + 1:e, O]))

    @property
    def n_stretch(self) -> int:
        return sum(kind == "stretch" for kind, _ in self.segments)


class _Moments:
    """Moment sums keyed by component mask; beyond :data:`panel.kalman.impute.MAX_GROUPS` masks
    they are collapsed as they form, imputed under ``C`` (the E-step's Sigma or H)."""

    def __init__(self, N, C):
        self.N, self.sums, self.folding = N, {}, impute.Folding(C)

    def add(self, members, count, M, score=None):
        """``score``: the dates' disturbance-smoother terms over ``members`` (None: not formed, and
        the group then has none)."""
        key = np.asarray(members).tobytes()
        hit = self.sums.get(key)
        if hit is None:
            full = len(self.sums) >= impute.MAX_GROUPS and not self.folding.failed
            if full and self.folding.fold(self._live()):
                self.sums = {}
            self.sums[key] = [np.asarray(members), count, M, score]
        else:
            hit[1] += count
            hit[2] = hit[2] + M
            hit[3] = None if hit[3] is None or score is None else hit[3] + score

    def _live(self):
        out = []
        for members, count, M, score in self.sums.values():
            mask = np.zeros(self.N, bool)
            mask[members] = True
            out.append(MomentGroup(mask, count, _sym(M), score=None if score is None else _sym(score)))
        return out

    def groups(self):
        return self._live() + self.folding.done


def _joined(m, P, prev, A, init):
    """Prior over ``A`` from the predicted state over ``prev`` (subset of A) and the informative
    initial prior for the entrants."""
    if A.size == prev.size:
        return m, P
    pos = np.searchsorted(A, prev)
    mA = np.full(A.size, float(init[0]))
    mA[pos] = m
    PA = float(init[1]) * np.eye(A.size)
    PA[np.ix_(pos, pos)] = P
    return mA, PA


class _StretchSolve:
    """One stretch at given parameters: forward (joint end posterior given the past and the
    stretch) and, once the smoothed end is known, the EM sums."""

    def __init__(self, st: _Stretch, Sigma, prior, pencil):
        self.st = st
        O, A, op = st.O, st.A, st.o_pos
        d, V, W, logdet_v = pencil
        self.d = d
        self.V, self.W = V, W
        eb, L = st.basis, st.L
        self.z0, self.ze, self.zeta = st.y0 @ V, st.ye @ V, st.yint @ V
        self.ef = ef = bridge.end_factor(eb, self.z0, self.ze, self.zeta, d)
        nA, n = A.size, O.size
        if prior is None:                               # flat start: A = O, no past
            mu0, mue, c00, c0e, cee, ll = bridge.diffuse_ends(ef, d, L)
            self.loglik = ll.sum() + (L - 1) * logdet_v
            self._update = ("flat", ef, (L - 1.0) * d, Sigma[np.ix_(A, A)])
            self.mj = np.concatenate([W @ mu0, W @ mue])
            self.Pj = np.block([[(W * c00) @ W.T, (W * c0e) @ W.T],
                                [(W * c0e) @ W.T, (W * cee) @ W.T]])
        else:
            m, P = prior
            SA = Sigma[np.ix_(A, A)]
            v0, ve, n00, n0e, nee, const = bridge.pseudo_observation(ef)
            G = P[:, op] @ V
            Sg = SA[:, op] @ V
            Pi = _sym(V.T @ G[op])
            S = np.empty((2 * n, 2 * n))
            S[:n, :n] = Pi + np.diag(n00)
            S[:n, n:] = S[n:, :n] = Pi + np.diag(n0e)
            S[n:, n:] = Pi + np.diag((L - 1) * d + nee)
            r = np.concatenate([v0, ve]) - np.tile(V.T @ m[op], 2)
            cf = linalg.cholesky(S, lower=True, check_finite=False)
            PZ = np.empty((2 * nA, 2 * n))
            PZ[:nA, :n] = PZ[:nA, n:] = PZ[nA:, :n] = G
            PZ[nA:, n:] = G + (L - 1) * Sg
            X = linalg.solve_triangular(cf, PZ.T, lower=True, check_finite=False).T
            u = linalg.solve_triangular(cf, r, lower=True, check_finite=False)
            self.mj = np.tile(m, 2) + X @ u
            Pj = np.block([[P, P], [P, P + (L - 1) * SA]])
            self.Pj = _sym(Pj - X @ X.T)
            self.loglik = (const.sum() - np.log(np.diag(cf)).sum() - 0.5 * u @ u
                           + L * logdet_v)
            self._update = ("prior", cf, u, PZ, SA)
        if st.u_pos.size:
            U = A[st.u_pos]
            SOO = Sigma[np.ix_(O, O)]
            self.B = regression_on(SOO, Sigma[np.ix_(O, U)])
            self.S_UgO = _sym(Sigma[np.ix_(U, U)] - self.B @ Sigma[np.ix_(O, U)])

    def end(self):
        """Filtered end state ``(m, P)`` over ``A``."""
        nA = self.st.A.size
        return self.mj[nA:], self.Pj[nA:, nA:]

    def moments(self, ms_e, Ps_e, last: bool, acc_w: _Moments, acc_e: _Moments,
                terms: bool = False):
        """Add the stretch's EM sums given the smoothed end ``(ms_e, Ps_e)`` (``terms``: with the
        premium innovations' score terms, :meth:`premium_terms`); returns the smoothed first
        state ``(ms_a, Ps_a)``."""
        st, V, W = self.st, self.V, self.W
        nA, op, L = st.A.size, st.o_pos, st.L
        mf_e, Pf_e = self.end()
        Paa, Pae = self.Pj[:nA, :nA], self.Pj[:nA, nA:]
        if last:
            ms_a, Ps_a, C_ae = self.mj[:nA], Paa, Pae
        else:
            J = _solve_right_pd(Pae, Pf_e)
            ms_a = self.mj[:nA] + J @ (ms_e - mf_e)
            Ps_a = _sym(Paa + J @ (Ps_e - Pf_e) @ J.T)
            C_ae = J @ Ps_e
        VT = V.T
        mu0, mue = VT @ ms_a[op], VT @ ms_e[op]
        P00 = _sym(VT @ Ps_a[np.ix_(op, op)] @ V)
        P0e = VT @ C_ae[np.ix_(op, op)] @ V
        Pee = _sym(VT @ Ps_e[np.ix_(op, op)] @ V)
        Mw, Me = bridge.stretch_moments(st.basis, self.ef, self.d, self.zeta, self.z0, self.ze,
                                        mu0, mue, P00, P0e, Pee)
        acc_e.add(st.O, L, W @ Me @ W.T)
        MwO = W @ Mw @ W.T
        up = st.u_pos
        if up.size:
            dm = ms_e - ms_a
            Ed = Ps_e + Ps_a - C_ae - C_ae.T + np.outer(dm, dm)      # E[delta delta']
            B = self.B
            xO = Ed[np.ix_(up, op)] - B @ Ed[np.ix_(op, op)]          # E[xi delta_O']
            xx = Ed[np.ix_(up, up)] - B @ Ed[np.ix_(op, up)] - xO @ B.T
            C = xO / (L - 1)
            M = np.empty((nA, nA))
            BM = B @ MwO + C
            M[np.ix_(op, op)] = MwO
            M[np.ix_(up, op)] = BM
            M[np.ix_(op, up)] = BM.T
            M[np.ix_(up, up)] = (BM @ B.T + B @ C.T + (L - 2) * self.S_UgO + xx / (L - 1))
            MwO = M
        score = self.premium_terms(ms_e, Ps_e, last, mu0, P00) if terms else None
        acc_w.add(st.A, L - 1, MwO, score)
        return ms_a, Ps_a

    def premium_terms(self, ms_e, Ps_e, last: bool, mu0, P00) -> np.ndarray:
        """``sum_t (r_t r_t' - N_t)`` of the stretch's premium innovations over ``A`` (nA, nA),
        exact as an own variance nears zero (:class:`panel.kalman.types.MomentGroup`).

        Split ``w_t = omega / (L-1) + b_t`` with ``omega = x_e - x_a`` (prior ``Q = (L-1)
        Sigma_AA``) and the bridge increments ``b_t`` (zero sum, independent of ``omega``): the
        terms are ``(L-1) (g g' - N_omega)`` with ``E[omega] = Q g``, ``Var(omega) = Q - Q N Q``,
        formed from the joint update and the smoothed end without ``Q^{-1}`` (Durbin & Koopman 2012,
        ch. 4, disturbance smoothing), plus the chains' bridge terms on ``O``: given the ends, a
        chain's deviation from the straight line between them has coordinates ``d (zeta - h) / (lam
        + d)`` (``h`` the line's, ``(a alpha_0 + b alpha_e) / lam``) and noise ``d / (lam + d)``, so
        over ``d^2`` nothing is divided by ``d``. Dormant assets' bridges are seen only through
        their sums, and add nothing (their conditional is the model's)."""
        st, V, W, d = self.st, self.V, self.W, self.d
        op, L, nA, n = st.o_pos, st.L, st.A.size, st.O.size
        kind, *upd = self._update
        if kind == "prior":
            cf, u, PZ, SA = upd
            Q = (L - 1) * SA
            E = np.zeros((2 * n, n))
            E[n:] = np.eye(n)
            Se = linalg.cho_solve((cf, True), E, check_finite=False)   # S^{-1}'s e columns
            Sv = linalg.solve_triangular(cf, u, lower=True, trans="T", check_finite=False)
            QV = Q[:, op] @ V                                  # Cov(omega, nu_e)
            g = np.zeros(nA)
            g[op] = V @ Sv[n:]                                 # Z_omega' S^{-1} v
            N = np.zeros((nA, nA))
            N[np.ix_(op, op)] = V @ Se[n:] @ V.T               # Z_omega' S^{-1} Z_omega
            Kt = np.eye(nA)                                    # Cov(omega, x_e) = Q Kt
            Kt[op] -= V @ (PZ[nA:] @ Se).T
            C_ao = -(PZ[:nA] @ Se) @ QV.T                      # Cov(x_a, omega)
        else:                                                  # flat start: A = O, chainwise
            ef, kinv, SA = upd
            Q = (L - 1) * SA
            q = ef.det * kinv + ef.o00 + ef.oee + 2.0 * ef.o0e
            QV = W * kinv
            g = V @ (((ef.o00 + ef.o0e) * ef.he - (ef.o0e + ef.oee) * ef.h0) / q)
            N = (V * (ef.det / q)) @ V.T
            Kt = (V * ((ef.o00 + ef.o0e) / q)) @ W.T
            C_ao = (W * (-kinv * (ef.o0e + ef.oee) / q)) @ W.T
        if not last:                    # the future, through the smoothed end (RTS identity)
            mf_e, Pf_e = self.end()
            c = linalg.cho_factor(Pf_e, lower=True, check_finite=False)
            r_e = linalg.cho_solve(c, ms_e - mf_e, check_finite=False)
            N_e = linalg.cho_solve(c, linalg.cho_solve(c, Pf_e - Ps_e, check_finite=False).T,
                                   check_finite=False)
            KN = Kt @ N_e
            g = g + Kt @ r_e
            N = N + KN @ Kt.T
            C_ao = C_ao - self.Pj[:nA, nA:] @ (KN.T @ Q)
        R = (L - 1) * (np.outer(g, g) - N)
        # the chains' bridges, in chain coordinates alpha_0 = V' x_a[O], delta = V' omega[O]
        Ed = QV.T @ g
        Vd = np.diag((L - 1) * d) - QV.T @ N @ QV
        C0d = V.T @ C_ao[np.ix_(op, op)] @ V
        eb, inv = st.basis, self.ef.inv
        lam = eb.lam[:, None]
        ha, hb = ((eb.a + eb.b) / eb.lam)[:, None], (eb.b / eb.lam)[:, None]
        Y = inv * (self.zeta - ha * mu0[None, :] - hb * Ed[None, :])
        Ia, Ib = inv * ha, inv * hb
        Aab = Ia.T @ (lam * Ib)
        Rb = (Y.T @ (lam * Y) + (Ia.T @ (lam * Ia)) * P00 + Aab * C0d + (Aab * C0d).T
              + (Ib.T @ (lam * Ib)) * Vd - np.diag(inv.sum(axis=0)))
        R[np.ix_(op, op)] += V @ Rb @ V.T
        return R


def segment_estep(plan: SegmentPlan, Sigma, H, h_parts=None, bounded: bool = False,
                  terms: bool = False) -> EStep:
    """Log-likelihood and EM moments at ``(Sigma, H)`` on the segment path (same result as
    :func:`panel.kalman.dense.dense_smoother`'s ``estep``, to rounding; beyond
    :data:`panel.kalman.impute.MAX_GROUPS` component sets the moments come collapsed under
    ``Sigma`` and ``H``: :func:`panel.kalman.impute.collapse`).

    ``bounded``: keep the forward pass's records (covariances, stretch solutions) only every
    ~sqrt(n / 4) of the n segments and recompute a block at a time for the backward pass
    (:mod:`panel.kalman.checkpoints`; the same numbers bit for bit, about one more forward pass).
    ``terms``: the premium innovations' groups also carry their score terms (stretches:
    :meth:`_StretchSolve.premium_terms`; steps between dates: the RTS identity of
    :func:`panel.kalman.dense._disturbance_terms`)."""
    Sigma = np.asarray(Sigma, dtype=float)
    H = np.asarray(H, dtype=float)
    Y, obs, s2, init = plan.Y, plan.obs, plan.s2, plan.init
    T, N = Y.shape
    step_for = _memo(lambda prev, observed: _FilterStep(prev, np.flatnonzero(observed), 0, Sigma,
                                                        H, init is not None), most=dense.steps_kept(N))

    def pencil(O):                  # one eigenproblem per observed set, shared by its stretches
        parts = None if h_parts is None else (h_parts[0][O], h_parts[1][O])
        d, V, W, logdet_v = simultaneous_diagonalisation(Sigma[np.ix_(O, O)], H[np.ix_(O, O)],
                                                         parts)
        return np.maximum(d, 0.0), V, W, logdet_v
    pencil_for = _memo(pencil, most=dense.steps_kept(N))   # recomputed alike: the same numbers
    scratch = np.empty((2, N))

    def forward(i0, i1, m, P, prev, loglik=0.0):
        """Records of segments i0..i1-1 from the filtered state ``(m, P)`` over ``prev`` before
        them; returns (records, state after them, ``loglik`` plus theirs)."""
        recs = []
        for kind, item in plan.segments[i0:i1]:
            if kind == "dense":
                t = item
                step = step_for(prev, obs[t])
                if t > 0:
                    P = P + step.Q
                mp, Pp = m, P
                m, P, ll = step.update(m, P, Y[t], s2[t], init, scratch[0], scratch[1])
                loglik += ll
                recs.append(("dense", t, prev, step.alive, mp, Pp, m, P))
                prev = step.alive
            else:
                st = item
                if st.a > 0:
                    P = P + Sigma[np.ix_(prev, prev)]
                mp, Pp = m, P
                prior = None
                if st.a > 0 or init is not None:
                    prior = _joined(m, P, prev, st.A, init)
                sol = _StretchSolve(st, Sigma, prior, pencil_for(st.O))
                loglik += sol.loglik
                recs.append(("stretch", sol, prev, st.A, mp, Pp))
                m, P = sol.end()
                prev = st.A
        return recs, (m, P, prev), loglik

    # ---- forward
    n_seg = len(plan.segments)
    state = (np.zeros(0), np.zeros((0, 0)), np.zeros(0, dtype=int))
    if bounded:
        keep = Recomputed(checkpoint_interval(n_seg), n_seg,
                          lambda i0, i1, m, P, prev: (forward(i0, i1, m, P, prev)[0],))
        loglik = 0.0
        for i0 in range(0, n_seg, keep.K):
            keep.starts.append(state)
            _, state, loglik = forward(i0, min(n_seg, i0 + keep.K), *state, loglik)
        recs = BlockView(keep, 0)
    else:
        recs, _, loglik = forward(0, n_seg, *state)
    # ---- backward
    acc_w, acc_e = _Moments(N, Sigma), _Moments(N, H)
    later = None                    # (smoothed, predicted) at the first date of the next segment
    for i in range(n_seg - 1, -1, -1):
        rec = recs[i]
        if rec[0] == "dense":
            _, t, before, alive, mp, Pp, mf, Pf = rec
            ms, Ps = (mf, Pf) if later is None else _rts(mf, Pf, alive, later, acc_w, terms)
            O = np.flatnonzero(obs[t])
            if O.size:
                po = np.searchsorted(alive, O)
                r = (Y[t, O] - ms[po]) / np.sqrt(s2[t])
                acc_e.add(O, 1, np.outer(r, r) + Ps[np.ix_(po, po)] / s2[t])
        else:
            _, sol, before, alive, mp, Pp = rec
            mf, Pf = sol.end()
            ms_e, Ps_e = (mf, Pf) if later is None else _rts(mf, Pf, alive, later, acc_w, terms)
            ms, Ps = sol.moments(ms_e, Ps_e, later is None, acc_w, acc_e, terms)
        later = (ms, Ps, mp, Pp, before, alive)
    return EStep(loglik, acc_w.groups(), acc_e.groups())


def _rts(mf, Pf, alive, later, acc_w: _Moments, terms: bool = False):
    """RTS step from the next segment's first date back to this segment's last date (assets
    ``alive``); adds the moment of that date's premium innovation (over ``alive``), with its score
    terms if ``terms``."""
    ms_n, Ps_n, mp_n, Pp_n, before, alive_n = later
    pos = np.searchsorted(alive_n, before)
    J = _solve_right_pd(Pf.T, Pp_n)
    ms_pos, Ps_pos = ms_n[pos], Ps_n[np.ix_(pos, pos)]
    ms = mf + J @ (ms_pos - mp_n)
    K = Ps_pos @ J.T
    Ps = _sym(Pf + J @ (K - Pf))
    dw = ms_pos - ms
    acc_w.add(alive, 1, np.outer(dw, dw) + Ps_pos + Ps - K - K.T,
              _disturbance_terms(Pp_n, ms_pos - mp_n, Ps_pos) if terms else None)
    return ms, Ps
