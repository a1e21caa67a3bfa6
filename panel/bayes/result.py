"""The immutable result of a Bayesian run: :class:`BayesResult`.

Per-period decimal units throughout (annualised columns say so); the long tables follow
:class:`panel.model.result.PanelFit`'s layout, with quantile columns added.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from panel.bayes import summary as sm
from panel.kalman.paths import Plan
from panel.model import inference
from panel.model.params import Params

#: Parameter rows stored per summary draw: enough to rebuild each draw's Params.
DRAW_NAMES = ("loading", "idio_premium_var", "return_loading", "return_idio_var", "return_cov")


def draw_params(draws: dict, structure: str, chain: int, draw: int) -> Params:
    """The parameter draw ``(chain, draw)`` of ``draws`` (name -> (chains, draws, ...)) as Params."""
    lam, q = draws["Lambda"][chain, draw], draws["q"][chain, draw]
    if structure == "full":
        return Params.build(lam, q, "full", H=draws["H"][chain, draw])
    B = draws["B"][chain, draw] if structure == "factor" else None
    return Params.build(lam, q, structure, B=B, psi=draws["psi"][chain, draw])


@dataclass(frozen=True, eq=False)
class BayesResult:
    """Posterior of the premium panel from a Gibbs run.

    assets, dates, periods_per_year, k, r, structure : the model.
    priors : the user-facing priors (:meth:`panel.bayes.priors.Priors.to_dict`);
    priors_resolved : their per-period values for this panel.
    settings : JSON-able run settings (draws, chains, warmup, seed, constraints, paths, ...).
    status : "mixed" | "not mixed" (:func:`panel.bayes.diagnostics.mixing_status`); message.
    elapsed : seconds; timings : seconds per stage (sampling, summary, diagnostics).
    draws : name -> (chains, draws, ...) read-only arrays: ``Lambda`` (N, k) and ``B`` (N, r) in
        the identified rotation, ``q``, ``psi`` (N,) or ``H`` (N, N), ``premium_last`` (N,).
    estimates : ``date, asset, filtered_mean, filtered_std, smoothed_mean, smoothed_std,
        predictive_mean, predictive_std, std_innovation, filtered_q05, filtered_q95, smoothed_q05,
        smoothed_q95`` from each asset's first observation on.
    factors : ``date, factor, filtered_mean, filtered_std, smoothed_mean, smoothed_std,
        filtered_q05, filtered_q95, smoothed_q05, smoothed_q95``.
    parameters : :func:`panel.bayes.diagnostics.parameter_table`.
    prob_positive_filtered, prob_positive_smoothed : (T, N) ``P(mu_t > 0)``.
    summary_draws : (M, 2) (chain, draw) of the parameter draws the summaries mix over.
    """

    assets: tuple
    dates: pd.Index
    periods_per_year: int
    k: int
    r: int
    structure: str
    priors: dict
    priors_resolved: dict
    settings: dict
    status: str
    message: str
    elapsed: float
    timings: dict
    draws: dict
    estimates: pd.DataFrame
    factors: pd.DataFrame
    parameters: pd.DataFrame
    prob_positive_filtered: np.ndarray
    prob_positive_smoothed: np.ndarray
    summary_draws: np.ndarray
    Y: np.ndarray
    scale2: np.ndarray
    init: tuple | None

    def __post_init__(self):
        for name in ("prob_positive_filtered", "prob_positive_smoothed", "summary_draws", "Y",
                     "scale2"):
            getattr(self, name).setflags(write=False)
        for arr in self.draws.values():
            arr.setflags(write=False)

    @property
    def mixed(self) -> bool:
        return self.status == "mixed"

    def params_at(self, chain: int, draw: int) -> Params:
        """The parameter draw ``(chain, draw)`` as :class:`Params` (identified rotation)."""
        return draw_params(self.draws, self.structure, chain, draw)

    def summary_params(self) -> list[Params]:
        return [self.params_at(int(c), int(j)) for c, j in self.summary_draws]

    def draw_rows(self) -> pd.DataFrame:
        """The summary draws' parameters as long rows ``draw, name, row, col, value`` (per period;
        :data:`DRAW_NAMES` only, ``return_cov`` only for a full H): what the store keeps so that a
        stored run's cross-sections mix over the same draws (``panel.bayes.estimate.draws_from_rows``
        reads them back)."""
        rows = inference.parameter_rows(list(self.assets), self.k, self.r, self.structure)
        keep = np.array([n in DRAW_NAMES and (n != "return_cov" or self.structure == "full")
                         for n, _, _ in rows])
        labels = pd.DataFrame(rows, columns=["name", "row", "col"])[keep]
        frames = []
        for j, p in enumerate(self.summary_params()):
            frame = labels.copy()
            frame.insert(0, "draw", j)
            frame["value"] = inference.parameter_vector(p, self.structure)[keep]
            frames.append(frame)
        return pd.concat(frames, ignore_index=True)

    def prob_positive(self, kind: str = "filtered") -> pd.DataFrame:
        """``P(mu_t > 0)`` (dates x assets), ``kind`` "filtered" or "smoothed"."""
        arr = self.prob_positive_filtered if kind == "filtered" else self.prob_positive_smoothed
        return pd.DataFrame(arr, index=self.dates, columns=list(self.assets))

    def prob_greater(self, date, kind: str = "filtered") -> pd.DataFrame:
        """``P(mu_i > mu_j)`` at ``date`` (assets x assets; NaN on the diagonal and for assets not
        yet active), mixed over the summary draws' joint ``kind`` distributions at that date."""
        t = self._date_index(date)
        plan = Plan(self.Y, self.scale2, self.init, self.settings["method"])
        _, G = sm.pairwise_at(plan, self.summary_params(), t, kind)
        return pd.DataFrame(G, index=list(self.assets), columns=list(self.assets))

    def _date_index(self, date) -> int:
        if isinstance(date, (int, np.integer)):
            return int(date) % len(self.dates)
        return int(self.dates.get_loc(pd.Timestamp(date) if isinstance(self.dates, pd.DatetimeIndex)
                                      else date))

    def to_inference_data(self):
        """The draws as an ArviZ ``InferenceData`` (posterior group; dims named by asset and
        factor; the priors and settings as JSON attributes).  ``.to_netcdf(path)`` writes it."""
        import json

        from panel.bayes.diagnostics import arviz

        az = arviz()

        assets = list(self.assets)
        dims = {"Lambda": ["asset", "factor"], "q": ["asset"], "psi": ["asset"],
                "B": ["asset", "return_factor"], "H": ["asset", "asset_col"],
                "premium_last": ["asset"]}
        coords = {"asset": assets, "asset_col": assets,
                  "factor": [f"f{j + 1}" for j in range(self.k)],
                  "return_factor": [f"g{j + 1}" for j in range(self.r)]}
        attrs = {"priors": json.dumps(self.priors), "settings": json.dumps(self.settings),
                 "periods_per_year": self.periods_per_year, "structure": self.structure,
                 "status": self.status}
        return az.from_dict(posterior={k: np.asarray(v) for k, v in self.draws.items()},
                            coords=coords, dims={k: dims[k] for k in self.draws},
                            attrs=attrs)
