"""Invented data for the store tests: the sleeves of a fictional fund, the Larkspur Mutual Pension
Plan, and result tables shaped like a PanelFit's (values invented, deterministic)."""

from __future__ import annotations

import numpy as np
import pandas as pd

from panel.data import Panel

SLEEVES = ["domestic_equity", "overseas_equity", "emerging_equity", "sovereign_bonds",
           "credit", "real_estate", "commodities", "macro_overlay"]


def sleeves_panel(n_dates: int = 48, seed: int = 11, sleeves: list[str] | None = None) -> Panel:
    """Monthly excess returns (decimal per month) with gaps: a late-starting sleeve, scattered
    missing cells, and one month where every sleeve is missing."""
    sleeves = list(SLEEVES if sleeves is None else sleeves)
    rng = np.random.default_rng(seed)
    dates = pd.date_range("2016-01-31", periods=n_dates, freq="ME")
    values = rng.normal(0.004, 0.03, size=(n_dates, len(sleeves)))
    values[rng.random(values.shape) < 0.05] = np.nan
    values[: n_dates // 4, -1] = np.nan          # macro_overlay starts late
    values[n_dates // 2, :] = np.nan              # a month with no data at all
    values[3, 0] = -0.0                           # signed zero must survive
    frame = pd.DataFrame(values, index=dates, columns=sleeves)
    return Panel.from_frame(frame, "M", meta={"source_file": "larkspur_sleeves.csv", "layout": "wide",
                                              "units": "percent", "options": {"skip_rows": 2}},
                            warnings=("1 month with no observation",))


def result_tables(panel: Panel, as_of=None, seed: int = 3, k: int = 2) -> dict[str, pd.DataFrame]:
    """PanelFit-shaped tables for ``panel`` cut at ``as_of``: estimates from each sleeve's first
    observation to the cut-off, k factor paths, parameters, an EM trace and diagnostics."""
    rng = np.random.default_rng(seed)
    cut = panel.cut(as_of) if as_of is not None else panel
    values = cut.values
    rows = []
    for asset in values.columns:
        first = values[asset].first_valid_index()
        dates = values.index[values.index >= first]
        n = len(dates)
        level = 0.004 + np.cumsum(rng.normal(0, 0.0005, n))
        obs = values.loc[dates, asset].to_numpy()
        rows.append(pd.DataFrame({
            "date": dates, "asset": asset,
            "filtered_mean": level, "filtered_std": np.full(n, 0.002),
            "smoothed_mean": level + 0.0003, "smoothed_std": np.full(n, 0.0015),
            "predictive_mean": np.r_[0.004, level[:-1]], "predictive_std": np.full(n, 0.031),
            "std_innovation": np.where(np.isnan(obs), np.nan, rng.normal(0, 1, n)),
        }))
    estimates = pd.concat(rows, ignore_index=True)
    factor_rows = [pd.DataFrame({"date": values.index, "factor": f,
                                 "filtered_mean": rng.normal(0, 0.001, len(values)),
                                 "filtered_std": 0.001, "smoothed_mean": rng.normal(0, 0.001, len(values)),
                                 "smoothed_std": 0.0008}) for f in range(1, k + 1)]
    factors = pd.concat(factor_rows, ignore_index=True)
    assets = list(values.columns)
    params = [("loading", a, f"f{j + 1}", float(rng.normal(0, 0.001)), float(abs(rng.normal(0, 1e-4))))
              for a in assets for j in range(k)]
    params += [("idio_premium_var", a, None, float(abs(rng.normal(1e-6, 1e-7))), np.nan) for a in assets]
    params += [("return_cov", a, b, 0.0009 if a == b else 0.0002, np.nan) for a in assets for b in assets]
    parameters = pd.DataFrame(params, columns=["name", "row", "col", "value", "std_error"])
    n_iter = 12
    loglik = -500 + np.cumsum(np.r_[0.0, 40 / np.arange(1, n_iter)])
    trace = pd.DataFrame({"iteration": np.arange(1, n_iter + 1), "objective": -loglik, "loglik": loglik,
                          "elapsed_s": np.linspace(0.01, 0.3, n_iter),
                          "step": ["em"] * (n_iter - 1) + ["accelerated"]})
    diagnostics = pd.DataFrame({"asset": assets, "statistic": "ljung_box", "lags": 6,
                                "value": rng.uniform(1, 12, len(assets)),
                                "pvalue": rng.uniform(0, 1, len(assets))})
    return {"estimates": estimates, "factors": factors, "parameters": parameters, "trace": trace,
            "diagnostics": diagnostics}


def run_record(dataset_hash: str, as_of, **fields) -> dict:
    """A finished run's ``runs`` fields; ``fields`` override."""
    record = {"dataset_hash": dataset_hash, "as_of": as_of, "kind": "backfill", "label": "larkspur monthly",
              "settings": {"k": 2, "max_iter": 200, "tol": 1e-8, "as_of": str(pd.Timestamp(as_of).date())},
              "status": "converged", "loglik": -480.5, "aic": 1001.0, "bic": 1040.2, "n_params": 20,
              "iterations": 12, "converged": True, "message": "tolerance reached",
              "started_utc": pd.Timestamp("2024-03-01 09:00:00"), "duration_s": 1.25}
    record.update(fields)
    return record


def big_estimates(n_rows: int, n_assets: int = 500, seed: int = 0) -> pd.DataFrame:
    """An estimates table of about ``n_rows`` rows (n_assets sleeves x monthly dates)."""
    rng = np.random.default_rng(seed)
    n_dates = max(1, n_rows // n_assets)
    dates = pd.date_range("1900-01-31", periods=n_dates, freq="ME")
    n = n_dates * n_assets
    frame = pd.DataFrame({"date": np.repeat(dates.values, n_assets),
                          "asset": np.tile(np.array([f"sleeve_{i:04d}" for i in range(n_assets)], dtype=object), n_dates)})
    for name in ("filtered_mean", "filtered_std", "smoothed_mean", "smoothed_std", "predictive_mean",
                 "predictive_std", "std_innovation"):
        frame[name] = rng.normal(size=n)
    return frame


# ---------------------------------------------------------------------------------------------
# pytest fixtures (import them into a test module to use them)

import pytest  # noqa: E402

from panel.store import open_store, write_dataset, write_run  # noqa: E402

VINTAGES = ["2018-06-30", "2018-12-31", "2019-06-30", "2019-12-31"]


@pytest.fixture
def store(backend):
    """A fresh read-write store of the test's backend (a file in tmp_path, or a new database)."""
    with open_store(backend.location("larkspur")) as opened:
        yield opened


@pytest.fixture
def filled(store):
    """The store with the Larkspur panel and one backfill run per vintage (plus a failed run)."""
    panel = sleeves_panel()
    digest = write_dataset(store, panel, "larkspur")
    ids = {}
    for i, as_of in enumerate(VINTAGES):
        ids[as_of] = write_run(store, run_record(digest, as_of, parent_run=ids.get(VINTAGES[i - 1]) if i else None),
                               result_tables(panel, as_of, seed=i))
    failed = write_run(store, run_record(digest, VINTAGES[-1], status="failed", converged=False,
                                         message="did not start"), {})
    return store, panel, digest, ids, failed
