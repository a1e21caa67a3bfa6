"""read_panel on good input: layouts, units, risk-free, frequencies, warnings and provenance."""

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from panel.data import PERIODS_PER_YEAR
from panel.ingest import IngestError, IngestOptions, read_panel, write_panel

DATA = Path(__file__).parent / "data" / "ingest"
SLEEVES = ["Nordic Equity", "EM Local Bonds", "Gold Sleeve"]
GOOD = np.array([[0.0123, -0.0040, 0.0210], [-0.0211, 0.0065, -0.0132], [0.0310, 0.0012, 0.0045],
                 [0.0087, -0.0093, 0.0178], [-0.0045, 0.0038, -0.0066], [0.0152, 0.0021, 0.0099]])
MONTH_ENDS = pd.DatetimeIndex(["2021-01-31", "2021-02-28", "2021-03-31", "2021-04-30",
                               "2021-05-31", "2021-06-30"], name="date")


def read(name, **options):
    return read_panel(DATA / name, **{"min_obs": 3, **options})


def test_wide_file_gives_the_canonical_panel():
    panel = read("good_wide.csv")
    assert list(panel.values.columns) == SLEEVES
    assert panel.values.index.equals(MONTH_ENDS)
    np.testing.assert_array_equal(panel.values.to_numpy(), GOOD)
    assert panel.values.dtypes.eq("float64").all()
    assert (panel.frequency, panel.periods_per_year, panel.returns) == ("M", 12, "simple")
    assert panel.warnings == ()
    assert panel.meta["source"] == "good_wide.csv"
    assert panel.meta["layout"] == "wide" and panel.meta["units"] == "decimal"
    assert panel.meta["units_inferred"] is True and panel.meta["risk_free"] is None


def test_long_file_detected_by_names_matches_wide():
    wide, long = read("good_wide.csv"), read("good_long.csv")
    assert long.meta["layout"] == "long"
    assert long.meta["layout_rule"] == "named asset and value columns"
    assert long.hash == wide.hash  # other row order, other asset order, "1.23e-2" for "0.0123"
    assert list(long.values.columns) == ["Gold Sleeve", "Nordic Equity", "EM Local Bonds"]


def test_three_columns_with_a_text_column_read_as_long():
    panel = read("three_columns.csv")
    assert panel.meta["layout"] == "long"
    assert panel.meta["layout_rule"] == "three columns, one of asset names"
    assert panel.hash == read("good_wide.csv").hash


def test_forced_layout_and_configured_names():
    with pytest.raises(IngestError, match="column 'sleeve': non-numeric return 'Gold Sleeve'"):
        read("three_columns.csv", layout="wide")
    panel = read("three_columns.csv", layout="long", date_col="MONTH", asset_col="sleeve",
                 value_col="ret")
    assert panel.meta["layout_rule"] == "forced" and panel.meta["date_column"] == "month"


def test_percent_file_converts_exactly_to_the_decimal_twin():
    panel = read("looks_percent.csv", units="percent")
    assert panel.meta["units"] == "percent" and panel.meta["units_inferred"] is False
    assert panel.hash == read("good_wide.csv").hash  # "1.23" percent is exactly "0.0123"


def test_declared_units_are_obeyed_with_a_warning():
    panel = read("looks_percent.csv", units="decimal", allow_extreme=True)
    assert panel.values.iloc[2, 0] == 3.10
    assert any("looks like percent" in w for w in panel.warnings)


def test_extreme_value_accepted_when_allowed():
    panel = read("extreme.csv", allow_extreme=True)
    assert panel.values.loc["2021-03-31", "Gold Sleeve"] == 250.0


def test_total_returns_minus_risk_free_column():
    panel = read("total_rf_column.csv", total_returns=True, risk_free="RF")
    assert list(panel.values.columns) == SLEEVES  # the rate column is not an asset
    np.testing.assert_allclose(panel.values.to_numpy(), GOOD, rtol=0, atol=1e-15)
    assert panel.meta["risk_free"] == {"source": "column", "name": "RF", "column": "RF",
                                       "rule": "r - rf"}
    assert panel.meta["excess"] == "total minus risk-free"


def test_risk_free_file_with_month_labels_equals_the_column():
    by_file = read("total_only.csv", total_returns=True, risk_free=str(DATA / "rf_monthly.csv"))
    by_column = read("total_rf_column.csv", total_returns=True, risk_free="RF")
    assert by_file.hash == by_column.hash
    assert by_file.meta["risk_free"]["source"] == "file"
    assert by_file.meta["risk_free"]["name"] == "rf_monthly.csv"


def test_log_returns_subtract_log_of_one_plus_rate():
    panel = read("total_rf_column.csv", total_returns=True, risk_free="RF", returns="log")
    total = pd.read_csv(DATA / "total_rf_column.csv", index_col=0)
    expected = total[SLEEVES].to_numpy() - np.log1p(total[["RF"]].to_numpy())
    np.testing.assert_allclose(panel.values.to_numpy(), expected, rtol=0, atol=1e-16)
    assert panel.returns == "log" and panel.meta["risk_free"]["rule"] == "r - log(1 + rf)"


