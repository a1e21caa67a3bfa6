"""Choice of E-step path.  Every path returns the same :class:`panel.kalman.types.EStep` (to
rounding); the dense path is the reference.

Methods
-------
dense     the reference filter/smoother over the active assets, O(T (k+N)^3), any pattern.
stretch   dense up to the panel's final stretch (the last dates with one observed set and no
          entry), decoupled scalar chains on it (:mod:`panel.kalman.stretch`); any pattern.
segments  every long run of dates with one observed set decoupled, dense steps elsewhere, joined
          by a forward filter and RTS smoother over the segments (:mod:`panel.kalman.segments`);
          any pattern.  E-step only: reports take the stretch path.
balanced  the stretch path when the whole panel is one stretch (fully balanced); refuses others.
auto      the cheapest of dense, stretch and segments by :func:`estimated_cost`.
"""

from __future__ import annotations

import numpy as np

from panel.kalman import segments
from panel.kalman.checkpoints import checkpoint_interval
from panel.kalman.dense import dense_smoother, first_observations, steps_kept
from panel.kalman.impute import MAX_GROUPS, collapse
from panel.kalman.stretch import StretchData, final_stretch_start, stretch_smoother
from panel.kalman.types import EStep, Smoothed

METHODS = ("auto", "dense", "stretch", "segments", "balanced")

# Rough per-date costs in flops-equivalents: a dense step does ~10 (k+n)^3 of small LAPACK calls
# plus Python overhead; a decoupled date costs O(n^2) plus its share of the transforms.
_DENSE_OVERHEAD = 2e5
_DENSE_CUBE = 10.0
_STRETCH_OVERHEAD = 5e5     # eigenproblems, transforms and the coupling solve, per E-step
KEEP_ALL_BYTES = 2 ** 29    # a dense pass (E-step or report) keeps every date's covariances (16 T
                            # (k+N)^2 bytes) up to this; beyond, it recomputes them in blocks
                            # (dense_smoother's bounded, panel.kalman.checkpoints; the same numbers).
                            # 2 ** 28 bounded the N = 200, T = 1,200 staircase's 384 MB: E-steps
                            # 1.5x (EM) and 1.26x (scored) slower for 228 MB of peak against 427


def estimated_cost(Y, method: str, scale_varies: bool = False, init=None) -> float:
    """Estimated cost of one E-step of ``method`` ("dense", "stretch" or "segments") on ``Y``
    (T, N)."""
    Y = np.asarray(Y, dtype=float)
    T, N = Y.shape
    entry = first_observations(Y)
    n_active = (entry[None, :] <= np.arange(T)[:, None]).sum(axis=1)

    def dense_cost(dates):
        return float(np.sum(_DENSE_OVERHEAD + _DENSE_CUBE * n_active[dates].astype(float) ** 3))

    if method == "dense":
        return dense_cost(slice(None))
    if method == "segments":
        return segments.layout_cost(segments.layout(Y, init), n_active)
    a = final_stretch_start(Y)
    if a >= T:
        return dense_cost(slice(None))
    L, n = T - a, int(n_active[-1])
    basis = L * L * n if scale_varies else 10.0 * L * n * np.log2(max(L, 2))
    return (dense_cost(slice(0, a)) + _STRETCH_OVERHEAD + 20.0 * n ** 3 + 6.0 * L * n * n
            + 3.0 * basis)


def choose(Y, method: str, scale2=None, init=None) -> str:
    """Resolve ``method`` to "dense", "stretch" or "segments" for the panel ``Y``."""
    if method not in METHODS:
        raise ValueError(f"method must be one of {', '.join(METHODS)}, got {method!r}")
    if method == "balanced":
        if final_stretch_start(np.asarray(Y, dtype=float)) != 0:
            raise ValueError("method='balanced' needs a fully balanced panel (every asset observed "
                             "at every date); use 'stretch' or 'auto'")
        return "stretch"
    if method != "auto":
        return method
    if final_stretch_start(np.asarray(Y, dtype=float)) == 0:
        return "stretch"       # balanced: one spectral stretch, the best measured and the most tested
    varies = scale2 is not None and not np.all(np.asarray(scale2) == np.asarray(scale2)[0])
    costs = {m: estimated_cost(Y, m, varies, init) for m in ("dense", "stretch", "segments")}
    return min(costs, key=costs.get)


def estep_cost(Y, method: str = "auto", scale2=None, init=None) -> float:
    """Estimated cost of one E-step on ``Y`` (T, N) by the path :func:`choose` resolves ``method``
    to (the units of :func:`estimated_cost`)."""
    varies = scale2 is not None and not np.all(np.asarray(scale2) == np.asarray(scale2)[0])
    return estimated_cost(Y, choose(Y, method, scale2, init), varies, init)


