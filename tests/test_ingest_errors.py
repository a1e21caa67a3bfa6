"""One hand-made bad file per ingest rule: each must be refused with ONE line that names the file,
where the problem is (line/row, column) and the offending value."""

from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from panel.ingest import IngestError, IngestOptions, read_panel

DATA = Path(__file__).parent / "data" / "ingest"
RF = {"total_returns": True, "risk_free": "RF"}

# (file, options, substrings the message must contain)
CASES = [
    ("empty.csv", {}, ["the file is empty"]),
    ("header_only.csv", {}, ["no data rows below the header"]),
    ("no_date_column.csv", {}, ["no date column", "'Nordic Equity'", "'0.0123'", "line 2",
                                "date_col="]),
    ("good_wide.csv", {"date_col": "Month"}, ["no date column 'Month'", "'date'", "date_col="]),
    ("bad_date.csv", {}, ["line 4", "column 'date'", "'2021-13-31'", "date_format="]),
    ("empty_date.csv", {}, ["line 5", "column 'date'", "empty date"]),
    ("non_numeric.csv", {}, ["line 4", "column 'Gold Sleeve'", "non-numeric", "'abc'"]),
    ("percent_sign.csv", {}, ["line 4", "column 'Gold Sleeve'", "'0.45%'", "units='percent'"]),
    ("decimal_comma.csv", {}, ["line 4", "column 'Gold Sleeve'", "'0,0045'", "decimal mark"]),
    ("infinite.csv", {}, ["line 4", "column 'Gold Sleeve'", "'inf'", "finite"]),
    ("duplicate_date.csv", {}, ["line 4 and line 6", "2021-03-31", "appears twice"]),
    ("duplicate_pair_long.csv", {}, ["line 10 and line 12", "(2021-03-31, 'Nordic Equity')",
                                     "one row per date and asset"]),
    ("two_in_month_long.csv", {}, ["line 10", "line 12", "'Nordic Equity'", "2021-03-30",
                                   "month ending 2021-03-31"]),
    ("empty_asset_long.csv", {}, ["line 15", "column 'asset'", "empty asset name"]),
    ("long_extra_column.csv", {}, ["unexpected column 'source'", "layout='wide'"]),
    ("duplicate_header.csv", {}, ["'Nordic Equity'", "columns 2 and 3"]),
    ("ragged_line.csv", {}, ["line 5", "5 fields", "header has 4"]),
    ("unnamed_column.csv", {}, ["column 5", "no name"]),
    ("not_utf8.csv", {}, ["not UTF-8", "0xf6", "offset 9"]),
    ("short_asset.csv", {"on_short": "refuse"}, ["'Gold Sleeve'", "only 2 observations",
                                                 "min_obs=3", "on_short='drop'"]),
    ("one_asset.csv", {"min_assets": 2}, ["only 1 usable asset", "'Nordic Equity'", "at least 2"]),
    ("extreme.csv", {}, ["line 4", "column 'Gold Sleeve'", "'250'", "+25000%",
                         "allow_extreme=True"]),
    ("looks_percent.csv", {}, ["look like percent", "median |r| = 0.9 per month",
                               "units='percent'", "units='decimal'"]),
    ("unclear_units.csv", {}, ["can't tell the units", "0.31", "units='decimal'",
                               "units='percent'"]),
    ("mixed_positions.csv", {}, ["mixed positions in the month", "month ends", "2021-03-15"]),
    ("big_gap.csv", {}, ["irregular monthly dates", "2020-04-30 to 2020-10-31",
                         "5 months missing"]),
    ("weekend_daily.csv", {}, ["weekend", "2021-03-06 (Saturday)"]),
    ("single_date.csv", {}, ["only one date (2021-01-31)", "frequency="]),
    ("good_wide.csv", {"frequency": "Q"}, ["less than a quarter apart", "2021-01-31",
                                           "2021-02-28"]),
    ("rf_missing.csv", RF, ["line 5", "no risk-free rate", "2021-04-30", "column 'RF'"]),
    ("total_only.csv", {"total_returns": True, "risk_free": str(DATA / "rf_annualised.csv")},
     ["rf_annualised.csv", "line 6", "column 'rate'", "'5.0'", "per period"]),
    ("total_only.csv", {"total_returns": True, "risk_free": str(DATA / "rf_percent.csv")},
     ["rf_percent.csv", "column 'rate'", "look too large", "median 0.11 per month",
      "132% a year", "a rate in percent beside decimal returns (1.32% a year: divide by 100)"]),
    ("total_only.csv", {"total_returns": True, "risk_free": "RiskFree"},
     ["'RiskFree'", "neither a column", "existing file"]),
    ("impossible_total.csv", {**RF, "allow_extreme": True},
     ["line 3", "column 'EM Local Bonds'", "'-1.5'", "below -100%"]),
]


