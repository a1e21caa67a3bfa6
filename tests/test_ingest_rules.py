"""The documented ingest rules, checked at their boundaries: frequency and period ends, gaps,
unit inference, exact percent conversion, excess returns."""

import numpy as np
import pandas as pd
import pytest

from panel.ingest import IngestError
from panel.ingest.frequency import MAX_GAP, Grid, Misfit, check_gaps, fit_grid, map_dates
from panel.ingest.units import decide_units, excess, to_decimal


def days(*texts):
    return np.array(texts, dtype="datetime64[D]")


def no_check(fitted):
    return check_gaps(fitted, np.ones(len(fitted.ordinals), dtype=bool))


def test_grid_ends_for_every_code():
    assert str(Grid("M").ends([0])[0]) == "1970-01-31"
    assert str(Grid("Q", 12).ends([200])[0]) == "2020-03-31"   # 1970Q1 + 200 quarters
    assert str(Grid("A", 6).ends([50])[0]) == "2020-06-30"     # fiscal year ending June
    fitted = map_dates(days("2021-04-09"), "W")                 # a Friday
    assert fitted.grid == Grid("W", 4)
    assert str(fitted.grid.ends(fitted.ordinals)[0]) == "2021-04-09"
    fitted = map_dates(days("2021-03-05", "2021-03-08"), "B")   # Friday, Monday
    assert np.diff(fitted.ordinals).tolist() == [1]
    assert Grid("Q", 11).describe() == "quarterly (Feb/May/Aug/Nov)"


def test_quarter_anchor_follows_the_dates():
    fitted = map_dates(days("2020-02-29", "2020-05-31", "2020-08-31", "2020-11-30"), "Q")
    assert fitted.grid.anchor == 11
    assert [str(d) for d in fitted.ends] == ["2020-02-29", "2020-05-31", "2020-08-31",
                                             "2020-11-30"]


def test_period_starts_label_their_own_period():
    fitted = map_dates(days("2020-01-01", "2020-04-01", "2020-07-01"), "Q")
    assert [str(d) for d in fitted.ends] == ["2020-03-31", "2020-06-30", "2020-09-30"]
    assert "start of each quarter" in fitted.notes[0]
    assert map_dates(days("2020-01-01", "2020-04-01"), "Q", labels=True).notes == ()


def test_gap_limits_are_exact():
    assert MAX_GAP == {"B": 10, "W": 4, "M": 3, "Q": 2, "A": 2}  # the documented limits
    ends = pd.date_range("2015-01-31", periods=40, freq="ME")
    for run in (MAX_GAP["M"], MAX_GAP["M"] + 1):
        dates = ends.delete(range(10, 10 + run)).values.astype("datetime64[D]")
        fitted = map_dates(dates, "M")
        if run <= MAX_GAP["M"]:
            assert f"{run} months with no data" in check_gaps(fitted, np.ones(len(dates), bool))
        else:
            with pytest.raises(Misfit, match=f"{run} months missing"):
                check_gaps(fitted, np.ones(len(dates), bool))


def test_many_isolated_gaps_are_irregular():
    ends = pd.date_range("2015-01-31", periods=40, freq="ME")
    dates = ends.delete([3, 6, 9, 12, 15]).values.astype("datetime64[D]")  # 5 of 40 missing
    with pytest.raises(Misfit, match="5 of 40 months .* have no data"):
        check_gaps(map_dates(dates, "M"), np.ones(len(dates), bool))
    fewer = ends.delete([3, 6, 9, 12]).values.astype("datetime64[D]")      # 4 of 40: allowed
    assert check_gaps(map_dates(fewer, "M"), np.ones(len(fewer), bool)).startswith("4 months")


def test_fit_grid_prefers_the_closest_fitting_code_and_explains_failures():
    quarters = days("2020-03-31", "2020-06-30")
    assert fit_grid(quarters, no_check)[0].grid.code == "Q"  # monthly would also "fit" (2 gaps)
    every_other = pd.date_range("2015-01-31", periods=30, freq="2ME").values.astype("datetime64[D]")
    with pytest.raises(Misfit, match="irregular monthly dates"):
        fit_grid(every_other, no_check)
    with pytest.raises(Misfit, match="less than a year apart"):
        fit_grid(quarters, no_check, code="A")


def test_weekly_positions():
    with pytest.raises(Misfit, match="most dates are Fridays, not 2021-01-11 \\(Monday\\)"):
        map_dates(days("2021-01-01", "2021-01-08", "2021-01-11", "2021-01-15", "2021-01-22"), "W")


@pytest.mark.parametrize("scale, code, outcome", [
    (0.03, "M", "decimal"),    # monthly equity, decimal
    (0.17, "M", "decimal"),    # z = 0.59: a very volatile sleeve, still decimal
    (0.18, "M", "unclear"),    # z = 0.62
    (0.57, "M", "unclear"),    # z = 1.97
    (0.58, "M", "percent"),    # z = 2.01
    (0.7, "B", "percent"),     # daily equity in percent
    (0.05, "B", "unclear"),    # daily: z = 0.79
    (0.5, "A", "decimal"),     # annual: z = 0.5
])
def test_unit_rule_boundaries(scale, code, outcome):
    values = np.array([scale, -scale, scale, np.nan])
    if outcome == "decimal":
        assert decide_units(values, code, None, "f.csv", "period") == ("decimal", None)
    else:
        pattern = "look like percent" if outcome == "percent" else "can't tell the units"
        with pytest.raises(IngestError, match=pattern):
            decide_units(values, code, None, "f.csv", "period")


def test_percent_to_decimal_is_exact_as_written():
    written = np.array([1.1, 0.07, -2.35, 1e-5, 123.456, np.nan])
    assert 1.1 / 100 != 0.011  # why the decimal shift exists
    np.testing.assert_array_equal(to_decimal(written, "percent"),
                                  [0.011, 0.0007, -0.0235, 1e-7, 1.23456, np.nan])


def test_excess_rules():
    total, rate = np.array([0.02, -0.01]), np.array([0.001, 0.002])
    np.testing.assert_array_equal(excess(total, rate, "simple"), total - rate)
    np.testing.assert_array_equal(excess(total, rate, "log"), total - np.log1p(rate))