def keeps_all_bytes(dates: int, n: int) -> float:
    """Bytes of the filtered and predicted (n, n) covariances of ``dates`` dense dates."""
    return 16.0 * dates * n * n


def dense_kept_bytes(dates: int, n: int) -> float:
    """Bytes of (n, n) covariances a dense pass over ``dates`` dates holds at its peak: all of
    them up to KEEP_ALL_BYTES; beyond, the checkpoints and the two recomputed blocks of
    :mod:`panel.kalman.checkpoints` (about 4 sqrt(dates) matrices)."""
    if keeps_all_bytes(dates, n) <= KEEP_ALL_BYTES:
        return keeps_all_bytes(dates, n)
    K = checkpoint_interval(dates)
    return 8.0 * (-(-dates // K) + 4 * K) * n * n


def memory_estimate(Y, method: str = "auto", scale2=None, init=None) -> float:
    """Rough peak bytes of the arrays of a fit on ``Y`` (T, N) by ``method`` (resolved as
    :func:`choose` does; the interpreter and libraries, ~170 MB, not counted):

    * per-date covariances, the larger of the E-steps' and the final report's: a dense pass over
      the dense path's T dates, or the stretch path's dates before its final stretch, holds
      :func:`dense_kept_bytes` (O(T N^2) up to KEEP_ALL_BYTES, O(sqrt(T) N^2) beyond); the segment
      path's E-step likewise for its forward records
      (:func:`panel.kalman.segments.dense_equivalent` dates; its report takes the stretch path);
    * the dense filter steps kept for reuse (:func:`panel.kalman.dense.steps_kept`, two N x N
      blocks each);
    * the EM moment sums: three N x N per observed set up to ``impute.MAX_GROUPS``;
    * about 30 N x N work arrays (eigenproblems, M-step, start values) and ~20 (T, N) arrays
      (data, report, estimates table).  An E-step result holds O(N^2).

    Measured (N = 500, T = 1,200, 2% isolated gaps, dense path): estimate 0.59 GB, a 3-iteration
    fit's peak RSS 0.74 GB including the interpreter."""
    Y = np.asarray(Y, dtype=float)
    T, N = Y.shape
    path = choose(Y, method, scale2, init)
    a = min(final_stretch_start(Y), T)
    dense_dates = T if path == "dense" else a
    kept = dense_kept_bytes(dense_dates, N)
    if path == "segments":
        segs = segments.layout(Y, init)
        kept = max(kept, dense_kept_bytes(segments.dense_equivalent(segs), N))
        dense_dates = max(a, sum(seg[0] == "dense" for seg in segs))
    sets = np.unique(np.packbits(~np.isnan(Y), axis=1), axis=0).shape[0]
    mats = 2.0 * min(dense_dates, steps_kept(N)) + 3.0 * (min(sets, MAX_GROUPS) - 1) + 30.0
    return kept + 8.0 * (mats * N * N + 20.0 * T * N)


class Plan:
    """The E-step of one panel, prepared once: the path chosen and the parameter-free transforms
    of the data done (for the stretch path, the final stretch's basis and data coordinates).

    ``Y`` (T, N) decimal returns with NaN; ``scale2`` (T,) squared volatility scale or None;
    ``init`` the informative initial premium ``(mean, var)`` or None; ``terms``: the E-steps'
    moment groups also carry the disturbance smoother's score terms where the path forms them
    (every path's premium innovations; the shocks on the stretch path's final stretch).
    A fit calls :meth:`estep` hundreds of times on the same panel.
    """

    def __init__(self, Y, scale2=None, init=None, method: str = "auto", terms: bool = False):
        self.terms = terms
        self.Y = np.asarray(Y, dtype=float)
        T = self.Y.shape[0]
        self.s2 = np.ones(T) if scale2 is None else np.asarray(scale2, dtype=float)
        self.init = init
        self.method = choose(self.Y, method, scale2, init)
        self.data = self.segments = None
        if self.method == "segments":
            self.segments = segments.SegmentPlan(self.Y, self.s2, init)
        if self.method != "dense":
            a = final_stretch_start(self.Y)
            if a < T:
                self.data = StretchData(self.Y, self.s2, a)

    def estep(self, Sigma, H, h_parts=None, scored: bool = True) -> EStep:
        """Log-likelihood and EM moments at ``(Sigma, H)``; ``h_parts = (B, psi)`` when
        ``H = B B' + diag(psi)`` (a cheaper exact eigenproblem on the stretch path).
        ``scored=False``: an E-step whose score is not taken (an EM step's): the terms are formed
        only where the moments are built from them (the stretch path's final stretch), so the
        log-likelihood and moments are those of ``scored=True`` bit for bit, for up to a third less
        on ragged panels.

        Beyond :data:`panel.kalman.impute.MAX_GROUPS` observed sets, the moments come as one group
        imputed under ``Sigma`` (premium innovations) and ``H`` (return shocks), so the result holds
        O(N^2) whatever the gap pattern: use it with these same parameters (as the M-step and the
        score do)."""
        return _collapsed(self._estep(Sigma, H, h_parts, scored), Sigma, H)

    def estep_with_means(self, Sigma, H, h_parts=None) -> tuple[EStep, np.ndarray]:
        """:meth:`estep` and the smoothed premia (T, N) (NaN before an asset's first observation)
        at the same parameters: one pass on the dense and stretch paths, an E-step and a report on
        the segment path (it has no report of its own)."""
        if self.segments is not None:
            return self.estep(Sigma, H, h_parts), self.report(Sigma, H).smoothed_mean
        if self.data is None:
            out = dense_smoother(self.Y, Sigma, H, self.s2, init=self.init, want_estep=True,
                                 bounded=self._bounded(self.Y.shape[0]), terms=self.terms)
        else:
            out = stretch_smoother(self.Y, Sigma, H, self.s2, init=self.init, want_estep=True,
                                   data=self.data, h_parts=h_parts, bounded=self._bounded(self.data.a),
                                   terms=self.terms)
        return _collapsed(out.estep, Sigma, H), out.smoothed_mean

    def _estep(self, Sigma, H, h_parts, scored: bool = True) -> EStep:
        terms = self.terms and scored
        if self.segments is not None:
            try:
                return segments.segment_estep(
                    self.segments, Sigma, H, h_parts=h_parts,
                    bounded=self._bounded(segments.dense_equivalent(self.segments.segments)),
                    terms=terms)
            except np.linalg.LinAlgError:   # singular Sigma_OO with dormant assets: dense copes
                return self._dense_estep(Sigma, H, terms)
        if self.data is None:
            return self._dense_estep(Sigma, H, terms)
        return stretch_smoother(self.Y, Sigma, H, self.s2, init=self.init, want_report=False,
                                data=self.data, h_parts=h_parts, bounded=self._bounded(self.data.a),
                                terms=self.terms, head_terms=terms).estep

    def _bounded(self, dense_dates: int, k: int = 0) -> bool:
        """Recompute the dense dates' covariances rather than keep them all (KEEP_ALL_BYTES);
        ``k`` common factors carried in the state (a report with loadings)."""
        return keeps_all_bytes(dense_dates, self.Y.shape[1] + k) > KEEP_ALL_BYTES

    def _dense_estep(self, Sigma, H, terms: bool) -> EStep:
        return dense_smoother(self.Y, Sigma, H, self.s2, init=self.init, want_estep=True,
                              bounded=self._bounded(self.Y.shape[0]), terms=terms).estep

    def report(self, Sigma, H, Lambda=None, cov_at=(), only_cov=False,
               bounded: bool | None = None) -> Smoothed:
        """Per-date filtered/smoothed/predicted moments (factor paths when ``Lambda`` is given),
        without EM moments; ``only_cov``: the final stretch's moments at ``cov_at`` only (the
        other dates of the stretch are NaN; the dense path computes every date anyway).
        ``bounded``: recompute the dense dates' covariances in blocks rather than keep them all
        (the same numbers; None: beyond KEEP_ALL_BYTES, as the E-step does)."""
        dense_dates = self.Y.shape[0] if self.data is None else self.data.a
        if bounded is None:
            bounded = self._bounded(dense_dates, 0 if Lambda is None else Lambda.shape[1])
        if self.data is None:
            return dense_smoother(self.Y, Sigma, H, self.s2, init=self.init, Lambda=Lambda,
                                  cov_at=cov_at, want_estep=False, bounded=bounded)
        return stretch_smoother(self.Y, Sigma, H, self.s2, init=self.init, Lambda=Lambda,
                                cov_at=cov_at, want_estep=False, data=self.data, only_cov=only_cov,
                                bounded=bounded)


def _collapsed(est: EStep, Sigma, H) -> EStep:
    """``est`` with its moment groups collapsed beyond MAX_GROUPS (imputed under Sigma and H)."""
    return EStep(est.loglik, collapse(est.w_groups, np.asarray(Sigma, dtype=float)),
                 collapse(est.e_groups, np.asarray(H, dtype=float)))


def estep(Y, Sigma, H, scale2, init, method: str = "auto") -> EStep:
    """Log-likelihood and EM moments at ``(Sigma, H)`` (one-off; a fit reuses a :class:`Plan`)."""
    return Plan(Y, scale2, init, method).estep(Sigma, H)


def report(Y, Sigma, H, scale2, init, Lambda=None, cov_at=(), method: str = "auto") -> Smoothed:
    """Per-date moments as a :class:`panel.kalman.types.Smoothed`, without EM moments (one-off)."""
    return Plan(Y, scale2, init, method).report(Sigma, H, Lambda=Lambda, cov_at=cov_at)