def test_unsorted_rows_are_sorted_with_a_warning():
    panel = read("unsorted.csv")
    assert panel.values.index.equals(MONTH_ENDS)
    assert panel.hash == read("good_wide.csv").hash
    assert panel.warnings == ("rows were not in date order (line 6: 2021-03-31 after "
                              "2021-05-31); sorted by date",)


def test_empty_column_and_short_asset_are_dropped_with_warnings():
    empty = read("empty_column.csv")
    assert "Cash Sleeve" not in empty.values.columns
    assert empty.warnings == ("asset 'Cash Sleeve' has no values; dropped",)
    short = read("short_asset.csv")
    assert list(short.values.columns) == ["Nordic Equity", "EM Local Bonds"]
    assert short.warnings == ("asset 'Gold Sleeve' has 2 observations (fewer than min_obs=3); "
                              "dropped",)


def test_default_min_obs_is_24_and_min_assets_one():
    with pytest.raises(IngestError, match="only 0 usable asset"):
        read_panel(DATA / "good_wide.csv")
    assert read("one_asset.csv").assets == ("Nordic Equity",)


def test_missing_month_becomes_a_nan_row(tmp_path):
    text = (DATA / "good_wide.csv").read_text().splitlines()
    path = tmp_path / "gap.csv"
    path.write_text("\n".join(text[:3] + text[4:]) + "\n")  # drop March
    panel = read_panel(path, min_obs=3)
    assert panel.values.index.equals(MONTH_ENDS)
    assert panel.values.loc["2021-03-31"].isna().all()
    assert panel.warnings == ("1 month with no data in any asset (first after 2021-02-28) kept "
                              "as missing",)


def _write(path, index, values, fmt=None):
    frame = pd.DataFrame(values, index=pd.Index(index, name="date"),
                         columns=SLEEVES[:values.shape[1]])
    if fmt:
        frame.index = frame.index.strftime(fmt)
    frame.to_csv(path)
    return path


RNG = np.random.default_rng(20240611)


@pytest.mark.parametrize("code, dates, expected, scale", [
    ("B", pd.bdate_range("2021-03-01", periods=40), pd.bdate_range("2021-03-01", periods=40), 0.01),
    ("W", pd.date_range("2021-01-01", periods=30, freq="W-FRI"),
     pd.date_range("2021-01-01", periods=30, freq="W-FRI"), 0.02),
    ("M", pd.date_range("2019-01-01", periods=30, freq="BMS"),  # first business days
     pd.date_range("2019-01-31", periods=30, freq="ME"), 0.04),
    ("M", pd.date_range("2019-01-01", periods=30, freq="BME"),  # last business days
     pd.date_range("2019-01-31", periods=30, freq="ME"), 0.04),
    ("Q", pd.date_range("2010-03-31", periods=30, freq="QE"),
     pd.date_range("2010-03-31", periods=30, freq="QE"), 0.08),
    ("A", pd.date_range("1990-06-30", periods=30, freq="YE-JUN"),  # fiscal years ending June
     pd.date_range("1990-06-30", periods=30, freq="YE-JUN"), 0.15),
])
def test_frequency_inferred_and_dates_moved_to_period_ends(tmp_path, code, dates, expected, scale):
    path = _write(tmp_path / "f.csv", dates, RNG.normal(0, scale, (len(dates), 2)))
    panel = read_panel(path, min_obs=20)
    assert panel.frequency == code
    assert panel.periods_per_year == PERIODS_PER_YEAR[code]
    assert panel.values.index.equals(pd.DatetimeIndex(expected, name="date"))


@pytest.mark.parametrize("fmt, freq, code", [("%Y%m", "ME", "M"), ("%Y-%m", "ME", "M"),
                                             ("%Y", "YE", "A"), ("%Y%m%d", "ME", "M")])
def test_period_labels(tmp_path, fmt, freq, code):
    ends = pd.date_range("1995-01-31", periods=26, freq=freq)
    path = _write(tmp_path / "labels.csv", ends, RNG.normal(0, 0.05, (26, 2)), fmt)
    panel = read_panel(path, min_obs=24)
    assert panel.frequency == code and panel.warnings == ()
    assert panel.values.index.equals(pd.DatetimeIndex(ends, name="date"))


def test_quarter_labels_and_date_format(tmp_path):
    path = tmp_path / "q.csv"
    path.write_text("date,Gold Sleeve\n2020Q1,0.02\n2020Q2,-0.03\n2020-Q3,0.01\n2020Q4,0.04\n")
    panel = read_panel(path, min_obs=4)
    assert panel.frequency == "Q"
    assert list(panel.dates.strftime("%Y-%m-%d")) == ["2020-03-31", "2020-06-30", "2020-09-30",
                                                      "2020-12-31"]
    path.write_text("Datum;Gold Sleeve\n31/01/2020;0.02\n29/02/2020;-0.03\n31/03/2020;0.01\n")
    panel = read_panel(path, min_obs=3, date_format="%d/%m/%Y")
    assert panel.frequency == "M" and panel.meta["date_column"] == "Datum"


