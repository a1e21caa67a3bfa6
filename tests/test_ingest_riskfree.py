"""Risk-free plausibility rules (panel/ingest/riskfree.py): one small hand-made bad input per rule,
the good cases (slightly negative rates, percent beside percent), and the risk-free column of the
Fama-French data shipped with linearmodels."""

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from panel.ingest import IngestError, read_panel

# Invented returns: 36 months, two assets, decimal per month (about 4% a month volatility).
DATES = pd.date_range("2015-01-31", periods=36, freq="ME")
RETURNS = pd.DataFrame(np.random.default_rng(7).normal(0.006, 0.04, (36, 2)), index=DATES,
                       columns=["Nordic Equity", "Gold Sleeve"])


def _with_column(tmp_path: Path, rate, scale: float = 1.0) -> Path:
    """Total returns (x ``scale``) with a risk-free column ``RF`` = ``rate``."""
    frame = RETURNS * scale
    frame["RF"] = rate
    path = tmp_path / "total.csv"
    frame.rename_axis("date").to_csv(path)
    return path


def _refused(path: Path, **options) -> str:
    with pytest.raises(IngestError) as caught:
        read_panel(path, total_returns=True, **{"risk_free": "RF", **options})
    message = str(caught.value)
    assert "\n" not in message
    return message


def _rf_warnings(panel) -> list[str]:
    return [w for w in panel.warnings if "risk-free" in w]


# (rate in the file, returns scale, units, substrings of the refusal, the likeliest reading first)
LEVEL_CASES = [
    # An annual rate in percent (5.25% a year) beside monthly decimal returns.
    (5.25, 1.0, None, ["median 5.25 per month", "6300% a year",
                       "they look like an annual rate in percent (5.25% a year: divide by 1200)"]),
    # An annual decimal rate: ~0.0044 a month was meant; 0.0525 a month sustained is implausible.
    (0.0525, 1.0, None, ["63% a year", "they look like an annual rate (5.25% a year: divide by 12) "
                                       "or a rate in percent beside decimal returns"]),
    # A monthly rate in percent (0.44% a month) beside decimal returns.
    (0.44, 1.0, None, ["528% a year", "they look like a rate in percent beside decimal returns "
                                      "(5.28% a year: divide by 100)"]),
    # An annual percent rate beside monthly percent returns.
    (5.25, 100.0, "percent", ["read as percent like the returns", "63% a year",
                              "they look like an annual rate (5.25% a year: divide by 12)"]),
]


@pytest.mark.parametrize("rate, scale, units, parts", LEVEL_CASES)
def test_misquoted_rates_are_refused_naming_the_likely_mistake(tmp_path, rate, scale, units, parts):
    message = _refused(_with_column(tmp_path, rate, scale), units=units)
    assert message.startswith("total.csv: risk-free rates in column 'RF' look too large for "
                              "monthly returns")
    for part in parts + ["give simple per-month rates", "allow_extreme=True"]:
        assert part in message, (part, message)


def test_quarterly_returns_with_an_annual_rate(tmp_path):
    frame = RETURNS.iloc[:12].set_axis(pd.date_range("2015-03-31", periods=12, freq="QE"))
    frame["RF"] = 0.06  # 6% a year given per quarter: 24% a year
    frame.rename_axis("date").to_csv(tmp_path / "total.csv")
    message = _refused(tmp_path / "total.csv", min_obs=3)
    assert "24% a year" in message and "an annual rate (6% a year: divide by 4)" in message


def test_allow_extreme_accepts_high_rates_with_a_warning(tmp_path):
    panel = read_panel(_with_column(tmp_path, 0.03), total_returns=True, risk_free="RF",
                       allow_extreme=True)
    (note,) = _rf_warnings(panel)
    assert "36% a year" in note and "accepted because allow_extreme=True" in note


def test_high_rates_warn_that_they_may_be_annual(tmp_path):
    # 0.012 a month = 14.4% a year: an annual 1.2% quoted per month, or 1981 dollar rates.
    panel = read_panel(_with_column(tmp_path, 0.012), total_returns=True, risk_free="RF")
    (note,) = _rf_warnings(panel)
    assert "are high" in note and "14.4% a year" in note and "divide them by 12" in note


def test_decimal_rates_beside_percent_returns_warn(tmp_path):
    # 0.0044 (decimal, 0.44% a month) beside returns in percent reads as 0.0044% a month.
    panel = read_panel(_with_column(tmp_path, 0.0044, 100.0), units="percent",
                       total_returns=True, risk_free="RF")
    (note,) = _rf_warnings(panel)
    assert "near zero beside returns in percent" in note and "multiply them by 100" in note


@pytest.mark.parametrize("rate, scale, units", [
    (-0.0006, 1.0, None),         # -0.72% a year: slightly negative rates (e.g. CHF, EUR bills)
    (0.0044, 1.0, None),          # 5.28% a year in decimal beside decimal returns
    (0.44, 100.0, "percent"),     # the same in percent beside percent returns
    (0.0, 100.0, "percent"),      # a zero rate is deliberate: no near-zero warning
])
def test_plausible_rates_pass_silently(tmp_path, rate, scale, units):
    panel = read_panel(_with_column(tmp_path, rate, scale), units=units, total_returns=True,
                       risk_free="RF")
    assert _rf_warnings(panel) == []
    np.testing.assert_allclose(panel.values.to_numpy(), RETURNS.to_numpy() - rate / scale,
                               rtol=0, atol=1e-15)


