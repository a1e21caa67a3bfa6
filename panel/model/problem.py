"""One fit's problem: the panel's arrays, the resolved spec, priors and the E-step plan, prepared once
and shared by the estimator (:mod:`panel.model.fit`), inference and reporting (cross-sections).
"""

from __future__ import annotations

import copy

import numpy as np
import pandas as pd

from panel import units
from panel.data import Panel
from panel.kalman import paths
from panel.model import mstep as ms
from panel.model.params import Packer, Params
from panel.model.spec import ModelSpec, ResolvedSpec, SpecError
from panel.model.start import volatility_scale
from panel.threads import blas_limited


def as_panel(data) -> Panel:
    if isinstance(data, Panel):
        return data
    if isinstance(data, pd.DataFrame):
        return Panel.from_frame(data)
    raise TypeError("fit() takes a panel.data.Panel or a dates x assets DataFrame")


class Problem:
    """Arrays and settings shared by the EM loop, inference and reporting of one fit."""

    def __init__(self, panel: Panel, spec: ModelSpec):
        self.panel = panel
        self.spec = spec
        self.Y = panel.values.to_numpy(dtype=float)
        T, N = self.Y.shape
        if N == 0 or T == 0:
            raise SpecError("the panel is empty")
        if np.isnan(self.Y).all(axis=0).any():
            bad = [a for a, e in zip(panel.assets, np.isnan(self.Y).all(axis=0)) if e]
            raise SpecError(f"assets with no observation: {', '.join(bad)}; drop them")
        self.rs: ResolvedSpec = spec.resolve(N, panel.periods_per_year, T, panel.assets)
        ppy = self.rs.ppy
        self.s2 = volatility_scale(self.Y, spec.vol_scale)
        ip = spec.initial_premium
        self.init = None if ip is None else (ip.mean / ppy, (ip.vol / ppy) ** 2)
        # before any O(N^2) allocation: the packer's index arrays alone grow with N^2
        _check_memory(self.Y, spec.method, self.s2, self.init)
        self.packer = Packer(self.rs, N)
        self.sigma_prior = self._prior(spec.premium_prior, spec.premium_variance)
        self.h_prior = self._prior(spec.return_prior, units.return_variance)
        self.n_obs = int((~np.isnan(self.Y)).sum())
        self.plan = paths.Plan(self.Y, self.s2, self.init, spec.method, self._terms())

    def _prior(self, prior, to_variance):
        if prior is None:
            return ms.PriorTerms()
        return ms.PriorTerms(weight=prior.weight, v=to_variance(prior.vol, self.rs.ppy))

    def estep(self, p: Params, scored: bool = True):
        """The E-step at ``p``; ``scored=False`` for one whose score is not taken (an EM step's:
        :meth:`panel.kalman.paths.Plan.estep`)."""
        return self.plan.estep(p.Sigma, p.H, h_parts=_h_parts(p), scored=scored)

    def em_estep(self, p: Params):
        """:meth:`estep` for an EM step (``scored=False``)."""
        return self.estep(p, scored=False)

    def estep_with_means(self, p: Params):
        """(E-step, smoothed premia (T, N)) at ``p`` (:meth:`panel.kalman.paths.Plan.estep_with_means`)."""
        return self.plan.estep_with_means(p.Sigma, p.H, h_parts=_h_parts(p))

    def with_data(self, Y: np.ndarray) -> "Problem":
        """This problem on other returns ``Y`` of the same shape (a gap-filled copy): the same spec,
        priors, packer and volatility scale, its own E-step plan."""
        other = copy.copy(self)
        other.Y = np.asarray(Y, dtype=float)
        other.plan = paths.Plan(other.Y, self.s2, self.init, self.spec.method, self._terms())
        return other

    def _terms(self) -> bool:
        """Whether the E-steps form the disturbance smoother's score terms (``score_form``)."""
        return self.spec.score_form == "disturbance"

    def objective(self, e, p: Params) -> float:
        return e.loglik + ms.log_prior(p, self.sigma_prior, self.h_prior)

    def score(self, theta, like: Params) -> np.ndarray:
        p = self.packer.unpack(theta, like)
        return ms.expected_complete_loglik_grad(self.estep(p), p, self.rs, self.packer,
                                                self.sigma_prior, self.h_prior)


def _h_parts(p: Params):
    """``(B, psi)`` of a diagonal or factor H (the cheaper exact eigenproblem), else None."""
    if p.psi is None:
        return None
    return (np.zeros((p.n_assets, 0)) if p.B is None else p.B, p.psi)


def available_memory() -> float | None:
    """Bytes of memory available to this process now (Linux ``MemAvailable``), or None if unknown."""
    try:
        with open("/proc/meminfo", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return float(line.split()[1]) * 1024.0
    except OSError:
        return None
    return None


def _check_memory(Y: np.ndarray, method: str, s2, init) -> None:
    """Refuse, before any allocation, a panel whose fit would not fit in memory (by the E-step
    path ``method`` would take: :func:`panel.kalman.paths.memory_estimate`)."""
    need, have = paths.memory_estimate(Y, method, s2, init), available_memory()
    if have is not None and need > 0.8 * have:
        T, N = Y.shape
        raise SpecError(f"a fit of {N} assets x {T} dates needs about {need / 1e9:.1f} GB of memory and "
                        f"{have / 1e9:.1f} GB are available; fit fewer assets (the cost grows with the "
                        "square of their number) or on a larger machine")


@blas_limited
def covariance_at(panel: Panel, spec: ModelSpec, params: Params, t: int, kind: str):
    """(mean, cov, active mask) of the premia at date index ``t`` at parameters ``params``: one pass
    that forms the moments of that date only where the path allows (the final stretch)."""
    out = Problem(panel, spec).plan.report(params.Sigma, params.H, cov_at=(t,), only_cov=True)
    mean = out.filtered_mean[t] if kind == "filtered" else out.smoothed_mean[t]
    active = ~np.isnan(mean)
    return mean[active], out.covariances[t][kind][np.ix_(active, active)], active


@blas_limited
def mixture_at(panel: Panel, spec: ModelSpec, draws: list, t: int, kind: str):
    """(mean, cov, active mask, (P(mu > 0), P(mu_i > mu_j), q05, q95)) of the premia at date index ``t``:
    the equal-weight mixture of their joint ``kind`` distributions at the parameter ``draws``
    (a Bayesian run's summary draws; :func:`panel.bayes.summary.pairwise_at`)."""
    from panel.bayes.summary import cross_section_mixture

    plan = Problem(panel, spec).plan
    mean, cov, pos, greater, q05, q95 = cross_section_mixture(plan, draws, t, kind)
    active = ~np.isnan(mean)
    sub = np.ix_(active, active)
    return mean[active], cov[sub], active, (pos[active], greater[sub], q05[active], q95[active])
