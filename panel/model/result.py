"""Immutable results: :class:`PanelFit` (a fitted or evaluated model) and :class:`CrossSection`.

Every number is in per-period decimal units (annualising is for presentation).  A ``PanelFit`` holds
its data (``panel``) explicitly, so cross-sections at any date can be recomputed without storing an
N x N covariance for every date.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy.special import ndtr  # the normal cdf, without importing scipy.stats

from panel.data import Panel
from panel.model.params import Params
from panel.model.spec import ModelSpec


@dataclass(frozen=True, eq=False, repr=False)
class CrossSection:
    """Joint posterior of all premia at one date.

    ``mean`` (n,) and ``cov`` (n, n) over ``assets`` (those active at the date), per period;
    ``prob_positive[i] = P(mu_i > 0)``; ``prob_greater.loc[i, j] = P(mu_i > mu_j)``.  A Bayesian
    run's posterior at a date is a mixture of normals (one per parameter draw): ``mean`` and ``cov``
    are the mixture's moments and ``mixture`` holds its probabilities and quantiles
    ``(prob_positive (n,), prob_greater (n, n), q05 (n,), q95 (n,))``: the properties then return
    those instead of the normal ones, and :meth:`table` adds ``q05`` and ``q95``.
    ``last_return`` (n,): each asset's last return on or before ``date``; where it is earlier (an
    asset that has left, or whose latest return is late or missing) its premium at ``date`` is the
    model's prediction from then, not an estimate from a return at that date.
    """

    date: pd.Timestamp
    kind: str
    assets: tuple[str, ...]
    mean: np.ndarray
    cov: np.ndarray
    mixture: tuple | None = None
    last_return: tuple = ()

    def __repr__(self) -> str:
        return (f"<CrossSection {self.kind} at {self.date.date()}, {len(self.assets)} assets; "
                ".table() for the ranked premia>")

    @property
    def std(self) -> np.ndarray:
        return np.sqrt(np.diag(self.cov))

    @property
    def prob_positive(self) -> np.ndarray:
        if self.mixture is not None:
            return self.mixture[0]
        return ndtr(self.mean / self.std)

    @property
    def prob_greater(self) -> pd.DataFrame:
        if self.mixture is not None:
            return pd.DataFrame(self.mixture[1], index=list(self.assets), columns=list(self.assets))
        d = self.mean[:, None] - self.mean[None, :]
        v = np.diag(self.cov)[:, None] + np.diag(self.cov)[None, :] - 2.0 * self.cov
        with np.errstate(divide="ignore", invalid="ignore"):
            z = d / np.sqrt(np.maximum(v, 0.0))
        out = ndtr(z)
        np.fill_diagonal(out, np.nan)
        return pd.DataFrame(out, index=list(self.assets), columns=list(self.assets))

    def table(self) -> pd.DataFrame:
        """One row per asset: mean, std, P(mu > 0) (a mixture: and its 5% and 95% quantiles), the
        date of its last return on or before the cross-section's, ranked by mean (highest first)."""
        frame = pd.DataFrame({"asset": self.assets, "mean": self.mean, "std": self.std,
                              "prob_positive": self.prob_positive})
        if self.last_return:
            frame["last_return"] = pd.DatetimeIndex(self.last_return)
        if self.mixture is not None:
            frame["q05"], frame["q95"] = self.mixture[2], self.mixture[3]
        return frame.sort_values("mean", ascending=False, kind="stable").reset_index(drop=True)


#: Caption of a premia table in which :func:`asset_labels` marked an asset.
STALE_NOTE = ("'to DATE' marks an asset's last return before the table's date (it has left, or its "
              "latest returns are late or missing): its premium since then is the model's "
              "prediction, not an estimate from newer returns.")


def stale(ranked: pd.DataFrame, when) -> np.ndarray:
    """Per row of ``ranked`` (:meth:`CrossSection.table`): its last return precedes ``when``."""
    if "last_return" not in ranked:
        return np.zeros(len(ranked), bool)
    return (ranked["last_return"] < pd.Timestamp(when)).to_numpy()


def asset_labels(ranked: pd.DataFrame, when) -> list[str]:
    """The assets of ``ranked`` (:meth:`CrossSection.table`) as a premia table at ``when`` names
    them: "(to DATE)" after each whose last return precedes ``when``."""
    if "last_return" not in ranked:
        return list(ranked["asset"])
    return [f"{a} (to {pd.Timestamp(last).date()})" if m else a
            for a, last, m in zip(ranked["asset"], ranked["last_return"], stale(ranked, when))]


