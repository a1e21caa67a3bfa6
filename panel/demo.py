"""The demo: an invented fund's sleeves, simulated from the model, run end to end.

Scenario ("Larkspur Bay Capital", entirely fictional): eight sleeves of a multi-asset fund with
monthly excess returns from 2000-01 to 2024-12.  Premia follow the model's local levels (one common
premium factor plus an own part per sleeve); return shocks share one market factor; a common
volatility level clusters (calm and stressed spells) and peaks in a spring-2020 style sell-off, in
which risky sleeves fall together and duration and gold rally.  Two sleeves enter late, one has a
six-month data outage, and after the sell-off the common premium steps up (compensation for risk
rises).  Premia of a few percent a year move by a point or two a year (premium volatility in the
convention of :mod:`panel.units`).  Because the true premia are known, the demo can say how close the
filtered premia come to them, against the practitioner's naive estimate (the expanding sample
mean), and how often the estimated 90% bands cover them.

Library code only (no printing): :func:`scenario` simulates, :func:`write_scenario` writes the CSV
files, :func:`run_demo` ingests, fits, stores the vintages and draws the plots, reporting progress
through a callback.  The command line prints the outcome.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd

from panel import units
from panel.data import Panel
from panel.model.spec import ModelSpec, Prior, VolScale

FUND = "Larkspur Bay Capital"
DATASET_NAME = "larkspur-sleeves"
RETURNS_FILE = "larkspur_sleeves.csv"
TRUTH_FILE = "larkspur_true_premia.csv"
SEED = 47


@dataclass(frozen=True)
class Sleeve:
    """One sleeve of the invented fund (annualised decimals)."""

    name: str
    premium: float        # starting premium, a year
    vol: float            # own return-shock volatility, a year
    market: float         # exposure to the common return shock (volatility a year)
    premium_loading: float  # loading on the common premium factor
    enters: str | None = None  # first month with data
    outage: tuple[str, str] | None = None  # months without data (inclusive)
    step_2020: float = 0.0     # premium step after the sell-off, a year


SLEEVES: tuple[Sleeve, ...] = (
    Sleeve("Nordic Equity", 0.055, 0.09, 0.15, 1.0, step_2020=0.015),
    Sleeve("Pacific Equity", 0.050, 0.10, 0.14, 0.9, step_2020=0.012),
    Sleeve("EM Local Bonds", 0.035, 0.08, 0.07, 0.6, outage=("2018-04-30", "2018-09-30"),
           step_2020=0.010),
    Sleeve("US Treasuries 7-10y", 0.012, 0.055, -0.025, -0.3),
    Sleeve("Gold", 0.020, 0.145, 0.01, 0.2),
    Sleeve("Carry FX", 0.030, 0.065, 0.06, 0.7, enters="2013-07-31", step_2020=0.008),
    Sleeve("Value Factor", 0.025, 0.09, 0.03, 0.3, enters="2016-01-31"),
    Sleeve("Infrastructure Credit", 0.030, 0.045, 0.05, 0.5, step_2020=0.006),
)

#: Sell-off month: the common return shock (in market-volatility units) and its volatility spike.
SELL_OFF = "2020-03-31"
SELL_OFF_SHOCK = -2.5
#: Premium volatilities (DESIGN.md section 5): the annualised premium moves by this much (1 sd) in a year.
COMMON_PREMIUM_VOL = 0.015   # the common premium factor (times each sleeve's loading)
OWN_PREMIUM_VOL = 0.012      # each sleeve's own part


@dataclass(frozen=True)
class Scenario:
    """Simulated sleeves: ``returns`` (decimal excess returns a month, NaN where a sleeve has no data)
    and ``premia`` (the true premia, decimal a month), both dates x sleeves; ``vol_level`` the common
    volatility multiplier per month."""

    returns: pd.DataFrame
    premia: pd.DataFrame
    vol_level: pd.Series
    seed: int


def scenario(seed: int = SEED, months: int = 300, end: str = "2024-12-31") -> Scenario:
    """Simulate the fund's sleeves (deterministic for a given ``seed``)."""
    rng = np.random.default_rng(seed)
    dates = pd.date_range(end=pd.Timestamp(end), periods=months, freq="ME", name="date")
    names = [s.name for s in SLEEVES]
    T, N = len(dates), len(SLEEVES)
    ppy = 12
    loadings = np.array([s.premium_loading for s in SLEEVES])
    # per-period premium random walks: increments of variance q = V^2 / ppy^3
    common = np.cumsum(rng.normal(0.0, np.sqrt(units.premium_variance(COMMON_PREMIUM_VOL, ppy)), T))
    own = np.cumsum(rng.normal(0.0, np.sqrt(units.premium_variance(OWN_PREMIUM_VOL, ppy)), (T, N)), axis=0)
    after = (dates > pd.Timestamp(SELL_OFF))[:, None]
    step = np.array([s.step_2020 for s in SLEEVES])[None, :] * after
    start = np.array([s.premium for s in SLEEVES])[None, :]
    premia = (start + step) / ppy + loadings[None, :] * common[:, None] + own

    # Volatility clustering: a log-AR(1) common level with a spike at the sell-off.
    log_level = np.zeros(T)
    for t in range(1, T):
        log_level[t] = 0.85 * log_level[t - 1] + rng.normal(0.0, 0.18)
    spike = dates.get_loc(pd.Timestamp(SELL_OFF))
    log_level[spike:spike + 4] += np.log(1.6) * 0.6 ** np.arange(min(4, T - spike))
    level = np.exp(log_level - np.mean(log_level))

    market = rng.normal(0.0, 1.0, T)
    market[spike] = SELL_OFF_SHOCK
    beta = np.array([s.market for s in SLEEVES]) / np.sqrt(ppy)
    idio = rng.normal(0.0, 1.0, (T, N)) * (np.array([s.vol for s in SLEEVES]) / np.sqrt(ppy))
    shocks = level[:, None] * (market[:, None] * beta[None, :] + idio)
    returns = premia + shocks

    mask = np.zeros((T, N), bool)
    for j, s in enumerate(SLEEVES):
        if s.enters is not None:
            mask[:, j] |= dates < pd.Timestamp(s.enters)
        if s.outage is not None:
            mask[:, j] |= (dates >= pd.Timestamp(s.outage[0])) & (dates <= pd.Timestamp(s.outage[1]))
    returns = np.where(mask, np.nan, returns)
    premia = np.where(mask.cumsum(axis=0) == np.arange(1, T + 1)[:, None], np.nan, premia)  # before entry
    return Scenario(returns=pd.DataFrame(returns, index=dates, columns=names),
                    premia=pd.DataFrame(premia, index=dates, columns=names),
                    vol_level=pd.Series(level, index=dates, name="vol_level"), seed=seed)