def _rate_file(tmp_path: Path, dates, rate: float = 0.001) -> str:
    path = tmp_path / "rf.csv"
    pd.DataFrame({"date": pd.DatetimeIndex(dates).strftime("%Y-%m-%d"), "rate": rate}).to_csv(
        path, index=False)
    return str(path)


@pytest.mark.parametrize("rf_dates, returns_freq, parts", [
    (pd.bdate_range("2015-01-01", "2017-12-31"), "ME",
     ["risk-free dates are daily", "returns are monthly",
      "daily rates compounded over each month"]),
    (pd.date_range("2015-03-31", periods=12, freq="QE"), "ME",
     ["risk-free dates are quarterly", "one simple per-month rate for each month"]),
    (pd.date_range("2015-01-31", periods=36, freq="ME"), "QE",
     ["risk-free dates are monthly", "returns are quarterly (Mar/Jun/Sep/Dec)",
      "monthly rates compounded over each quarter"]),
])
def test_rate_file_at_another_frequency_is_refused(tmp_path, rf_dates, returns_freq, parts):
    frame = RETURNS.iloc[:12] if returns_freq == "QE" else RETURNS
    frame = frame.set_axis(pd.date_range("2015-01-31", periods=len(frame), freq=returns_freq))
    frame.rename_axis("date").to_csv(tmp_path / "total.csv")
    message = _refused(tmp_path / "total.csv", risk_free=_rate_file(tmp_path, rf_dates), min_obs=3)
    assert message.startswith("rf.csv: ")
    for part in parts:
        assert part in message, (part, message)


def test_rate_file_not_covering_the_returns_names_its_span(tmp_path):
    RETURNS.rename_axis("date").to_csv(tmp_path / "total.csv")
    rf = _rate_file(tmp_path, pd.date_range("2016-01-31", periods=12, freq="ME"))
    message = _refused(tmp_path / "total.csv", risk_free=rf)
    assert "no risk-free rate for the month ending 2015-01-31" in message
    assert "rf.csv (its rates run from 2016-01-31 to 2016-12-31)" in message


@pytest.fixture(scope="module")
def french_total(tmp_path_factory):
    """Total returns of four industry portfolios and the one-month bill rate ``RF`` (decimal per
    month, 1949-2017) from the Fama-French data shipped with linearmodels."""
    from linearmodels.datasets import french

    d = french.load()
    index = pd.DatetimeIndex(d["dates"]) + pd.offsets.MonthEnd(0)
    return pd.DataFrame({c: d[c].to_numpy() for c in ["NoDur", "Durbl", "Manuf", "Enrgy", "RF"]},
                        index=index).rename_axis("date")


def test_french_risk_free_column_passes(tmp_path, french_total):
    # Source: Fama-French industries and RF (linearmodels.datasets.french); excess = r - RF.
    french_total.to_csv(tmp_path / "french.csv")
    panel = read_panel(tmp_path / "french.csv", total_returns=True, risk_free="RF")
    assert _rf_warnings(panel) == []
    expected = french_total.drop(columns="RF").sub(french_total["RF"], axis=0)
    np.testing.assert_allclose(panel.values.to_numpy(), expected.to_numpy(), rtol=0, atol=1e-15)
    # The 1979-1982 bill rates (the dollar's peak, median 10.9% a year) only warn.
    french_total.loc["1979":"1982"].to_csv(tmp_path / "peak.csv")
    peak = read_panel(tmp_path / "peak.csv", total_returns=True, risk_free="RF")
    (note,) = _rf_warnings(peak)
    assert "are high" in note


@pytest.mark.parametrize("factor, reading", [
    (12, "they look like an annual rate ("),                       # RF quoted per year
    (100, "they look like a rate in percent beside decimal returns"),  # RF in percent
])
def test_french_risk_free_misquoted_is_refused(tmp_path, french_total, factor, reading):
    # Source: the RF column of linearmodels.datasets.french, quoted the wrong way on purpose.
    frame = french_total.assign(RF=french_total["RF"] * factor)
    frame.to_csv(tmp_path / "french.csv")
    message = _refused(tmp_path / "french.csv")
    assert message.startswith("french.csv: risk-free rates in column 'RF' look too large")
    assert reading in message


def test_french_near_zero_bill_rates_in_percent(tmp_path, french_total):
    # Source: linearmodels.datasets.french, 2010-2015 (bills near zero, largest 0.12% a year).
    # In percent beside percent returns they pass silently; left in decimal they warn.
    window = french_total.loc["2010":"2015"] * 100
    window.to_csv(tmp_path / "percent.csv")
    panel = read_panel(tmp_path / "percent.csv", units="percent", total_returns=True,
                       risk_free="RF")
    assert _rf_warnings(panel) == []
    window.assign(RF=window["RF"] / 100).to_csv(tmp_path / "mixed.csv")
    mixed = read_panel(tmp_path / "mixed.csv", units="percent", total_returns=True, risk_free="RF")
    (note,) = _rf_warnings(mixed)
    assert "near zero beside returns in percent" in note and "multiply them by 100" in note
