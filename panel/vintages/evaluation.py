"""What the stored vintages of a backfill say: revisions and out-of-sample evaluation.

Workflow library: no printing, no SQL (the named queries ``revision_path``, ``revision_summary`` and
``oos_forecasts`` do the reading).  The module is not called ``panel/evaluate.py`` because importing
a submodule of that name would replace the package's ``panel.evaluate`` function (the
known-parameters filter) with the module.

Out-of-sample evaluation
------------------------
Each vintage with cut-off ``as_of`` forecasts the next period's excess return by its filtered premium
at ``as_of`` (a real-time forecast: data and parameters up to ``as_of``).  The benchmark is the
expanding historical mean of the asset's returns up to ``as_of``.  With ``r`` the realized return,
``m`` the model forecast and ``b`` the benchmark:

- out-of-sample R² (Campbell & Thompson 2008, Review of Financial Studies 21(4)):
  ``R2_OS = 1 - sum (r - m)^2 / sum (r - b)^2`` -- positive when the model's forecasts beat the
  historical mean in mean squared error;
- Clark & West (2007, Journal of Econometrics 138(1)) MSPE-adjusted test:
  ``f = (r - b)^2 - [(r - m)^2 - (b - m)^2]``, regressed on a constant; the one-sided t-statistic
  of the mean (H0: equal MSPE, H1: the model is better) with a p-value from the standard normal.
  Standard errors: ``plain`` (OLS) or ``newey-west`` (Bartlett kernel, ``lags``; no small-sample
  correction).

Per asset, and pooled over assets: the pooled R² sums squared errors over every asset and date; the
pooled test averages ``f`` over all (asset, date) pairs with standard errors that allow for
correlation across assets at a date -- clustered by target date (``plain``), or Driscoll-Kraay
(Newey-West over the per-date sums, ``newey-west``).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import stats

from panel.vintages.backfill import BackfillInfo
from panel.vintages.errors import BackfillError
from panel.vintages.inputs import parse_date
from panel.store import Store, load_panel, run_query

SE_KINDS = ("plain", "newey-west")
#: Fewest forecasts for which the Clark-West p-value (a normal approximation) is reported as usable:
#: 30 is common practice for a t-statistic's normal limit, not a derived threshold.  Fewer are
#: flagged (``enough`` False) and the command line warns.
MIN_FORECASTS = 30
STAT_COLUMNS = ("n", "first_target", "last_target", "mean_forecast", "mean_benchmark", "mean_realized",
                "mspe_model", "mspe_benchmark", "r2_os", "cw_mean", "cw_se", "cw_t", "cw_pvalue", "enough")


# ---------------------------------------------------------------------------------------------
# the statistics (arrays in, numbers out)

def oos_r2(realized, model, benchmark) -> float:
    """Campbell-Thompson out-of-sample R²: ``1 - sum (r - m)^2 / sum (r - b)^2``."""
    r, m, b = (np.asarray(x, dtype=float) for x in (realized, model, benchmark))
    denominator = float(np.sum((r - b) ** 2))
    if r.size == 0 or denominator == 0.0:
        return math.nan
    return 1.0 - float(np.sum((r - m) ** 2)) / denominator


def clark_west_terms(realized, model, benchmark) -> np.ndarray:
    """``f_t = (r - b)^2 - [(r - m)^2 - (b - m)^2]`` (Clark & West 2007, MSPE-adjusted)."""
    r, m, b = (np.asarray(x, dtype=float) for x in (realized, model, benchmark))
    return (r - b) ** 2 - ((r - m) ** 2 - (b - m) ** 2)


def default_lags(n: int) -> int:
    """Newey-West lags by the common rule ``floor(4 (n / 100)^(2/9))``."""
    return int(math.floor(4.0 * (max(n, 1) / 100.0) ** (2.0 / 9.0)))


def _bartlett_long_run(u: np.ndarray, lags: int) -> float:
    """``sum_t u_t^2 + 2 sum_{l=1..L} (1 - l/(L+1)) sum_t u_t u_{t-l}`` (not divided by n)."""
    total = float(u @ u)
    for lag in range(1, min(lags, u.size - 1) + 1):
        total += 2.0 * (1.0 - lag / (lags + 1.0)) * float(u[lag:] @ u[:-lag])
    return total


@dataclass(frozen=True)
class CWTest:
    """Clark-West test: mean of ``f``, its standard error, t = mean / se, one-sided p = 1 - Phi(t)."""

    n: int
    mean: float
    se: float
    t: float
    pvalue: float
    se_kind: str
    lags: int


def clark_west(realized, model, benchmark, *, se: str = "plain", lags: int | None = None,
               groups=None) -> CWTest:
    """Clark-West MSPE-adjusted test of the model against the benchmark (see the module notes).

    ``groups`` (one label per observation, sortable: the target dates) pools several assets: the
    standard error then sums ``f - mean`` within each group first (clustered by group for ``plain``,
    Driscoll-Kraay over the sorted groups for ``newey-west``).  Without groups, observations are in
    time order.  ``lags`` (Newey-West only): None uses :func:`default_lags` of the number of periods.
    """
    if se not in SE_KINDS:
        raise ValueError(f"se must be one of {', '.join(SE_KINDS)}, got {se!r}")
    f = clark_west_terms(realized, model, benchmark)
    n = f.size
    if n < 2:
        return CWTest(n, float(f.mean()) if n else math.nan, math.nan, math.nan, math.nan, se, 0)
    mean = float(f.mean())
    u = f - mean
    if groups is not None:
        codes, _ = pd.factorize(pd.Series(groups), sort=True)
        u = np.bincount(codes, weights=u)
    periods = u.size
    if se == "newey-west":
        lag = default_lags(periods) if lags is None else int(lags)
        if lag < 0:
            raise ValueError(f"lags must be >= 0, got {lags}")
        variance = _bartlett_long_run(u, lag) / n ** 2
    else:
        lag = 0
        variance = float(u @ u) / n ** 2 if groups is not None else float(u @ u) / (n - 1) / n
    std = math.sqrt(variance) if variance > 0 else math.nan
    t = mean / std if std > 0 else math.nan
    return CWTest(n, mean, std, t, float(stats.norm.sf(t)) if np.isfinite(t) else math.nan, se, lag)


# ---------------------------------------------------------------------------------------------
# evaluating a stored backfill

@dataclass(frozen=True, eq=False)
class Evaluation:
    """Out-of-sample evaluation of one backfill's vintages.

    ``table``: one row per asset (columns :data:`STAT_COLUMNS`; per-period decimal units, MSPE in
    squared per-period returns); ``pooled``: the same over all assets; ``forecasts``: the forecast
    pairs used (asset, as_of, run_id, target_date, forecast, benchmark, realized); ``pending``: the
    vintages whose target return is not observed (yet).
    """

    dataset_hash: str
    key: str | None
    se: str
    lags: int | None
    table: pd.DataFrame
    pooled: dict
    forecasts: pd.DataFrame
    pending: int


def forecast_pairs(store: Store, dataset: str, key: str | None) -> pd.DataFrame:
    """The real-time forecasts of the backfill with ``key`` (None: every run of the dataset) from the
    named query ``oos_forecasts``."""
    frame = run_query(store, "oos_forecasts", {"dataset": dataset, "key": key})
    for column in ("as_of", "origin_date", "target_date"):
        frame[column] = pd.to_datetime(frame[column])
    for column in ("forecast", "premium_std", "benchmark", "realized"):
        frame[column] = pd.to_numeric(frame[column], errors="coerce").astype(float)
    return frame


def _row(frame: pd.DataFrame, se: str, lags: int | None, pooled: bool) -> dict:
    r, m, b = (frame[c].to_numpy(dtype=float) for c in ("realized", "forecast", "benchmark"))
    test = clark_west(r, m, b, se=se, lags=lags, groups=frame["target_date"].to_numpy() if pooled else None)
    return {"n": len(frame), "first_target": frame["target_date"].min(), "last_target": frame["target_date"].max(),
            "mean_forecast": float(m.mean()), "mean_benchmark": float(b.mean()), "mean_realized": float(r.mean()),
            "mspe_model": float(np.mean((r - m) ** 2)), "mspe_benchmark": float(np.mean((r - b) ** 2)),
            "r2_os": oos_r2(r, m, b), "cw_mean": test.mean, "cw_se": test.se, "cw_t": test.t,
            "cw_pvalue": test.pvalue, "enough": len(frame) >= MIN_FORECASTS}


def evaluate_forecasts(forecasts: pd.DataFrame, *, se: str = "plain", lags: int | None = None):
    """(per-asset table, pooled dict) from forecast pairs with columns ``asset, target_date,
    forecast, benchmark, realized`` (rows without a realized return are left out)."""
    if se not in SE_KINDS:
        raise BackfillError(f"--se must be one of {', '.join(SE_KINDS)}, got {se!r}")
    if lags is not None and lags < 0:
        raise BackfillError(f"lags must be >= 0, got {lags}")
    usable = forecasts.dropna(subset=["realized", "forecast", "benchmark"])
    usable = usable.sort_values(["asset", "target_date"], kind="stable")
    rows = []
    for asset, frame in usable.groupby("asset", sort=True):
        rows.append({"asset": asset, **_row(frame, se, lags, pooled=False)})
    table = pd.DataFrame(rows, columns=["asset", *STAT_COLUMNS])
    pooled = _row(usable, se, lags, pooled=True) if len(usable) else {}
    return table, pooled


def evaluate_backfill(store: Store, backfill: BackfillInfo, *, se: str = "plain",
                      lags: int | None = None) -> Evaluation:
    """Out-of-sample evaluation of a stored backfill (from :func:`panel.vintages.backfill.find_backfill`)."""
    forecasts = forecast_pairs(store, backfill.dataset_hash, backfill.key)
    observed = forecasts["realized"].notna()
    if not observed.any():
        raise BackfillError("no vintage has a realized return after its cut-off yet (each forecast's "
                            "target date is missing or beyond the data); backfill earlier cut-offs")
    table, pooled = evaluate_forecasts(forecasts, se=se, lags=lags)
    return Evaluation(dataset_hash=backfill.dataset_hash, key=backfill.key, se=se, lags=lags, table=table,
                      pooled=pooled, pending=int((~observed).sum()),
                      forecasts=forecasts[["asset", "as_of", "run_id", "target_date", "forecast", "benchmark",
                                           "realized"]])


# ---------------------------------------------------------------------------------------------
# revisions

@dataclass(frozen=True, eq=False)
class Revisions:
    """How the premium of ``asset`` at ``date`` moved across a backfill's vintages.

    ``path``: one row per vintage covering the date (named query ``revision_path``); ``summary``: per
    asset mean absolute revision (named query ``revision_summary``).  Per-period decimal units.
    """

    dataset_hash: str
    key: str | None
    asset: str
    date: pd.Timestamp
    path: pd.DataFrame
    summary: pd.DataFrame
    skip: int = 0

    @property
    def first_release(self) -> tuple[pd.Timestamp, float]:
        """(as_of, filtered mean) of the first vintage covering the date."""
        row = self.path.iloc[0]
        return pd.Timestamp(row["as_of"]), float(row["filtered_mean"])

    @property
    def latest(self) -> tuple[pd.Timestamp, float]:
        """(as_of, smoothed mean) of the newest vintage."""
        row = self.path.iloc[-1]
        return pd.Timestamp(row["as_of"]), float(row["smoothed_mean"])

    @property
    def total_revision(self) -> float:
        return self.latest[1] - self.first_release[1]


def revisions(store: Store, backfill: BackfillInfo, asset: str, date, skip: int = 0) -> Revisions:
    """The revision path of ``asset`` at ``date`` and the per-asset revision summary of a backfill,
    leaving out each asset's first ``skip`` dates (a burn-in) from the summary."""
    if skip < 0:
        raise BackfillError(f"skip must be >= 0 dates, got {skip}")
    day = parse_date(date, "date")
    params = {"dataset": backfill.dataset_hash, "key": backfill.key}
    path = run_query(store, "revision_path", {**params, "asset": str(asset), "date": str(day.date())})
    if path.empty:
        panel = load_panel(store, backfill.dataset_hash)
        if str(asset) not in panel.assets:
            raise BackfillError(f"no asset {asset!r} in the dataset; its assets: {', '.join(panel.assets)}")
        if day not in panel.dates:
            raise BackfillError(f"{day.date()} is not a date of the dataset (it runs from "
                                f"{panel.dates[0].date()} to {panel.dates[-1].date()}, {panel.frequency})")
        raise BackfillError(f"no vintage covers {asset} at {day.date()} (the backfill's cut-offs run from "
                            f"{backfill.first_as_of.date()} to {backfill.last_as_of.date()}); pick a date "
                            f"up to {backfill.last_as_of.date()} where {asset} has data")
    path["as_of"] = pd.to_datetime(path["as_of"])
    summary = run_query(store, "revision_summary", {**params, "skip": int(skip)})
    return Revisions(dataset_hash=backfill.dataset_hash, key=backfill.key, asset=str(asset), date=day,
                     path=path, summary=summary, skip=int(skip))