def write_scenario(scn: Scenario, folder) -> tuple[Path, Path]:
    """Write the returns (percent a month, 4 decimals, wide, empty = no data) and the true premia
    (annualised percent) as CSV files in ``folder``; returns both paths."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    returns_path, truth_path = folder / RETURNS_FILE, folder / TRUTH_FILE
    frame = (scn.returns * 100).round(4)
    frame.index = frame.index.strftime("%Y-%m-%d")
    frame.index.name = "month_end"
    frame.to_csv(returns_path, float_format="%.4f")
    truth = (scn.premia * 12 * 100).round(4)
    truth.index = truth.index.strftime("%Y-%m-%d")
    truth.index.name = "month_end"
    truth.to_csv(truth_path, float_format="%.4f")
    return returns_path, truth_path


def demo_spec() -> ModelSpec:
    """The model the demo fits: one common premium factor, a one-factor return shock, a volatility
    scale from an EWMA of squared returns (half-life 6 months) and a prior on the premium
    innovations (premium volatility 1.5% a year, worth 120 pseudo-months) that keeps their
    volatilities off zero and the premia from chasing recent returns."""
    return ModelSpec(premium_factors=1, return_shocks="factor", return_factors=1,
                     vol_scale=VolScale("ewma", half_life=6.0),
                     premium_prior=Prior(vol=0.015, weight=120.0), tol=1e-8, param_tol=1e-4,
                     acceleration="squarem")


def vintage_dates(panel: Panel, count: int = 4, step: int = 12) -> list[pd.Timestamp]:
    """``count`` cut-offs ``step`` periods apart before the panel's last date, plus the last date
    (the newest vintage uses all the data)."""
    last = len(panel.dates) - 1
    picks = [last - step * i for i in range(count, -1, -1)]
    return [panel.dates[i] for i in picks if i > 24]


Progress = Callable[[str, int, int], None]


@dataclass
class DemoOutcome:
    """What the demo did: files written, the dataset stored, the vintage run ids and cut-offs
    (oldest first; the last uses all the data), the newest vintage re-evaluated (a ``PanelFit``),
    the plot files, accuracy against the true premia (:func:`accuracy`), and seconds taken."""

    folder: Path
    returns_file: Path
    truth_file: Path
    dataset_hash: str
    run_ids: list[int]
    as_of: list[pd.Timestamp]
    fit: object
    plots: list[Path]
    accuracy: dict[str, float]
    seconds: float
    truth: pd.DataFrame | None = None
    panel_warnings: tuple[str, ...] = ()


#: Months of each sleeve left out of the accuracy figures: at first both the filter and the sample
#: mean rest on a handful of returns (a month's return is +-15 points annualised x 12).
BURN_IN = 12


def accuracy(estimates: pd.DataFrame, truth: pd.DataFrame, returns: pd.DataFrame, ppy: int = 12,
             burn_in: int = BURN_IN, z: float = 1.6448536269514722) -> dict[str, float]:
    """How well the estimates track the simulated truth, over sleeve-months after each sleeve's
    first ``burn_in`` returns: root mean squared error (annualised decimals) of the filtered premium
    and of the expanding sample mean of the returns (the naive real-time estimate), and the share of
    true premia inside the 90% filtered and smoothed bands."""
    naive = returns.expanding().mean().where(returns.notna().cumsum() > burn_in)
    long = pd.DataFrame({"true": truth.stack(), "naive": naive.stack()}).dropna().reset_index()
    long.columns = ["date", "asset", "true", "naive"]
    merged = estimates.assign(date=pd.to_datetime(estimates["date"])).merge(long, on=["date", "asset"])
    out = {"sleeve_months": float(len(merged))}
    out["rmse_filtered"] = float(np.sqrt(np.mean((merged["filtered_mean"] - merged["true"]) ** 2))) * ppy
    out["rmse_sample_mean"] = float(np.sqrt(np.mean((merged["naive"] - merged["true"]) ** 2))) * ppy
    for kind in ("filtered", "smoothed"):
        inside = (merged["true"] - merged[f"{kind}_mean"]).abs() <= z * merged[f"{kind}_std"]
        out[f"coverage_{kind}"] = float(inside.mean())
    return out


#: Sleeves drawn in the demo's premium-path chart, and the one followed across vintages.
PATH_SLEEVES = ("Nordic Equity", "EM Local Bonds", "US Treasuries 7-10y", "Value Factor")
VINTAGE_SLEEVE = "Nordic Equity"


def run_demo(store, folder, *, seed: int = SEED, vintages: int = 4,
             progress: Progress | None = None) -> DemoOutcome:
    """Write the scenario to ``folder``, ingest it into ``store`` (open read-write), backfill
    ``vintages`` yearly cut-offs plus the full sample (each stored as a run with its ``as_of``,
    warm-started from the previous one), and draw the plots into ``folder``.

    ``progress(step, done, total)`` is called as the work advances.
    """
    from panel import plots
    from panel.vintages.backfill import backfill
    from panel.ingest import read_panel
    from panel.vintages.reproduce import evaluated_run
    from panel.store import run_tables, write_dataset

    t0 = time.perf_counter()
    say = progress or (lambda step, done, total: None)
    folder = Path(folder)
    scn = scenario(seed)
    returns_path, truth_path = write_scenario(scn, folder)
    panel = read_panel(returns_path, units="percent", date_col="month_end", min_obs=24)
    digest = write_dataset(store, panel, DATASET_NAME)
    cutoffs = vintage_dates(panel, vintages)
    total = len(cutoffs) + 2

    def relay(event):
        if event.as_of is not None:
            say(f"vintage {event.as_of.date()}", 1 + event.done + event.skipped, total)

    say("ingested", 1, total)
    report = backfill(store, digest, demo_spec(), start=cutoffs[0], end=cutoffs[-1], every=12,
                      chain=len(cutoffs), label="demo", workers=1, progress=relay)
    from panel.store import list_runs

    runs = list_runs(store, digest)
    runs = runs[(runs["kind"] == "backfill") & (runs["backfill_key"] == report.key)]
    runs = runs.sort_values(["as_of", "id"]).drop_duplicates("as_of", keep="last")
    run_ids = [int(i) for i in runs["id"]]
    as_of = [pd.Timestamp(d) for d in runs["as_of"]]
    final = evaluated_run(store, run_ids[-1])
    ppy = final.periods_per_year
    files = []
    fig = plots.premium_paths(final.estimates, PATH_SLEEVES, ppy, as_of=final.dates[-1],
                              title=f"{FUND}: premium paths", reference=scn.premia,
                              reference_label="true premium (simulated)",
                              last_return=final.panel.last_returns())
    files.append(plots.save(fig, folder / "premium_paths.png"))
    cs = final.cross_section(final.dates[-1], "filtered")
    fig = plots.cross_section_chart(cs.table(), ppy, date=cs.date, kind="filtered",
                                    as_of=final.dates[-1], title=f"{FUND}: cross-section")
    files.append(plots.save(fig, folder / "cross_section.png"))
    target = as_of[0]
    history = plots.vintage_frame([(d, run_tables(store, i)["estimates"]) for d, i in zip(as_of, run_ids)],
                                  VINTAGE_SLEEVE, target)
    fig = plots.vintage_chart(history, VINTAGE_SLEEVE, target, ppy,
                              title=f"{FUND}: how the estimate moved",
                              reference=float(scn.premia.loc[target, VINTAGE_SLEEVE]),
                              reference_label="true premium (simulated)")
    files.append(plots.save(fig, folder / "vintages.png"))
    say("plots", total, total)
    return DemoOutcome(folder=folder, returns_file=returns_path, truth_file=truth_path,
                       dataset_hash=digest, run_ids=run_ids, as_of=as_of, fit=final, plots=files,
                       accuracy=accuracy(final.estimates, scn.premia, scn.returns, ppy),
                       seconds=time.perf_counter() - t0,
                       truth=scn.premia, panel_warnings=panel.warnings)
