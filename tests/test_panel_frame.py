"""Panel.from_frame: one hand-made bad frame per rule, each refused in one line; the same data
written to a file is refused by read_panel too, so the API and ingest agree."""

import numpy as np
import pandas as pd
import pytest

from panel.data import Panel
from panel.ingest import IngestError, read_panel

DATES = pd.date_range("2021-01-31", periods=4, freq="ME")


def _frame(**columns) -> pd.DataFrame:
    """Invented decimal excess returns, four month ends, two assets (override any column)."""
    base = {"Nordic Equity": [0.0133, -0.0201, 0.0321, 0.0098],
            "Gold Sleeve": [0.0220, np.nan, 0.0056, 0.0189]}
    return pd.DataFrame({**base, **columns}, index=DATES)


def _refused(frame, error=ValueError, **kwargs) -> str:
    with pytest.raises(error) as caught:
        Panel.from_frame(frame, **kwargs)
    message = str(caught.value)
    assert "\n" not in message
    return message


# (bad frame, substrings of the refusal, also refused by read_panel when written to CSV)
CASES = [
    (_frame(**{"Gold Sleeve": [0.02, np.inf, 0.0, 0.01]}),
     ["asset 'Gold Sleeve', date 2021-02-28", "+inf", "infinite", "NaN"], True),
    (_frame().set_axis(DATES[[0, 1, 1, 3]]), ["date 2021-02-28 appears twice", "rows 2 and 3",
                                               "one row per date"], True),
    (_frame().set_axis(DATES[[0, 1, 1, 3]] + pd.to_timedelta([0, 0, 9, 0], unit="h")),
     ["date 2021-02-28 appears twice"], True),  # same day, another time: still one date
    (_frame(**{"Gold Sleeve": ["0.02", "abc", None, "0.01"]}),
     ["asset 'Gold Sleeve', date 2021-02-28", "'abc' is not a number"], True),
    (_frame(**{"Gold Sleeve": [True, False, True, True]}), ["'Gold Sleeve' holds booleans"], True),
    (_frame().set_axis(["Gold", " Gold "], axis=1), ["asset 'Gold' appears twice",
                                                    "columns 1 and 2"], True),
    (_frame().set_axis(["Gold", " "], axis=1), ["column 2 has an empty asset name"], True),
    (_frame().iloc[:0], ["the frame is empty (0 dates x 2 assets)"], True),
    (_frame().assign(**{"Nordic Equity": np.nan, "Gold Sleeve": np.nan}),
     ["no returns: every cell is NaN"], True),
    (_frame().set_axis([0, 1, 2, 3]), ["index holds int64 values (e.g. 0), not dates"], True),
    (_frame().set_axis(["2021-01-31", "2021-02-28", "end of March", "2021-04-30"]),
     ["row 3: index value 'end of March' is not a date"], True),
    (_frame().set_axis(DATES[:3].append(pd.DatetimeIndex([pd.NaT]))),
     ["row 4 has no date (NaT)"], True),
    (_frame().set_axis(DATES.tz_localize("UTC")), ["time zone (UTC)", "tz_localize(None)"], False),
]


@pytest.mark.parametrize("frame, parts, by_file", CASES, ids=[c[1][0][:40] for c in CASES])
def test_bad_frame_is_refused_like_a_bad_file(tmp_path, frame, parts, by_file):
    message = _refused(frame)
    assert message.startswith("Panel.from_frame: ")
    for part in parts:
        assert part in message, (part, message)
    if by_file:  # the same data as a file: ingest refuses it as well
        path = tmp_path / "bad.csv"
        frame.rename_axis("date").to_csv(path)
        with pytest.raises(IngestError):
            read_panel(path, min_obs=1)


def test_bad_arguments():
    assert "frequency='X'" in _refused(_frame(), frequency="X")
    assert "returns='total'" in _refused(_frame(), returns="total")
    assert "series.to_frame" in _refused(_frame()["Gold Sleeve"], error=TypeError)


def test_unsorted_dates_and_empty_assets_are_fixed_with_warnings(tmp_path):
    frame = _frame(Empty=np.nan).iloc[[2, 0, 1, 3]]
    panel = Panel.from_frame(frame, warnings=("from the caller",))
    assert panel.dates.equals(pd.DatetimeIndex(DATES, name="date"))
    assert panel.assets == ("Nordic Equity", "Gold Sleeve")
    assert panel.warnings == ("from the caller",
                              "dates were not in order (row 2: 2021-01-31 after 2021-03-31); "
                              "sorted by date", "asset 'Empty' has no values; dropped")
    # read_panel does the same to the same file: same panel, same hash
    path = tmp_path / "unsorted.csv"
    frame.rename_axis("date").to_csv(path)
    assert read_panel(path, min_obs=1).hash == panel.hash


def test_good_frames_agree_with_the_file_route(tmp_path):
    good = _frame(**{"Gold Sleeve": [0.0220, np.nan, -0.0006, 0.0189]})
    panel = Panel.from_frame(good)
    assert panel.warnings == () and panel.values.dtypes.eq("float64").all()
    path = tmp_path / "good.csv"
    good.rename_axis("date").to_csv(path)
    assert read_panel(path, min_obs=1).hash == panel.hash
    # A PeriodIndex means period ends; a time of day is dropped; nullable floats are fine.
    by_period = good.set_axis(pd.period_range("2021-01", periods=4, freq="M"))
    assert Panel.from_frame(by_period).hash == panel.hash
    assert Panel.from_frame(good.set_axis(DATES + pd.Timedelta(hours=16))).hash == panel.hash
    assert Panel.from_frame(good.astype("Float64")).hash == panel.hash
