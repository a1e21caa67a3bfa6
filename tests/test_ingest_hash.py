"""The content hash: the same data in any layout, file type, row/column order or number format
hash alike; any value, date or asset-name change alters the hash."""

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from panel.data import Panel, canonical_hash
from panel.ingest import read_panel, write_panel

SETTINGS = settings(max_examples=25, deadline=None, derandomize=True,
                    suppress_health_check=[HealthCheck.function_scoped_fixture])
FORMATS = {
    "repr": repr,
    "g17": lambda v: f"{v:.17g}",
    "e17": lambda v: f"{v:.17e}",
    "padded": lambda v: (repr(v) + "000") if "e" not in repr(v) and "." in repr(v) else repr(v),
    "plus": lambda v: repr(v) if repr(v).startswith("-") else "+" + repr(v),  # -0.0 keeps its sign
}


def _sleeve_panel(seed: int, months: int = 30) -> Panel:
    rng = np.random.default_rng(seed)
    values = rng.normal(0.004, 0.03, (months, 4))
    values[rng.random((months, 4)) < 0.1] = np.nan
    values[:, 0] = rng.normal(0.004, 0.03, months)  # one full column keeps every month present
    index = pd.date_range("2018-01-31", periods=months, freq="ME")
    sleeves = ["Nordic Equity", "EM Local Bonds", "Gold Sleeve", "Ásia Crédito"]
    frame = pd.DataFrame(values, index=index, columns=sleeves)
    return Panel.from_frame(frame)


@pytest.mark.parametrize("layout", ["wide", "long"])
@pytest.mark.parametrize("suffix", ["csv", "parquet"])
def test_round_trip_every_layout_and_file_type(tmp_path, layout, suffix):
    panel = _sleeve_panel(7)
    back = read_panel(write_panel(panel, tmp_path / f"p.{suffix}", layout), min_obs=1)
    assert back.hash == panel.hash
    assert back.values.index.equals(panel.values.index)
    assert list(back.values.columns) == list(panel.values.columns)
    np.testing.assert_array_equal(back.values.to_numpy(), panel.values.to_numpy())


def test_csv_and_parquet_wide_and_long_agree(tmp_path):
    panel = _sleeve_panel(11)
    hashes = set()
    for layout in ("wide", "long"):
        for suffix in ("csv", "parquet"):
            first = read_panel(write_panel(panel, tmp_path / f"a.{suffix}", layout), min_obs=1)
            again = read_panel(write_panel(first, tmp_path / f"b.{suffix}", layout), min_obs=1)
            hashes |= {first.hash, again.hash}
    assert hashes == {panel.hash}


def _write_text(path, frame: pd.DataFrame, fmt, row_order, col_order):
    columns = [frame.columns[j] for j in col_order]
    lines = [",".join(["date", *columns])]
    for i in row_order:
        cells = [FORMATS[fmt](float(frame.iat[i, frame.columns.get_loc(c)]))
                 if not np.isnan(frame.iat[i, frame.columns.get_loc(c)]) else "" for c in columns]
        lines.append(",".join([frame.index[i].strftime("%Y-%m-%d"), *cells]))
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")


values = st.floats(min_value=-0.9, max_value=0.9, allow_nan=False, width=64)
names = st.text(st.characters(categories=["L", "N"]), min_size=1, max_size=8).filter(
    lambda s: s.casefold() not in {"date", "asset", "value"})


@st.composite
def panels(draw):
    n_assets = draw(st.integers(1, 4))
    n_dates = draw(st.integers(2, 8))
    assets = draw(st.lists(names, min_size=n_assets, max_size=n_assets, unique=True))
    grid = np.array(draw(st.lists(values, min_size=n_assets * n_dates,
                                  max_size=n_assets * n_dates))).reshape(n_dates, n_assets)
    holes = np.array(draw(st.lists(st.booleans(), min_size=grid.size, max_size=grid.size)))
    grid[holes.reshape(grid.shape)] = np.nan
    grid[:, 0] = np.where(np.isnan(grid[:, 0]), 0.001, grid[:, 0])  # every month present
    grid[-1, :] = np.where(np.isnan(grid[-1, :]), -0.002, grid[-1, :])  # no asset without data
    index = pd.date_range("2020-01-31", periods=n_dates, freq="ME")
    return pd.DataFrame(grid, index=index, columns=assets)


@SETTINGS
@given(frame=panels(), fmt=st.sampled_from(sorted(FORMATS)), data=st.data())
def test_hash_ignores_order_and_number_format(tmp_path, frame, fmt, data):
    rows = data.draw(st.permutations(range(len(frame))))
    cols = data.draw(st.permutations(range(frame.shape[1])))
    path = tmp_path / "shuffled.csv"
    _write_text(path, frame, fmt, rows, cols)
    panel = read_panel(path, min_obs=1, units="decimal")
    assert panel.hash == canonical_hash(frame)
    assert panel.hash == canonical_hash(frame.iloc[list(rows), list(cols)])


@SETTINGS
@given(frame=panels(), data=st.data())
def test_hash_sees_any_value_change(frame, data):
    present = np.argwhere(~np.isnan(frame.to_numpy()))
    i, j = present[data.draw(st.integers(0, len(present) - 1))]
    old = frame.iat[i, j]
    new = data.draw(values.filter(lambda v: v != old))  # 0.0 == -0.0: those hash alike
    changed = frame.copy()
    changed.iat[i, j] = new
    assert canonical_hash(changed) != canonical_hash(frame)
    emptied = frame.copy()
    emptied.iat[i, j] = np.nan
    assert canonical_hash(emptied) != canonical_hash(frame)


@SETTINGS
@given(frame=panels(), data=st.data())
def test_hash_sees_a_date_change_or_rename(frame, data):
    i = data.draw(st.integers(0, len(frame) - 1))
    moved = frame.copy()
    moved.index = moved.index.where(moved.index != moved.index[i],
                                    moved.index[i] + pd.Timedelta(days=400 * 31))
    assert canonical_hash(moved) != canonical_hash(frame)
    j = data.draw(st.integers(0, frame.shape[1] - 1))
    new_name = data.draw(names.filter(lambda s: s not in frame.columns))
    renamed = frame.rename(columns={frame.columns[j]: new_name})
    assert canonical_hash(renamed) != canonical_hash(frame)


def test_hash_folds_negative_zero_and_ignores_empty_rows():
    frame = _sleeve_panel(3).values
    signed = frame.copy()
    signed.iloc[0, 0] = -0.0
    plain = frame.copy()
    plain.iloc[0, 0] = 0.0
    assert canonical_hash(signed) == canonical_hash(plain)
    padded = frame.reindex(frame.index.append(pd.DatetimeIndex(["2030-01-31"])))
    assert canonical_hash(padded) == canonical_hash(frame)