def _message(path, **options) -> str:
    with pytest.raises(IngestError) as caught:
        read_panel(path, **{"min_obs": 3, **options})
    return str(caught.value)


@pytest.mark.parametrize("name, options, parts", CASES,
                         ids=[f"{c[0]}-{'-'.join(map(str, c[1].values()))}"[:60] for c in CASES])
def test_bad_file_gives_one_clear_line(name, options, parts):
    message = _message(DATA / name, **options)
    assert "\n" not in message
    culprit = parts[0] if parts[0].endswith(".csv") else name  # a risk-free file is named itself
    assert message.startswith(culprit + ": ")
    for part in parts:
        assert part in message, (part, message)


def test_errors_are_value_errors_and_deterministic():
    first = _message(DATA / "non_numeric.csv")
    assert first == _message(DATA / "non_numeric.csv")
    assert issubclass(IngestError, ValueError)


def test_parquet_cells_are_located_by_row(tmp_path):
    path = tmp_path / "sleeves.parquet"
    pq.write_table(pa.table({
        "date": ["2021-01-31", "2021-02-28", "2021-03-31", "2021-04-30"],
        "Nordic Equity": ["0.01", "0.02", "-0.01", "0.00"],
        "Gold Sleeve": ["0.01", "0.02", "n.a.", "0.03"],
    }), path)
    message = _message(path)
    assert message.startswith("sleeves.parquet: row 3, column 'Gold Sleeve'")
    assert "'n.a.'" in message


def test_not_a_parquet_file(tmp_path):
    path = tmp_path / "broken.parquet"
    path.write_text("date,Gold Sleeve\n2021-01-31,0.01\n")
    assert "broken.parquet: not a readable Parquet file" in _message(path)


def test_empty_parquet(tmp_path):
    path = tmp_path / "nothing.parquet"
    pq.write_table(pa.table({"date": pa.array([], pa.date32()),
                             "Gold Sleeve": pa.array([], pa.float64())}), path)
    assert "nothing.parquet: the file is empty" in _message(path)


def test_unknown_suffix_and_missing_file(tmp_path):
    odd = tmp_path / "returns.xlsx"
    odd.write_bytes(b"PK")
    assert "returns.xlsx: unknown file type '.xlsx'" in _message(odd)
    assert "absent.csv: no such file" in _message(tmp_path / "absent.csv")


@pytest.mark.parametrize("options, part", [
    ({"units": "pct"}, "option units='pct' is not one of None, 'decimal', 'percent'"),
    ({"layout": "tall"}, "option layout='tall'"),
    ({"min_obs": 0}, "option min_obs=0 must be an integer >= 1"),
    ({"risk_free": "RF"}, "total_returns=True"),
    ({"total_returns": True}, "needs a risk-free rate"),
    ({"frequency": "D"}, "option frequency='D'"),
])
def test_bad_options_are_refused_in_one_line(options, part):
    with pytest.raises(IngestError) as caught:
        IngestOptions(**options)
    assert part in str(caught.value)
    assert "\n" not in str(caught.value)
