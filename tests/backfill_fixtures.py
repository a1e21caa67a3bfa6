"""Invented data for the backfill tests: four sleeves of a fictional endowment, the Quillmoor
Harbour Foundation, simulated from the premium model with a fixed seed (decimal monthly excess
returns), and the small settings the tests fit with."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from panel.data import Panel
from panel.model.spec import ModelSpec
from panel.store import open_store, write_dataset

SLEEVES = ("harbour_equity", "coastal_credit", "tidal_rates", "lighthouse_gold")
NAME = "quillmoor"
#: Small, fast settings: no standard errors, at most 200 EM iterations.
SPEC = ModelSpec(std_errors="never", max_iter=200)


def quillmoor_panel(n_dates: int = 72, seed: int = 20240917, late_sleeve: str | None = None,
                    enters_at: int | None = None) -> Panel:
    """Monthly excess returns: premia = one common random-walk factor plus own random walks, return
    shocks = one market shock plus own noise.  ``late_sleeve`` (a fifth sleeve) has data only from
    date index ``enters_at`` on."""
    rng = np.random.default_rng(seed)
    names = list(SLEEVES) + ([late_sleeve] if late_sleeve else [])
    n = len(names)
    loadings = np.array([1.0, 0.8, 0.5, 0.3, 0.6])[:n] * 0.0010
    factor = np.cumsum(rng.normal(0.0, 1.0, n_dates))
    own = np.cumsum(rng.normal(0.0, 0.0006, (n_dates, n)), axis=0)
    premia = 0.004 + np.outer(factor, loadings) + own
    market = np.outer(rng.normal(0.0, 1.0, n_dates), np.array([0.030, 0.018, -0.006, 0.008, 0.012])[:n])
    values = premia + market + rng.normal(0.0, 0.02, (n_dates, n))
    if late_sleeve:
        values[:enters_at, -1] = np.nan
    dates = pd.date_range("2018-01-31", periods=n_dates, freq="ME")
    return Panel.from_frame(pd.DataFrame(values, index=dates, columns=names), "M",
                            meta={"source_file": "quillmoor_sleeves.csv"})


@pytest.fixture
def sleeves_store(backend):
    """A fresh store of the test's backend holding the Quillmoor panel as dataset ``quillmoor``."""
    panel = quillmoor_panel()
    with open_store(backend.location("quillmoor")) as store:
        write_dataset(store, panel, NAME)
        yield store, panel
