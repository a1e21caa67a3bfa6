"""Dates a panel cannot hold (beyond pandas' nanosecond timestamps, 1677-09-22 to 2262-04-11) are
refused in one line wherever they come in: a CSV or Parquet file, a DataFrame, a store changed
outside riskprem.  Before, a date after 2262 was shifted by centuries without a word."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import panel
from tests.hostile import hostile_store, one_line_error  # noqa: F401  (fixture)


def _monthly(path, first: str, months: int = 36):
    rng = np.random.default_rng(3)
    frame = pd.DataFrame(rng.normal(0.5, 4.0, (months, 3)), columns=["Oak", "Ash", "Yew"])
    frame.insert(0, "date", pd.period_range(first, periods=months, freq="M").strftime("%Y-%m-%d"))
    frame.to_csv(path, index=False)
    return path


@pytest.mark.parametrize("first, shown", [
    ("2300-01", "'2300-01-31'"),          # all after 2262
    ("1600-01", "'1600-01-31'"),          # all before 1677
    ("2260-01", "'2262-04-30'"),          # runs past the end in row 28 (line 29 of the file)
])
def test_csv_dates_beyond_the_range_are_refused(hostile_store, tmp_path, first, shown):
    path = _monthly(tmp_path / "far.csv", first)
    for args in (["ingest", path, "--name", "far", "--units", "percent"],
                 ["fit", "--file", path, "--units", "percent"]):
        line = one_line_error(hostile_store.invoke(*args), "far.csv", shown, "1677-09-22 to 2262-04-11",
                              "correct the year")
    assert ("line 29" in line) == first.startswith("2260")


def test_a_period_that_ends_beyond_the_range_is_refused(hostile_store, tmp_path):
    # Month labels: '2262-04' reads as 2262-04-01, inside the range, but its month ends on
    # 2262-04-30, outside it.
    path = tmp_path / "edge.csv"
    months = pd.period_range("2259-05", "2262-04", freq="M").strftime("%Y-%m")
    lines = ["date,Oak,Ash"] + [f"{m},{0.5 - i % 3 * 0.4:.1f},{0.3 * (i % 2) - 0.2:.1f}" for i, m in enumerate(months)]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    one_line_error(hostile_store.invoke("ingest", path, "--name", "edge", "--units", "percent"),
                   "month ending 2262-04-30", "1677-09-22 to 2262-04-11")


def test_parquet_timestamps_beyond_the_range_are_refused(hostile_store, tmp_path):
    # Parquet keeps microsecond (or coarser) timestamps, which reach far beyond 2262.
    path = tmp_path / "far.parquet"
    dates = pd.DatetimeIndex(np.array(["2262-02-28", "2262-03-31", "2262-04-30"], dtype="datetime64[s]"))
    pd.DataFrame({"date": dates, "Oak": [0.01, -0.02, 0.03]}).to_parquet(path)
    one_line_error(hostile_store.invoke("ingest", path, "--name", "far", "--units", "decimal",
                                        "--frequency", "M", "--min-obs", "1"),
                   "row 3", "'2262-04-30'", "1677-09-22 to 2262-04-11")


def test_from_frame_refuses_them_too():
    dates = pd.DatetimeIndex(np.array(["2300-01-31", "2300-02-28"], dtype="datetime64[s]"))
    with pytest.raises(ValueError, match=r"row 1: date 2300-01-31 is outside .*1677-09-22 to 2262-04-11"):
        panel.Panel.from_frame(pd.DataFrame({"Oak": [0.01, 0.02]}, index=dates))


def test_a_store_holding_such_a_date_is_refused_on_reading(cli_store):
    """A store changed by another program: commands that read the dates refuse in one line and
    leave the store as it is."""
    import duckdb

    if not cli_store.is_duckdb:
        pytest.skip("edits the DuckDB file directly")
    con = duckdb.connect(str(cli_store.path))
    con.execute("UPDATE dataset_dates SET date = DATE '2300-01-31' WHERE date = DATE '2019-12-31'")
    con.execute("UPDATE estimates SET date = DATE '2300-01-31' WHERE date = DATE '2019-12-31'")
    con.close()
    digest = cli_store.digest()
    for args in (["fit", "--data", "trees"], ["estimates", "1"], ["show", "1"], ["reproduce", "1"]):
        one_line_error(cli_store.invoke(*args), "2300-01-31", "1677-09-22 to 2262-04-11", "restore it")
    assert cli_store.digest() == digest