def cross_section_at(panel: Panel, spec: ModelSpec, params, date, kind: str = "smoothed") -> CrossSection:
    """Joint posterior of the premia at the last date on or before ``date`` (``kind`` filtered or
    smoothed) at parameters ``params`` -- a fit's, or a stored run's without re-running its report.
    ``params`` a list of Params (a Bayesian run's summary draws): the equal-weight mixture over them."""
    from panel.model.problem import covariance_at, mixture_at  # the plan is built only when asked

    if kind not in ("filtered", "smoothed"):
        raise ValueError(f"kind must be 'filtered' or 'smoothed', got {kind!r}")
    date = pd.Timestamp(date)
    t = int(panel.dates.searchsorted(date, side="right") - 1)
    if t < 0:
        raise ValueError(f"date {date.date()} is before the first date {panel.dates[0].date()}")
    if isinstance(params, (list, tuple)):
        mean, cov, active, mixture = mixture_at(panel, spec, params, t, kind)
    else:
        (mean, cov, active), mixture = covariance_at(panel, spec, params, t, kind), None
    seen = panel.values.iloc[: t + 1].notna().to_numpy()[:, active]
    last = panel.dates[t - np.argmax(seen[::-1], axis=0)]     # active: seen at or before t
    return CrossSection(date=panel.dates[t], kind=kind, assets=tuple(np.array(panel.assets)[active]),
                        mean=mean, cov=cov, mixture=mixture, last_return=tuple(last))


@dataclass(frozen=True, eq=False, repr=False)
class PanelFit:
    """A fitted (or, with status ``fixed``, evaluated) premium panel.  See DEVELOPERS.md for the
    columns of the long tables.

    Fitted attributes: ``params``, ``loglik``, ``objective`` (log-likelihood plus log prior),
    ``n_params``, ``aic``, ``bic``, ``n_iter`` (E-steps), ``converged``, ``status``, ``message``,
    ``elapsed``; tables ``estimates``, ``factors``, ``parameters``, ``trace``, ``diagnostics``.
    Settings: ``spec`` and ``start`` (warm-start parameters or None); data: ``panel``.  A Bayesian
    run (``spec.estimation == "bayes"``, :mod:`panel.bayes.estimate`) has status ``mixed`` or ``not
    mixed``, quantile columns in ``estimates``/``factors``/``parameters`` and its
    :class:`panel.bayes.BayesResult` in ``posterior`` (None for ML).
    People read ``summary()`` (text; HTML in a notebook), ``annualised_estimates()`` and
    ``annualised_parameters()`` (% a year, :mod:`panel.model.summary`).
    """

    panel: Panel
    spec: ModelSpec
    start: Params | None
    params: Params
    k: int
    structure: str
    periods_per_year: int
    loglik: float
    objective: float
    n_params: int
    n_obs: int
    n_iter: int
    converged: bool
    status: str
    message: str
    elapsed: float
    estimates: pd.DataFrame
    factors: pd.DataFrame
    parameters: pd.DataFrame
    trace: pd.DataFrame
    diagnostics: pd.DataFrame
    posterior: object | None = None

    @property
    def assets(self) -> tuple[str, ...]:
        return self.panel.assets

    @property
    def dates(self) -> pd.DatetimeIndex:
        return self.panel.dates

    @property
    def aic(self) -> float:
        return -2.0 * self.loglik + 2.0 * self.n_params

    @property
    def bic(self) -> float:
        return -2.0 * self.loglik + self.n_params * np.log(self.n_obs)

    def settings(self) -> dict:
        """Everything needed to rebuild this run from its dataset (JSON-able); a Bayesian run adds
        the seed its sampler used (derived from the spec's seed and the as-of date)."""
        out = {"spec": self.spec.to_dict(),
               "start": None if self.start is None else self.start.to_dict(),
               "dataset_hash": self.panel.hash,
               "as_of": str(self.dates[-1].date())}
        if self.posterior is not None:
            out["sampler_seed"] = int(self.posterior.settings["seed"])
        return out

    def tables(self) -> dict[str, pd.DataFrame]:
        """The result tables the store records (a Bayesian run adds its summary draws)."""
        out = {"estimates": self.estimates, "factor_paths": self.factors,
               "parameters": self.parameters, "em_trace": self.trace,
               "diagnostics": self.diagnostics}
        if self.posterior is not None:
            out["posterior_draws"] = self.posterior.draw_rows()
        return out

    def summary(self) -> str:
        """Data, model, status, fit statistics and the latest premia (% a year), in a few lines."""
        from panel.model.summary import summary_text

        return summary_text(self)

    def _repr_html_(self) -> str:
        from panel.model.summary import summary_html

        return summary_html(self)

    def __repr__(self) -> str:
        from panel.model.summary import short_repr

        return short_repr(self)

    def annualised_estimates(self) -> pd.DataFrame:
        """``estimates`` with premia and stds in % a year (columns ``*_pct_a_year``; ``attrs``)."""
        from panel.model.summary import annualised_estimates

        return annualised_estimates(self)

    def annualised_parameters(self) -> pd.DataFrame:
        """Per asset: loadings, own and total premium volatility, return-shock volatility, % a year."""
        from panel.model.summary import annualised_parameters

        return annualised_parameters(self)

    def cross_section(self, date, kind: str = "smoothed") -> CrossSection:
        """Joint posterior of the premia at ``date`` (``kind`` filtered or smoothed); for a Bayesian
        run the mixture over its summary draws."""
        params = self.params if self.posterior is None else self.posterior.summary_params()
        return cross_section_at(self.panel, self.spec, params, date, kind)