def test_weekly_holiday_and_daily_gaps_give_notes(tmp_path):
    fridays = pd.date_range("2021-01-01", periods=30, freq="W-FRI")
    shifted = fridays.where(fridays != pd.Timestamp("2021-04-02"), pd.Timestamp("2021-04-01"))
    path = _write(tmp_path / "w.csv", shifted, RNG.normal(0, 0.02, (30, 2)))
    panel = read_panel(path, min_obs=20)
    assert panel.values.index.equals(pd.DatetimeIndex(fridays, name="date"))
    assert panel.warnings == ("1 weekly date(s) not on a Friday (first: 2021-04-01) are dated at "
                              "that week's Friday",)
    days = pd.bdate_range("2021-03-01", periods=40).delete([10, 25])
    panel = read_panel(_write(tmp_path / "d.csv", days, RNG.normal(0, 0.01, (38, 2))), min_obs=20)
    assert len(panel.values) == 40
    assert "2 business days with no data in any asset (holidays?)" in panel.warnings[0]


def test_month_start_dates_are_noted(tmp_path):
    starts = pd.date_range("2019-01-01", periods=25, freq="MS")
    panel = read_panel(_write(tmp_path / "ms.csv", starts, RNG.normal(0, 0.04, (25, 2))))
    assert panel.values.index[0] == pd.Timestamp("2019-01-31")
    assert panel.warnings[0].startswith("dates are at the start of each month (e.g. 2019-01-01)")


def test_parquet_typed_columns_and_integer_labels(tmp_path):
    path = tmp_path / "typed.parquet"
    pq.write_table(pa.table({"date": pa.array(MONTH_ENDS.date, pa.date32()),
                             **{s: pa.array(GOOD[:, j]) for j, s in enumerate(SLEEVES)}}), path)
    assert read_panel(path, min_obs=3).hash == read("good_wide.csv").hash
    pq.write_table(pa.table({"yyyymm": pa.array([202101, 202102, 202103, 202104, 202105, 202106]),
                             **{s: pa.array(GOOD[:, j]) for j, s in enumerate(SLEEVES)}}), path)
    panel = read_panel(path, min_obs=3)
    assert panel.hash == read("good_wide.csv").hash and panel.meta["format"] == "parquet"


def test_asset_names_trimmed_and_unicode_kept(tmp_path):
    path = tmp_path / "names.csv"
    path.write_text("\ufeffdate, Malmö Småbolag ,  Ελληνικά Ομόλογα\n"
                    "2021-01-31,0.01,0.02\n"
                    "2021-02-28,0.03,-0.01\n\n2021-03-31,-0.02,0.00\n,,\n", encoding="utf-8")
    panel = read_panel(path, min_obs=3)
    assert panel.assets == ("Malmö Småbolag", "Ελληνικά Ομόλογα")


def test_options_record_is_json_and_round_trips():
    options = IngestOptions(units="percent", min_obs=3, risk_free="RF", total_returns=True)
    data = json.loads(json.dumps(options.to_dict()))
    assert IngestOptions.from_dict(data) == options
    panel = read_panel(DATA / "total_rf_column.csv", IngestOptions(min_obs=3, total_returns=True,
                                                                   risk_free="RF"))
    assert panel.meta["options"]["risk_free"] == "RF"
    json.dumps(panel.meta)
    with pytest.raises(IngestError, match="unknown ingest option"):
        IngestOptions.from_dict({"unit": "percent"})


def test_write_panel_refuses_bad_targets(tmp_path):
    panel = read("good_wide.csv")
    with pytest.raises(IngestError, match="writes .csv or .parquet"):
        write_panel(panel, tmp_path / "x.xlsx")
    with pytest.raises(IngestError, match="not 'wide' or 'long'"):
        write_panel(panel, tmp_path / "x.csv", layout="tall")


def test_long_file_with_a_rate_column(tmp_path):
    wide = (DATA / "total_rf_column.csv").read_text().splitlines()
    header = wide[0].split(",")
    rows = ["date,asset,value,RF"]
    for line in wide[1:]:
        cells = line.split(",")
        rows += [f"{cells[0]},{a},{v},{cells[-1]}" for a, v in zip(header[1:-1], cells[1:-1])]
    path = tmp_path / "long_rf.csv"
    path.write_text("\n".join(rows) + "\n")
    panel = read_panel(path, min_obs=3, total_returns=True, risk_free="RF")
    assert panel.meta["layout"] == "long"
    assert panel.hash == read("total_rf_column.csv", total_returns=True, risk_free="RF").hash
    rows[5] = rows[5].rsplit(",", 1)[0] + ",0.0019"  # February rate of the 2nd sleeve differs
    path.write_text("\n".join(rows) + "\n")
    with pytest.raises(IngestError, match="line 6, column 'RF': risk-free rate '0.0019' differs "
                                          "from '0.0010' \\(line 5\\)"):
        read_panel(path, min_obs=3, total_returns=True, risk_free="RF")
